"""Type aliases of the public signatures, for readers, IDEs and type checkers.

The analyses annotate their data arguments with these names (imported under ``TYPE_CHECKING``,
so nothing here runs when an analysis is imported).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import torch

from .systems import RecurrentSystem
from .trace import Trace

__all__ = ["ArrayLike", "ModelLike", "PathLike", "Sequences", "TraceOrInputs"]

#: What :func:`hiddenlens.wrap` accepts: a system, a recurrent module or cell, a step function.
ModelLike = RecurrentSystem | torch.nn.Module | Callable[..., Any]
#: Input sequences (B, T, I) or (T, I), batch first.
Sequences = torch.Tensor | np.ndarray
#: A recorded trace, or inputs recorded first (the 0.1 call forms).
TraceOrInputs = Trace | torch.Tensor | np.ndarray
#: Numbers as an array: numpy, torch or a nested sequence.
ArrayLike = np.ndarray | torch.Tensor | Sequence[Any]
#: A file or folder.
PathLike = str | os.PathLike
