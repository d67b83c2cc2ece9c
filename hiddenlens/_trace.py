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
        selected trace is again exact.
        """
        b = np.arange(self.batch_size) if samples is None else np.atleast_1d(np.asarray(samples))
        if b.size == 0:
            raise ValueError("samples selects no sequence")
        steps = steps or slice(None)
        t0, t1, step = steps.indices(self.n_steps)
        if step != 1 or t1 <= t0:
            raise ValueError(f"steps must be a non-empty contiguous slice of range("
                             f"{self.n_steps}), got {steps!r}")
        initial = self.initial[b] if t0 == 0 else self.states[b, t0 - 1]
        meta = dict(self.metadata, window=[int(t0), int(t1)])
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
        """Write one portable ``.npz`` file: the arrays plus JSON metadata (no pickles)."""
        meta = dict(self.metadata)
        meta["parts"] = {n: [s.start, s.stop] for n, s in self.parts.items()}
        meta["format"] = FORMAT
        meta["format_version"] = FORMAT_VERSION
        with open(path, "wb") as fh:
            np.savez(fh, states=self.states, initial=self.initial, inputs=self.inputs,
                     metadata=np.array(json.dumps(meta)))


def load_trace(path: str | os.PathLike) -> Trace:
    """Read a trace written by :meth:`Trace.save` (``allow_pickle=False``: safe on untrusted files)."""
    try:
        with np.load(path, allow_pickle=False) as data:
            missing = {"states", "initial", "inputs", "metadata"} - set(data.files)
            if missing:
                raise ValueError(f"{os.fspath(path)!r} is not a hiddenlens trace file: it lacks "
                                 f"{', '.join(sorted(missing))}")
            arrays = {k: data[k] for k in ("states", "initial", "inputs")}
            meta = json.loads(str(data["metadata"]))
    except (OSError, ValueError, json.JSONDecodeError) as err:
        if isinstance(err, ValueError) and "hiddenlens trace" in str(err):
            raise
        raise ValueError(f"cannot read a trace from {os.fspath(path)!r}: {err}") from err
    if meta.get("format") != FORMAT:
        raise ValueError(f"{os.fspath(path)!r} is not a hiddenlens trace file")
    if meta.get("format_version", 0) > FORMAT_VERSION:
        raise ValueError(f"{os.fspath(path)!r} was written by a newer hiddenlens (format "
                         f"{meta['format_version']}); upgrade hiddenlens to read it")
    parts = {n: slice(a, b) for n, (a, b) in meta.pop("parts").items()}
    meta.pop("format")
    meta.pop("format_version")
    return Trace(parts=parts, metadata=meta, **arrays)


def _unit_names(parts: Mapping[str, slice], size: int) -> list[str]:
    names = [f"s{i}" for i in range(size)]
    for n, sl in parts.items():
        for j, i in enumerate(range(sl.start, sl.stop)):
            names[i] = f"{n}[{j}]"
    return names
