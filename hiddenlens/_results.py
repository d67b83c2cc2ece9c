"""Helpers shared by the frozen result objects: read-only arrays and mappings."""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np

__all__ = ["readonly", "frozen_mapping"]


def readonly(array: Any, dtype: Any = None) -> np.ndarray:
    """Return a read-only numpy copy of ``array`` (a tensor is detached and moved to the CPU).

    An array that is already read-only (and of the requested dtype) is returned as it is.
    """
    if isinstance(array, np.ndarray) and not array.flags.writeable and (
            dtype is None or array.dtype == np.dtype(dtype)):
        return array
    if hasattr(array, "detach"):
        array = array.detach().cpu().numpy()
    out = np.array(array, dtype=dtype, copy=True)
    out.setflags(write=False)
    return out


def frozen_mapping(mapping: Mapping[str, Any] | None) -> Mapping[str, Any]:
    """A read-only view of a shallow copy of ``mapping``."""
    return MappingProxyType(dict(mapping or {}))
