"""The recorded hidden states of a recurrent system: one data model for every analysis."""

from __future__ import annotations

import json
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._results import frozen_mapping, readonly

__all__ = ["Trace", "load_trace"]

FORMAT = "hiddenlens-trace"
FORMAT_VERSION = 1


@dataclass(frozen=True, eq=False)
class Trace:
    """Hidden states recorded along input sequences (batch first).

    Attributes
    ----------
    states : ndarray of shape (B, T, S)
        The flat state after each step (read-only).
    initial : ndarray of shape (B, S)
        The state before the first step.
    inputs : ndarray of shape (B, T, I)
        The inputs as the system received them (for a time-reversed system: reversed).
    parts : Mapping[str, slice]
        Names of slices of the flat state, e.g. ``"layer0.h"``.
    metadata : Mapping[str, Any]
        Model class, sizes, parameter fingerprint, dtype, hiddenlens version, creation time.
    """

    states: np.ndarray
    initial: np.ndarray
    inputs: np.ndarray
    parts: Mapping[str, slice]
    metadata: Mapping[str, Any]

    def __post_init__(self) -> None:
        states, initial, inputs = (readonly(a) for a in (self.states, self.initial, self.inputs))
        if states.ndim != 3 or initial.shape != (states.shape[0], states.shape[2]) \
                or inputs.shape[:2] != states.shape[:2]:
            raise ValueError(
                f"inconsistent trace arrays: states {states.shape} (expected (B, T, S)), initial "
                f"{initial.shape} (expected (B, S)), inputs {inputs.shape} (expected (B, T, I))"
            )
        object.__setattr__(self, "states", states)
        object.__setattr__(self, "initial", initial)
        object.__setattr__(self, "inputs", inputs)
        object.__setattr__(self, "parts", frozen_mapping(self.parts))
        object.__setattr__(self, "metadata", frozen_mapping(self.metadata))

    # ------------------------------------------------------------------ sizes
    @property
    def batch_size(self) -> int:
        """B, the number of sequences."""
        return self.states.shape[0]

    @property
    def n_steps(self) -> int:
        """T, the number of steps."""
        return self.states.shape[1]

    @property
    def state_size(self) -> int:
        """S, the length of the flat state."""
        return self.states.shape[2]

    @property
    def input_size(self) -> int:
        """I, the number of input features."""
        return self.inputs.shape[2]

    # ------------------------------------------------------------------ views
    def part(self, name: str) -> np.ndarray:
        """States of one named part, shape (B, T, size)."""
        return self.states[:, :, self._slice(name)]

    def _slice(self, name: str) -> slice:
        try:
            return self.parts[name]
        except KeyError:
            raise KeyError(f"no part named {name!r}; this trace has parts "
                           f"{', '.join(map(repr, self.parts))}") from None

    def columns(self, parts: str | Sequence[str] | None = None) -> np.ndarray:
        """Indices into the flat state covered by ``parts`` (all of the state when None)."""
        if parts is None:
            return np.arange(self.state_size)
        names = [parts] if isinstance(parts, str) else list(parts)
        if not names:
            raise ValueError("parts is empty; name at least one part or pass None for all")
        return np.concatenate([np.arange(self.state_size)[self._slice(n)] for n in names])

    def previous_states(self) -> np.ndarray:
        """The state before each step, s_{t-1} (``initial`` for t = 0), shape (B, T, S)."""
        return np.concatenate([self.initial[:, None], self.states[:, :-1]], axis=1)

    def select(self, samples: Any = None, steps: slice | None = None) -> Trace:
        """A trace of some sequences and/or a contiguous window of steps.

        ``initial`` of a window that starts at step t0 > 0 is the state after step t0 - 1, so the
        selected trace is again exact: running the system from ``initial`` over ``inputs``
        reproduces ``states``. ``metadata["window"]`` holds the window [t0, t1) in the steps of the
        original recording and the batch and step counts are updated.
        """
        B = self.batch_size
        if samples is None:
            b = np.arange(B)
        else:
            b = np.atleast_1d(np.asarray(samples))
            if b.size == 0:
                raise ValueError("samples selects no sequence")
            if b.dtype == bool:
                if b.shape != (B,):
                    raise ValueError(f"a boolean samples mask must have shape ({B},), got "
                                     f"{b.shape}")
                b = np.flatnonzero(b)
            elif b.ndim != 1 or not np.issubdtype(b.dtype, np.integer):
                raise TypeError("samples must be an int, a sequence of ints or a boolean mask, "
                                f"got {samples!r}")
            if b.size and (b.min() < -B or b.max() >= B):
                raise IndexError(f"samples {b.tolist()} out of range for a trace of {B} "
                                 "sequences")
        if b.size == 0:
            raise ValueError("samples selects no sequence")
        steps = slice(None) if steps is None else steps
        if not isinstance(steps, slice):
            raise TypeError(f"steps must be a slice such as slice(100, 200), got {steps!r}")
        t0, t1, step = steps.indices(self.n_steps)
        if step != 1 or t1 <= t0:
            raise ValueError(f"steps must be a non-empty contiguous slice of range("
                             f"{self.n_steps}), got {steps!r}")
        initial = self.initial[b] if t0 == 0 else self.states[b, t0 - 1]
        offset = int(self.metadata.get("window", (0, 0))[0])
        meta = dict(self.metadata, window=[offset + t0, offset + t1])
        if "batch_size" in meta:
            meta["batch_size"] = int(b.size)
        if "n_steps" in meta:
            meta["n_steps"] = t1 - t0
        if meta.get("lengths") is not None:  # real lengths of padded sequences, in the window
            meta["lengths"] = np.clip(np.asarray(meta["lengths"])[b] - t0, 0, t1 - t0).tolist()
        return Trace(self.states[b, t0:t1], initial, self.inputs[b, t0:t1], self.parts, meta)

    # ------------------------------------------------------------------ tables and plots
    def to_frame(self, parts: str | Sequence[str] | None = None):
        """Long table with one row per (sample, step) and one column per state unit."""
        import pandas as pd

        cols = self.columns(parts)
        names = _unit_names(self.parts, self.state_size)
        B, T, _ = self.states.shape
        idx = pd.MultiIndex.from_product([range(B), range(T)], names=["sample", "step"])
        return pd.DataFrame(self.states[:, :, cols].reshape(B * T, -1), index=idx,
                            columns=[names[c] for c in cols])

    def plot(self, ax: Any = None, *, part: str | None = None, sample: int = 0,
             max_units: int = 16):
        """Draw the first ``max_units`` units of one sample's states over time."""
        from ._plotting import get_axes

        ax = get_axes(ax)
        cols = self.columns(part)[:max_units]
        ax.plot(self.states[sample][:, cols], lw=0.8)
        ax.set_xlabel("step t")
        ax.set_ylabel("state" if part is None else part)
        ax.set_title(f"{self.metadata.get('model_class', 'system')}: sample {sample}")
        return ax

    def __repr__(self) -> str:
        B, T, S = self.states.shape
        return (f"Trace(B={B}, T={T}, S={S}, I={self.input_size}, "
                f"parts=[{', '.join(self.parts)}], model={self.metadata.get('model_class')})")

    # ------------------------------------------------------------------ files
    def save(self, path: str | os.PathLike) -> None:
        """Write one portable ``.npz`` file: the arrays plus JSON metadata (no pickles).

        The file is written under a temporary name and moved into place at the end, so an
        interrupted save never leaves a half-written trace at ``path``. The name is used as
        given (no ``.npz`` is appended).
        """
        meta = dict(self.metadata)
        meta["parts"] = {n: [s.start, s.stop] for n, s in self.parts.items()}
        meta["format"] = FORMAT
        meta["format_version"] = FORMAT_VERSION
        try:
            text = json.dumps(meta, default=_json_default, allow_nan=True)
        except TypeError as err:
            raise TypeError(f"trace metadata must be JSON-serialisable to be saved: {err}; "
                            "keep metadata to numbers, strings, lists and dicts") from None
        path = os.fspath(path)
        tmp = f"{path}.partial-{os.getpid()}"
        try:
            with open(tmp, "wb") as fh:
                np.savez(fh, states=self.states, initial=self.initial, inputs=self.inputs,
                         metadata=np.array(text))
            os.replace(tmp, path)
        finally:
            if os.path.exists(tmp):
                os.remove(tmp)


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} {value!r} is not JSON-serialisable")


_ARRAYS = ("states", "initial", "inputs")


def load_trace(path: str | os.PathLike) -> Trace:
    """Read a trace written by :meth:`Trace.save`.

    Arrays are read with ``np.load(..., allow_pickle=False)`` and metadata is JSON, so loading an
    untrusted file runs no code from it.

    Raises
    ------
    FileNotFoundError
        When ``path`` does not exist.
    ValueError
        When the file is not a hiddenlens trace, is damaged, or comes from a newer hiddenlens.
    """
    name = os.fspath(path)
    if not os.path.exists(name):
        raise FileNotFoundError(f"no trace file at {name!r}")
    not_trace = f"{name!r} is not a hiddenlens trace file (written by Trace.save)"
    try:
        data = np.load(name, allow_pickle=False)
    except (OSError, ValueError, EOFError):
        # numpy reads unknown bytes as a pickle, which allow_pickle=False refuses
        raise ValueError(f"{not_trace}: it is not an .npz archive") from None
    if not isinstance(data, np.lib.npyio.NpzFile):
        raise ValueError(f"{not_trace}: it holds a single array, not an .npz archive")
    try:
        with data:
            missing = {*_ARRAYS, "metadata"} - set(data.files)
            if missing:
                raise ValueError(f"{not_trace}: it lacks {', '.join(sorted(missing))}")
            arrays = {k: data[k] for k in _ARRAYS}
            meta = json.loads(str(data["metadata"][()]))
    except (OSError, ValueError, EOFError, KeyError) as err:  # JSONDecodeError is a ValueError
        if str(err).startswith(not_trace):
            raise
        raise ValueError(f"{not_trace}: {err}") from None
    if not isinstance(meta, dict) or meta.get("format") != FORMAT:
        raise ValueError(not_trace)
    version = meta.get("format_version")
    if not isinstance(version, int):
        raise ValueError(f"{not_trace}: format_version is missing")
    if version > FORMAT_VERSION:
        raise ValueError(f"{name!r} was written by a newer hiddenlens (format {version}, this "
                         f"one reads up to {FORMAT_VERSION}); upgrade hiddenlens to read it")
    for key, a in arrays.items():
        if not np.issubdtype(a.dtype, np.floating):
            raise ValueError(f"{not_trace}: {key} has dtype {a.dtype}, expected float")
    S = arrays["states"].shape[-1] if arrays["states"].ndim == 3 else -1
    raw_parts = meta.pop("parts", None)
    try:
        parts = {str(n): slice(int(a), int(b)) for n, (a, b) in raw_parts.items()}
    except (AttributeError, TypeError, ValueError):
        raise ValueError(f"{not_trace}: malformed parts {raw_parts!r}") from None
    for n, sl in parts.items():
        if not 0 <= sl.start < sl.stop <= S:
            raise ValueError(f"{not_trace}: part {n!r} = {sl} lies outside the state of size {S}")
    meta.pop("format")
    meta.pop("format_version")
    return Trace(parts=parts, metadata=meta, **arrays)


def _unit_names(parts: Mapping[str, slice], size: int) -> list[str]:
    names = [f"s{i}" for i in range(size)]
    for n, sl in parts.items():
        for j, i in enumerate(range(sl.start, sl.stop)):
            names[i] = f"{n}[{j}]"
    return names
