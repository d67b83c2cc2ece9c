"""Checks at the public boundary, in one message form.

Each message says what was wrong, what was expected and how to fix it.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import torch

__all__ = ["as_dtype", "as_sequences", "as_float_tensor", "check_finite", "check_trace_finite",
           "check_trace_fits", "describe", "optional_mapping"]

_DTYPES = {
    "float32": torch.float32,
    "float64": torch.float64,
    torch.float32: torch.float32,
    torch.float64: torch.float64,
    np.float32: torch.float32,
    np.float64: torch.float64,
}


def as_dtype(dtype: Any) -> torch.dtype:
    """Map ``"float32"``/``"float64"`` (or the torch/numpy types) to a torch dtype."""
    try:
        return _DTYPES[dtype]
    except (KeyError, TypeError):
        pass
    try:
        if dtype is None:  # np.dtype(None) would quietly mean float64
            raise TypeError
        return _DTYPES[np.dtype(dtype).type]
    except (KeyError, TypeError):
        raise ValueError(
            f"dtype must be float32 or float64, got {dtype!r}; pass dtype=torch.float64 "
            "for accuracy-critical analyses or leave the float32 default"
        ) from None


def describe(x: Any) -> str:
    """Short description of an array-like for error messages."""
    if isinstance(x, (torch.Tensor, np.ndarray)):
        kind = "tensor" if isinstance(x, torch.Tensor) else "array"
        return f"{kind} of shape {tuple(x.shape)} and dtype {str(x.dtype).replace('torch.', '')}"
    return type(x).__name__


def as_float_tensor(x: Any, name: str, dtype: torch.dtype) -> torch.Tensor:
    """Convert a tensor or numpy array to a detached CPU tensor of ``dtype`` (a copy).

    Integer, boolean and complex data are refused rather than silently coerced.
    """
    if isinstance(x, torch.nn.utils.rnn.PackedSequence):
        raise TypeError(
            f"{name} is a PackedSequence, which hiddenlens does not analyse; pad the sequences "
            "to equal length and pass a (B, T, I) tensor, or record each sequence on its own"
        )
    if isinstance(x, np.ndarray):
        if not np.issubdtype(x.dtype, np.floating):
            raise TypeError(
                f"{name} must hold floating-point numbers, got a numpy array of dtype {x.dtype}; "
                f"convert it explicitly, e.g. {name}.astype(np.float32) (one-hot encode tokens)"
            )
        if not x.dtype.isnative or x.dtype.itemsize > 8:
            # torch reads native-order float16/32/64 only (no big-endian data, no longdouble)
            x = x.astype(np.float64)
        if not x.flags.writeable:  # torch warns on read-only memory; this copy is ours
            x = np.array(x)
        t = torch.from_numpy(np.ascontiguousarray(x))
    elif isinstance(x, torch.Tensor):
        if not torch.is_floating_point(x):
            raise TypeError(
                f"{name} must hold floating-point numbers, got a tensor of dtype {x.dtype}; "
                f"convert it explicitly, e.g. {name}.float() (one-hot encode tokens)"
            )
        if x.device.type == "meta":
            raise ValueError(f"{name} is on the 'meta' device and holds no data")
        t = x.detach()
    else:
        raise TypeError(
            f"{name} must be a torch tensor or a numpy array, got {type(x).__name__}; "
            f"wrap it with np.asarray({name}, dtype=np.float32)"
        )
    return t.to(device="cpu", dtype=dtype, copy=True)


def check_finite(t: torch.Tensor, name: str,
                 fix: str = "clean or mask the data before recording") -> None:
    """Refuse NaN or Inf values, naming the first offending position."""
    bad = ~torch.isfinite(t)
    if bool(bad.any()):
        where = tuple(int(i) for i in bad.nonzero()[0])
        raise ValueError(f"{name} contains NaN or Inf (first at index {where}); {fix}")


def check_trace_finite(trace: Any, analysis: str, what: tuple[str, ...] = ("initial", "inputs")
                       ) -> None:
    """Refuse a trace (recorded elsewhere, or built by hand) whose ``what`` arrays hold NaN/Inf.

    The message names the array and the first (sample, step) where it is not finite.
    """
    for name in what:
        a = np.asarray(getattr(trace, name))
        if a.size and not np.isfinite(a).all():
            where = tuple(int(i) for i in np.argwhere(~np.isfinite(a))[0])
            at = (f"sample {where[0]}" if name == "initial"
                  else f"sample {where[0]}, step {where[1]}")
            label = "initial states" if name == "initial" else name
            raise ValueError(
                f"{analysis}: the trace's {label} contain NaN or Inf (first at {at}); record "
                "the trace from finite inputs and initial states: hiddenlens.record(system, "
                "inputs, h0)")


def as_sequences(inputs: Any, input_size: int, dtype: torch.dtype, *, name: str = "inputs",
                 what: str = "the system") -> torch.Tensor:
    """Validate batch-first inputs: (B, T, I) or one sequence (T, I) -> (B, T, I) tensor."""
    t = as_float_tensor(inputs, name, dtype)
    if t.ndim == 2:
        t = t.unsqueeze(0)
    if t.ndim != 3:
        raise ValueError(
            f"{name} must have shape (B, T, {input_size}) or (T, {input_size}) (batch first), "
            f"got {describe(inputs)}"
        )
    B, T, I = t.shape
    if I != input_size:
        raise ValueError(
            f"{name} has {I} features but {what} expects {input_size}; pass {name} of shape "
            f"(B, T, {input_size})"
        )
    if B == 0 or T == 0:
        raise ValueError(
            f"{name} is empty (shape {tuple(t.shape)}); pass at least one sequence of at "
            "least one step"
        )
    check_finite(t, name)
    return t


def check_trace_fits(system: Any, trace: Any, analysis: str) -> None:
    """Refuse a trace whose state or input size differs from the system's."""
    if trace.state_size != system.state_size or trace.input_size != system.input_size:
        raise ValueError(
            f"{analysis}: the trace has states of size {trace.state_size} and "
            f"{trace.input_size} input features but the {system.source} system has "
            f"S={system.state_size}, I={system.input_size}; record the trace with this system "
            "or model: hiddenlens.record(system, inputs)"
        )


def optional_mapping(value: Any, name: str, expected: str) -> dict[str, Any]:
    """``value`` as a dict (empty for None); anything but a mapping is refused with
    "``name`` must be a mapping ``expected``, got <type>"."""
    if value is None:
        return {}
    if not isinstance(value, Mapping):
        raise TypeError(f"{name} must be a mapping {expected}, got {type(value).__name__}")
    return dict(value)
