"""The recorded hidden states of a recurrent system: one data model for every analysis."""

from __future__ import annotations

import json
import os
import stat
import tempfile
import zipfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .results import frozen_mapping, readonly

__all__ = ["Trace", "load_trace", "MAX_TRACE_BYTES"]

FORMAT = "hiddenlens-trace"
FORMAT_VERSION = 1

#: Largest total array size :func:`load_trace` reads by default (4 GiB); pass ``max_bytes`` to
#: read larger traces. Sizes are checked against the file's headers before anything is allocated.
MAX_TRACE_BYTES = 4 << 30
#: Largest metadata text read from a trace file (16 MiB of JSON).
MAX_METADATA_BYTES = 16 << 20
_READ_CHUNK = 1 << 20



class _Size:
    """A read-only size of a trace, one axis of one of its arrays (B, T, S or I)."""

    def __init__(self, array: str, axis: int) -> None:
        self.array, self.axis = array, axis

    def __get__(self, trace: Any, owner: Any = None) -> int:
        if trace is None:
            return self  # type: ignore[return-value]  # the class attribute itself
        return getattr(trace, self.array).shape[self.axis]

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
        for name in ("states", "initial", "inputs"):
            a = getattr(self, name)
            dtype = getattr(a, "dtype", None)
            if hasattr(a, "detach"):  # a tensor: judge its dtype the torch way
                ok = bool(a.is_floating_point())
            else:
                ok = dtype is not None and np.issubdtype(dtype, np.floating)
            if not ok:
                raise TypeError(
                    f"trace {name} must be a floating-point array, got "
                    f"{type(a).__name__}{'' if dtype is None else f' of dtype {dtype}'}; "
                    f"convert it explicitly, e.g. np.asarray({name}, dtype=np.float32)")
        states, initial, inputs = (readonly(a) for a in (self.states, self.initial, self.inputs))
        if states.ndim != 3 or initial.shape != (states.shape[0], states.shape[2]) \
                or inputs.shape[:2] != states.shape[:2]:
            raise ValueError(
                f"inconsistent trace arrays: states {states.shape} (expected (B, T, S)), initial "
                f"{initial.shape} (expected (B, S)), inputs {inputs.shape} (expected (B, T, I))"
            )
        if 0 in states.shape:
            raise ValueError(
                f"empty trace: states have shape {states.shape} (B, T, S); a trace needs at "
                "least one sequence of one step and a state of one unit")
        object.__setattr__(self, "states", states)
        object.__setattr__(self, "initial", initial)
        object.__setattr__(self, "inputs", inputs)
        object.__setattr__(self, "parts", frozen_mapping(_check_parts(self.parts,
                                                                      states.shape[2])))
        object.__setattr__(self, "metadata", frozen_mapping(self.metadata))

    # ------------------------------------------------------------------ sizes
    batch_size = _Size("states", 0)
    """B, the number of sequences."""
    n_steps = _Size("states", 1)
    """T, the number of steps."""
    state_size = _Size("states", 2)
    """S, the length of the flat state."""
    input_size = _Size("inputs", 2)
    """I, the number of input features."""

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
        if isinstance(parts, str):
            names = [parts]
        elif isinstance(parts, (list, tuple)) and all(isinstance(n, str) for n in parts):
            names = list(parts)
        else:
            raise TypeError(f"parts must be a part name or a list of names (this trace has "
                            f"{', '.join(map(repr, self.parts))}), got {parts!r}")
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
        b = _sample_indices(samples, self.batch_size)
        t0, t1 = _step_window(steps, self.n_steps)
        initial = self.initial[b] if t0 == 0 else self.states[b, t0 - 1]
        meta = _window_metadata(self.metadata, b, t0, t1)
        return Trace(self.states[b, t0:t1], initial, self.inputs[b, t0:t1], self.parts, meta)

    # ------------------------------------------------------------------ tables and plots
    def to_frame(self, parts: str | Sequence[str] | None = None):
        """Long table with one row per (sample, step) and one column per state unit."""
        import pandas as pd

        cols = self.columns(parts)
        names = unit_names(self.parts, self.state_size)
        B, T, _ = self.states.shape
        idx = pd.MultiIndex.from_product([range(B), range(T)], names=["sample", "step"])
        return pd.DataFrame(self.states[:, :, cols].reshape(B * T, -1), index=idx,
                            columns=[names[c] for c in cols])

    def plot(self, ax: Any = None, *, part: str | None = None, sample: int = 0,
             max_units: int = 16):
        """Draw the first ``max_units`` units of one sample's states over time."""
        from .._plotting.trace import draw_trace

        return draw_trace(self, ax, part=part, sample=sample, max_units=max_units)

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
        if os.path.isdir(path):
            raise ValueError(f"path {path!r} is a folder; pass the trace's file name, e.g. "
                             f"{os.path.join(path, 'trace.npz')!r}")
        folder = os.path.dirname(os.path.abspath(path))
        # mkstemp creates the temporary file with O_EXCL in the target folder: it never follows
        # a planted symlink, and os.replace swaps it in atomically (replacing a link at ``path``,
        # never its target)
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=f".{os.path.basename(path)}.",
                                   suffix=".partial")
        try:
            with os.fdopen(fd, "wb") as fh:
                np.savez(fh, states=self.states, initial=self.initial, inputs=self.inputs,
                         metadata=np.array(text))
            os.replace(tmp, path)
        finally:
            if os.path.lexists(tmp):
                os.remove(tmp)


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} {value!r} is not JSON-serialisable")


def _sample_indices(samples: Any, B: int) -> np.ndarray:
    """``samples`` of :meth:`Trace.select` as a non-empty array of sequence indices."""
    if samples is None:
        return np.arange(B)
    b = np.atleast_1d(np.asarray(samples))
    if b.size == 0:
        raise ValueError("samples selects no sequence")
    if b.dtype == bool:
        if b.shape != (B,):
            raise ValueError(f"a boolean samples mask must have shape ({B},), got {b.shape}")
        b = np.flatnonzero(b)
        if b.size == 0:
            raise ValueError("samples selects no sequence")
        return b
    if b.ndim != 1 or not np.issubdtype(b.dtype, np.integer):
        raise TypeError("samples must be an int, a sequence of ints or a boolean mask, "
                        f"got {samples!r}")
    if b.min() < -B or b.max() >= B:
        raise IndexError(f"samples {b.tolist()} out of range for a trace of {B} sequences")
    return b


def _step_window(steps: slice | None, T: int) -> tuple[int, int]:
    """``steps`` of :meth:`Trace.select` as a non-empty window [t0, t1) of range(T)."""
    steps = slice(None) if steps is None else steps
    if not isinstance(steps, slice):
        raise TypeError(f"steps must be a slice such as slice(100, 200), got {steps!r}")
    t0, t1, step = steps.indices(T)
    if step != 1 or t1 <= t0:
        raise ValueError(f"steps must be a non-empty contiguous slice of range({T}), got "
                         f"{steps!r}")
    return t0, t1


def _window_metadata(metadata: Mapping[str, Any], b: np.ndarray, t0: int, t1: int
                     ) -> dict[str, Any]:
    """Metadata of the sequences ``b`` over steps [t0, t1): window, counts and lengths."""
    offset = int(metadata.get("window", (0, 0))[0])
    meta = dict(metadata, window=[offset + t0, offset + t1])
    if "batch_size" in meta:
        meta["batch_size"] = int(b.size)
    if "n_steps" in meta:
        meta["n_steps"] = t1 - t0
    if meta.get("lengths") is not None:  # real lengths of padded sequences, in the window
        meta["lengths"] = np.clip(np.asarray(meta["lengths"])[b] - t0, 0, t1 - t0).tolist()
    return meta


_ARRAYS = ("states", "initial", "inputs")


def _check_parts(parts: Any, S: int) -> dict[str, slice]:
    """Parts as contiguous integer slices inside a state of size S."""
    if not isinstance(parts, Mapping):
        raise TypeError(f"trace parts must be a mapping of names to slices, got "
                        f"{type(parts).__name__}")
    out = {}
    for n, sl in parts.items():
        if not isinstance(n, str) or not isinstance(sl, slice) or sl.step not in (None, 1):
            raise ValueError(f"trace part {n!r} must be a str name with a contiguous slice, "
                             f"got {sl!r}")
        lo = 0 if sl.start is None else sl.start
        hi = S if sl.stop is None else sl.stop
        if not all(isinstance(v, (int, np.integer)) and not isinstance(v, bool)
                   for v in (lo, hi)) or not 0 <= lo < hi <= S:
            raise ValueError(f"trace part {n!r} = {sl!r} lies outside the state of size {S}; "
                             f"expected integer bounds 0 <= start < stop <= {S}")
        out[n] = slice(int(lo), int(hi))
    return out


def load_trace(path: str | os.PathLike, *, max_bytes: int = MAX_TRACE_BYTES) -> Trace:
    """Read a trace written by :meth:`Trace.save`.

    Arrays are read with numpy's own ``.npy`` header parser (no pickles) and metadata is JSON, so
    loading an untrusted file runs no code from it. Every array's shape and dtype is checked
    against its header and against ``max_bytes`` before memory is allocated, and each array is
    read straight into its final buffer (peak memory about the size of the arrays).

    Parameters
    ----------
    path : str or PathLike
        A regular file (pipes, devices and folders are refused without being read).
    max_bytes : int, default MAX_TRACE_BYTES (4 GiB)
        Largest total size of the arrays; raise it to read larger traces.

    Raises
    ------
    FileNotFoundError
        When ``path`` does not exist.
    ValueError
        When the file is not a hiddenlens trace, is damaged, is larger than ``max_bytes``, or
        comes from a newer hiddenlens. The message names the file and the defect.
    """
    if isinstance(max_bytes, bool) or not isinstance(max_bytes, (int, np.integer)) \
            or max_bytes < 1:
        raise ValueError(f"max_bytes must be a positive integer (bytes), got {max_bytes!r}")
    try:
        name = os.fspath(path)
    except TypeError:
        raise TypeError(f"path must be a file path (str or os.PathLike), got "
                        f"{type(path).__name__}") from None
    if not isinstance(name, str):
        name = os.fsdecode(name)
    if not os.path.lexists(name):
        raise FileNotFoundError(f"no trace file at {name!r}")
    not_trace = f"{name!r} is not a hiddenlens trace file (written by Trace.save)"
    with _open_regular(name, not_trace) as fh:
        try:
            arrays, meta = _read_archive(fh, not_trace, int(max_bytes))
        except RecursionError:
            raise ValueError(f"{not_trace}: its metadata JSON is nested too deeply") from None
        except (zipfile.BadZipFile, zipfile.LargeZipFile, EOFError, OSError, KeyError,
                ValueError, OverflowError, MemoryError, NotImplementedError) as err:
            text = str(err)
            if text.startswith(not_trace):
                raise
            raise ValueError(f"{not_trace}: it is damaged ({type(err).__name__}: "
                             f"{text[:200]})") from None
    _check_format(meta, name, not_trace)
    st = arrays["states"]
    if st.ndim != 3 or 0 in st.shape:
        raise ValueError(f"{not_trace}: states have shape {st.shape}, expected a non-empty "
                         "(B, T, S)")
    parts = _parts_from_file(meta.pop("parts", None), st.shape[2], not_trace)
    meta.pop("format")
    meta.pop("format_version")
    try:
        return Trace(parts=parts, metadata=meta, **arrays)
    except (TypeError, ValueError) as err:
        raise ValueError(f"{not_trace}: {err}") from None


def _open_regular(name: str, not_trace: str) -> Any:
    """``name`` opened for binary reading; pipes, devices and folders are refused unread."""
    try:
        # O_NONBLOCK: opening a FIFO must not wait for a writer
        fd = os.open(name, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except OSError as err:
        raise ValueError(f"{not_trace}: cannot open it ({err.strerror})") from None
    if not stat.S_ISREG(os.fstat(fd).st_mode):
        os.close(fd)
        raise ValueError(f"{not_trace}: it is not a regular file (a pipe, device or "
                         "folder); copy the trace to a file first")
    return os.fdopen(fd, "rb")


def _check_format(meta: Any, name: str, not_trace: str) -> None:
    """Refuse metadata that does not name the trace format or names a newer version of it."""
    if not isinstance(meta, dict) or meta.get("format") != FORMAT:
        raise ValueError(f"{not_trace}: its metadata does not name the format {FORMAT!r}")
    version = meta.get("format_version")
    if isinstance(version, bool) or not isinstance(version, int):
        raise ValueError(f"{not_trace}: format_version is missing")
    if version > FORMAT_VERSION:
        raise ValueError(f"{name!r} was written by a newer hiddenlens (format {version}, this "
                         f"one reads up to {FORMAT_VERSION}); upgrade hiddenlens to read it")


def _parts_from_file(raw_parts: Any, S: int, not_trace: str) -> dict[str, slice]:
    """The parts as saved (name -> [start, stop]) as slices inside a state of size S."""
    if not isinstance(raw_parts, dict):
        raise ValueError(f"{not_trace}: malformed parts {str(raw_parts)[:100]}")
    parts = {}
    for n, bounds in raw_parts.items():
        ok = isinstance(bounds, list) and len(bounds) == 2 and all(
            isinstance(v, int) and not isinstance(v, bool) for v in bounds)
        if not ok:
            raise ValueError(f"{not_trace}: part {n!r} = {str(bounds)[:60]} is not a pair of "
                             "integers [start, stop]")
        if not 0 <= bounds[0] < bounds[1] <= S:
            raise ValueError(f"{not_trace}: part {n!r} = {bounds} lies outside the state of "
                             f"size {S}")
        parts[n] = slice(*bounds)
    return parts


def _read_archive(fh: Any, not_trace: str, max_bytes: int) -> tuple[dict[str, np.ndarray], Any]:
    """The three arrays and the parsed metadata of an open trace file, checked as they come."""
    magic = fh.read(6)
    if magic == b"\x93NUMPY":
        raise ValueError(f"{not_trace}: it holds a single array, not an .npz archive")
    if magic[:4] != b"PK\x03\x04":
        raise ValueError(f"{not_trace}: it is not an .npz archive")
    fh.seek(0)
    with zipfile.ZipFile(fh) as zf:
        headers = _entry_headers(zf, not_trace, max_bytes)
        arrays = {key: _read_entry(zf, key, *header, not_trace)
                  for key, header in headers.items()}
        meta = json.loads(str(arrays.pop("metadata")[()]))
    for a in arrays.values():
        a.setflags(write=False)
    return arrays, meta


def _entry_headers(zf: zipfile.ZipFile, not_trace: str, max_bytes: int
                   ) -> dict[str, tuple[zipfile.ZipInfo, tuple[int, ...], np.dtype, int]]:
    """Entry, shape, dtype and data offset of each array, checked before anything is read."""
    members = {i.filename: i for i in zf.infolist()}
    missing = [k for k in (*_ARRAYS, "metadata") if f"{k}.npy" not in members]
    if missing:
        raise ValueError(f"{not_trace}: it lacks {', '.join(sorted(missing))}")
    headers = {}
    total = 0
    for key in (*_ARRAYS, "metadata"):
        info = members[f"{key}.npy"]
        with zf.open(info) as f:
            shape, dtype, offset = _npy_header(f, key, not_trace)
        nbytes = int(np.prod(shape, dtype=object)) * dtype.itemsize
        if info.file_size != offset + nbytes:
            raise ValueError(
                f"{not_trace}: {key} declares shape {shape} of {dtype} ({nbytes} bytes) "
                f"but its entry holds {max(info.file_size - offset, 0)} bytes")
        if key == "metadata":
            if dtype.kind != "U" or shape != () or nbytes > MAX_METADATA_BYTES:
                raise ValueError(f"{not_trace}: metadata must be one JSON string of at "
                                 f"most {MAX_METADATA_BYTES} bytes, got {dtype} {shape}")
        else:
            if dtype.kind != "f":
                raise ValueError(f"{not_trace}: {key} has dtype {dtype}, expected float")
            total += nbytes
        headers[key] = (info, shape, dtype, offset)
    if total > max_bytes:
        raise ValueError(
            f"{not_trace}: its arrays declare {total} bytes, more than max_bytes="
            f"{max_bytes}; pass load_trace(path, max_bytes=...) to read a trace this large")
    return headers


def _read_entry(zf: zipfile.ZipFile, key: str, info: zipfile.ZipInfo, shape: tuple[int, ...],
                dtype: np.dtype, offset: int, not_trace: str) -> np.ndarray:
    """One entry's data read straight into its final buffer, in bounded pieces."""
    out = np.empty(shape, dtype=dtype)
    with zf.open(info) as f:  # the stream checks the CRC once the entry is read
        f.read(offset)
        view = memoryview(out.reshape(-1).view(np.uint8)) if out.size else memoryview(b"")
        got = 0
        while got < len(view):
            # bounded pieces: a zip entry's readinto reads a whole bytes copy first
            n = f.readinto(view[got:got + _READ_CHUNK])
            if not n:
                raise ValueError(f"{not_trace}: {key} is truncated")
            got += n
        f.read()  # reach the end of the entry so that a bad CRC is noticed
    return out


def _npy_header(f: Any, key: str, not_trace: str) -> tuple[tuple[int, ...], np.dtype, int]:
    """Shape, dtype and data offset of one ``.npy`` entry, read from its header alone."""
    fmt = np.lib.format
    version = fmt.read_magic(f)
    if version == (1, 0):
        shape, fortran, dtype = fmt.read_array_header_1_0(f)
    elif version in ((2, 0), (3, 0)):
        shape, fortran, dtype = fmt.read_array_header_2_0(f)
    else:
        raise ValueError(f"{not_trace}: {key} has an unknown .npy version {version}")
    if dtype.hasobject or fortran:
        raise ValueError(f"{not_trace}: {key} holds Python objects or Fortran-ordered data")
    return tuple(int(d) for d in shape), dtype, int(f.tell())  # data starts after the header


def unit_names(parts: Mapping[str, slice], size: int) -> list[str]:
    names = [f"s{i}" for i in range(size)]
    for n, sl in parts.items():
        for j, i in enumerate(range(sl.start, sl.stop)):
            names[i] = f"{n}[{j}]"
    return names
