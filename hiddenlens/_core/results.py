"""The one base of every result: frozen, read-only arrays, common metadata, plot/to_frame/to_dict.

Every analysis returns a frozen dataclass built on :class:`Result`. Its ``__post_init__`` makes
every ndarray field a read-only copy and every mapping field read-only, also when a new result is
made with ``dataclasses.replace`` (which calls ``__post_init__`` again). ``metadata`` carries the
same keys on every result (:data:`METADATA_KEYS`), filled in from the system, the trace and the
options by :func:`stamp` at the analysis boundary.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np

__all__ = ["readonly", "frozen_mapping", "Result", "METADATA_KEYS", "stamp", "jsonable"]

#: keys every result's ``metadata`` has (None where not known, e.g. no trace in probe mode)
METADATA_KEYS = ("analysis", "system", "fingerprint", "dtype", "B", "T", "S", "parts", "options")


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


def _finite(value: Any) -> float | None:
    v = float(value)
    return v if math.isfinite(v) else None


def _array_json(value: np.ndarray) -> Any:
    if value.dtype.kind in "biuf":
        return jsonable(value.tolist())
    return [jsonable(v) for v in value.tolist()]


#: (types, JSON form) in the order tried: bool before int, since a bool is an int
_JSON_FORMS: tuple[tuple[Any, Any], ...] = (
    ((bool, str), lambda v: v),
    (np.bool_, bool),
    ((int, np.integer), int),
    ((float, np.floating), _finite),
    (np.ndarray, _array_json),
    (Mapping, lambda v: {str(k): jsonable(x) for k, x in v.items()}),
    (slice, lambda v: [v.start, v.stop]),
    ((list, tuple), lambda v: [jsonable(x) for x in v]),
)


def jsonable(value: Any) -> Any:
    """``value`` as plain JSON data: arrays to (nested) lists, NaN/Inf to None, numpy scalars to
    Python numbers, mappings to dicts; objects without a JSON form (a fitted estimator) to None.
    """
    if value is None:
        return None
    for types, form in _JSON_FORMS:
        if isinstance(value, types):
            return form(value)
    if hasattr(value, "detach"):  # a tensor
        return jsonable(value.detach().cpu().numpy())
    return None


@dataclasses.dataclass(frozen=True, eq=False)
class Result:
    """Base of every hiddenlens result.

    Attributes
    ----------
    metadata : Mapping[str, Any]
        The keys of :data:`METADATA_KEYS` (analysis name, system name and fingerprint, dtype
        used, B, T, S, parts, options used) plus analysis-specific entries.
    """

    metadata: Mapping[str, Any] = dataclasses.field(default_factory=dict, kw_only=True)

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if isinstance(value, np.ndarray) and value.flags.writeable:
                object.__setattr__(self, f.name, readonly(value))
            elif isinstance(value, Mapping) and not isinstance(value, MappingProxyType):
                object.__setattr__(self, f.name, frozen_mapping(value))
        if self.metadata is None:
            object.__setattr__(self, "metadata", frozen_mapping({}))

    def plot(self, ax: Any = None, **kw: Any) -> Any:  # pragma: no cover - every result overrides
        """Draw the result on ``ax`` (a new figure's axes by default) and return the axes."""
        raise NotImplementedError

    def to_frame(self) -> Any:  # pragma: no cover - every result overrides
        """The result's main numbers as a pandas DataFrame."""
        raise NotImplementedError

    def to_dict(self) -> dict[str, Any]:
        """Every field as JSON-ready data (``json.dumps`` accepts it), with the result's type."""
        out: dict[str, Any] = {"type": type(self).__name__}
        for f in dataclasses.fields(self):
            out[f.name] = jsonable(getattr(self, f.name))
        return out


def stamp(result: Any, analysis: str, system: Any, trace: Any, options: Mapping[str, Any]) -> Any:
    """``result`` with the common metadata keys filled in (its own entries are kept)."""
    if not isinstance(result, Result):
        return result
    own = dict(result.metadata or {})
    states = getattr(trace, "states", None)
    shape = tuple(states.shape) if isinstance(states, np.ndarray) else (None, None, None)
    S = shape[2] if shape[2] is not None else getattr(system, "state_size", None)
    dtype = getattr(result, "dtype", None)
    if dtype is None:
        dtype = str(states.dtype) if states is not None else str(getattr(system, "dtype", ""))
    parts = getattr(trace, "parts", None) or getattr(system, "parts", None)
    common = {
        "analysis": analysis,
        "system": getattr(system, "source", None) or type(system).__name__,
        "fingerprint": getattr(system, "fingerprint", None) or (
            trace.metadata.get("fingerprint") if hasattr(trace, "metadata") else None),
        "dtype": str(dtype).replace("torch.", ""),
        "B": shape[0] if shape[0] is not None else own.get("n_sequences"),
        "T": shape[1] if shape[1] is not None else own.get("n_steps"),
        "S": S,
        "parts": list(parts) if parts else None,
        "options": {k: _option_value(v) for k, v in options.items()},
    }
    return dataclasses.replace(result, metadata={**own, **common})


def _option_value(value: Any) -> Any:
    if isinstance(value, np.random.Generator):
        return "numpy.random.Generator"
    if callable(value):
        return getattr(value, "__name__", type(value).__name__)
    if isinstance(value, np.ndarray) or hasattr(value, "detach"):
        return f"array of shape {tuple(value.shape)}"
    out = jsonable(value)
    return out if out is not None or value is None else repr(value)
