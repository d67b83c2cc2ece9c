"""Record the hidden states of a recurrent model or system along input sequences."""

from __future__ import annotations

import datetime as _dt
import warnings
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

from .._version import __version__
from .systems import RecurrentSystem, wrap
from .trace import Trace
from .validation import as_float_tensor, as_sequences, check_finite, describe

if TYPE_CHECKING:  # the aliases of the public signatures
    from .aliases import ModelLike, Sequences

__all__ = ["record", "as_system", "initial_states", "valid_steps", "NonFiniteStateWarning"]


class NonFiniteStateWarning(RuntimeWarning):
    """States became NaN or Inf during a run (exploding dynamics: a finding, not a crash)."""


def as_system(model_or_system: Any, **wrap_options: Any) -> RecurrentSystem:
    """Return a system unchanged, or :func:`wrap` a model or step function with ``wrap_options``."""
    if isinstance(model_or_system, RecurrentSystem):
        if wrap_options:
            raise TypeError(f"options {sorted(wrap_options)} apply when wrapping a model; this is "
                            "already a RecurrentSystem")
        return model_or_system
    return wrap(model_or_system, **wrap_options)


def initial_states(system: RecurrentSystem, h0: Any, batch: int) -> torch.Tensor:
    """Validate ``h0`` and return flat initial states (B, S) in the system's dtype.

    Accepted: None (zeros); flat (S,) or (B, S); for module systems also PyTorch's own layout,
    (num_layers, B, H) for RNN/GRU and a tuple (h0, c0) of those for LSTM.
    """
    S = system.state_size
    if h0 is None:
        return system.zeros(batch)
    if isinstance(h0, (tuple, list)):
        if not (system.kind == "lstm" and len(h0) == 2):
            raise TypeError("a tuple h0 is accepted only as (h0, c0) for an LSTM; otherwise pass "
                            f"flat states of shape ({batch}, {S})")
        h = as_float_tensor(h0[0], "h0[0]", system.dtype)
        c = as_float_tensor(h0[1], "h0[1]", system.dtype)
        return _from_native(system, batch, h, c)
    t = as_float_tensor(h0, "h0", system.dtype)
    if t.ndim == 1 and t.shape[0] == S:
        t = t.expand(batch, S).clone()
    elif t.ndim == 3 and system.layers and system.kind != "lstm":
        t = _from_native(system, batch, t, None)
    if tuple(t.shape) != (batch, S):
        extra = ""
        if system.layers:
            L, H = len(system.layers), system.layers[0].hidden_size
            extra = f", or PyTorch's own layout ({L}, {batch}, {H})"
            if system.kind == "lstm":
                extra += " as a tuple (h0, c0)"
        raise ValueError(f"h0 must have shape ({batch}, {S}) or ({S},){extra}, got {describe(h0)}")
    check_finite(t, "h0")
    return t


def _from_native(system, batch, h, c):
    L = len(system.layers)
    first = system.layers[0]
    for name, a, part in (("h0", h, first.h), ("c0", c, first.c)):
        if a is None:
            continue
        H = part.stop - part.start  # proj_size for the h of a projected LSTM
        if a.ndim == 2 and L == 1:
            a = a.unsqueeze(0)
        if tuple(a.shape) != (L, batch, H):
            raise ValueError(f"{name} must have shape ({L}, {batch}, {H}) in PyTorch's layout, "
                             f"got {tuple(a.shape)}")
    if c is not None and c.ndim == 2:
        c = c.unsqueeze(0)
    if h.ndim == 2:
        h = h.unsqueeze(0)
    flat = system.zeros(batch)
    for k, layer in enumerate(system.layers):
        flat[:, layer.h] = h[k]
        if layer.c is not None:
            flat[:, layer.c] = c[k]
    check_finite(flat, "h0")
    return flat


def _check_lengths(lengths: Any, mask: Any, B: int, T: int) -> list[int] | None:
    """Per-sequence lengths from ``lengths`` (B,) or a step mask (B, T), checked."""
    if lengths is not None and mask is not None:
        raise ValueError("give lengths= or mask=, not both")
    if mask is not None:
        m = np.asarray(mask.detach().cpu() if isinstance(mask, torch.Tensor) else mask)
        if m.shape != (B, T) or m.dtype != bool:
            raise ValueError(f"mask must be a boolean array of shape ({B}, {T}) (True on real "
                             f"steps), got {describe(mask)}")
        n = m.sum(axis=1)
        if not np.array_equal(m, np.arange(T)[None, :] < n[:, None]):
            raise ValueError("mask must mark a prefix of each sequence (real steps first, then "
                             "padding); padding inside or before a sequence is not supported")
        lengths = n
    if lengths is None:
        return None
    a = np.asarray(lengths.detach().cpu() if isinstance(lengths, torch.Tensor) else lengths)
    if a.shape != (B,) or not np.issubdtype(a.dtype, np.integer):
        raise ValueError(f"lengths must hold one integer per sequence, shape ({B},), got "
                         f"{describe(lengths)}")
    if a.min() < 1 or a.max() > T:
        raise ValueError(f"lengths must lie in 1 .. {T} (the padded length), got values in "
                         f"[{a.min()}, {a.max()}]")
    return [int(v) for v in a]


def valid_steps(trace: Trace) -> np.ndarray | None:
    """(B, T) boolean mask of real (not padded) steps of a trace recorded with lengths, or None."""
    lengths = trace.metadata.get("lengths")
    if lengths is None:
        return None
    n = np.asarray(lengths, dtype=np.int64)
    if n.shape != (trace.batch_size,):
        raise ValueError(f"the trace's lengths cover {n.size} sequences but it holds "
                         f"{trace.batch_size}; select samples with Trace.select")
    return np.arange(trace.n_steps)[None, :] < n[:, None]


def record(model_or_system: ModelLike, inputs: Sequences, h0: Sequences | None = None, *,
           progress: bool | None = None, lengths: Any = None, mask: Any = None,
           **wrap_options: Any) -> Trace:
    """Run a recurrent model or system over input sequences and record its hidden states.

    Parameters
    ----------
    model_or_system : RecurrentSystem, nn.Module or callable
        Anything :func:`hiddenlens.wrap` accepts (wrapped with ``wrap_options``), or a system.
    inputs : Tensor or ndarray of shape (B, T, I) or (T, I)
        Batch first, whatever the module's own ``batch_first``; converted to the system's dtype.
        For a time-reversed system (backward direction) give them in natural order.
    h0 : Tensor or ndarray, optional
        Initial states, see :func:`initial_states`; zeros by default.
    progress : bool, optional
        Show a progress bar (default: only for long step-function runs).
    lengths : array of shape (B,), optional
        Real lengths of right-padded sequences. The system still runs over the padding (its
        states are kept), but ``metadata["lengths"]`` marks it and every analysis leaves the
        padded steps out. Lower layers of a stack wrapped with ``layer=`` run each sequence on
        its own length (as a packed batch does).
    mask : bool array of shape (B, T), optional
        The same as a mask, True on real steps (a prefix of each sequence).

    Returns
    -------
    Trace
        ``states`` (B, T, S) after each step, ``initial`` (B, S), ``inputs`` (B, T, I). A
        time-reversed system's trace runs in its own time: ``states[:, t]`` follows input
        ``T-1-t`` and ``inputs`` are stored reversed (flip axis 1 to line up with the module).

    Warns
    -----
    NonFiniteStateWarning
        When states become NaN or Inf; they are kept, as exploding states are a finding.
    """
    system = as_system(model_or_system, **wrap_options)
    n_real = None
    if system.front is not None:
        if lengths is not None or mask is not None:
            shape = tuple(getattr(inputs, "shape", ()))
            if len(shape) < 2:
                raise ValueError(f"lengths= and mask= need batched raw inputs (B, T, ...) for "
                                 f"the front end {system.front_name!r}, got {describe(inputs)}")
            n_real = _check_lengths(lengths, mask, shape[0], shape[1])
        inputs = through_front(system, inputs, n_real)
    x = as_sequences(inputs, system.input_size, system.dtype,
                     what=f"the {system.source} system")  # (B, T, I)
    if n_real is None:
        n_real = _check_lengths(lengths, mask, x.shape[0], x.shape[1])
    if system.time_reversed:
        x = reverse_prefixes(x, n_real)
    s0 = initial_states(system, h0, x.shape[0])  # (B, S)
    states = system.run(x, s0, progress=progress)  # (B, T, S)
    arrays = {"states": states.numpy(), "initial": s0.numpy(), "inputs": x.numpy()}
    _warn_non_finite(arrays["states"], system)
    for a in arrays.values():  # fresh buffers nobody else holds: the Trace keeps them uncopied
        a.setflags(write=False)
    meta = trace_metadata(system, x.shape)
    if n_real is not None:
        meta["lengths"] = n_real
    if system.front is not None:
        meta["front"] = system.front_name
    return Trace(**arrays, parts=system.parts, metadata=meta)


def reverse_prefixes(x: torch.Tensor, lengths: list[int] | None) -> torch.Tensor:
    """Each sequence (B, T, .) read backward over its real steps; padding stays at the end."""
    if lengths is None:
        return x.flip(1)
    T = x.shape[1]
    t = torch.arange(T)
    n = torch.as_tensor(lengths)[:, None]  # (B, 1)
    idx = torch.where(t[None, :] < n, n - 1 - t[None, :], t[None, :])  # (B, T)
    return torch.gather(x, 1, idx[:, :, None].expand(-1, -1, x.shape[2]))


def through_front(system: RecurrentSystem, inputs: Any, lengths: list[int] | None = None
                   ) -> torch.Tensor:
    """The recurrent part's inputs (B, T, I) from the model's raw inputs (token ids included)."""
    raw = inputs
    if isinstance(raw, np.ndarray):
        if raw.dtype == object or not np.issubdtype(raw.dtype, np.number):
            raise TypeError(f"raw inputs for the front end {system.front_name!r} must be numeric "
                            f"(token ids or features), got dtype {raw.dtype}")
        raw = torch.from_numpy(np.ascontiguousarray(raw))
    if not isinstance(raw, torch.Tensor):
        raise TypeError(f"raw inputs for the front end {system.front_name!r} must be a tensor or "
                        f"a numpy array, got {type(inputs).__name__}")
    if raw.is_floating_point():
        p = next(system.front.parameters(), None)
        if p is not None:
            raw = raw.to(p.dtype)
    from .systems import LowerLayers

    front = system.front
    try:
        with torch.no_grad():
            if isinstance(front, LowerLayers):
                out = front(raw, lengths)
            elif isinstance(front, torch.nn.Sequential) and isinstance(front[-1], LowerLayers):
                out = front[-1](front[0](raw), lengths)
            else:
                out = front(raw)
    except Exception as err:  # noqa: BLE001 - the front end's own error, with the context
        raise ValueError(f"the front end {system.front_name!r} failed on inputs of shape "
                         f"{tuple(raw.shape)} ({type(err).__name__}: {err}); pass what the "
                         "model itself takes, batch first") from None
    if not isinstance(out, torch.Tensor) or out.ndim not in (2, 3):
        raise ValueError(f"the front end {system.front_name!r} must return (B, T, I) features, "
                         f"got {getattr(out, 'shape', type(out).__name__)}")
    return out


def _warn_non_finite(states: np.ndarray, system: RecurrentSystem) -> None:
    # fast path: max and min propagate NaN and reach Inf, so both finite means all finite
    if np.isfinite(states.max()) and np.isfinite(states.min()):
        return
    finite = np.isfinite(states).all(axis=2)  # (B, T)
    t = int(np.flatnonzero(~finite.all(axis=0))[0])  # the earliest step of any sample
    b = int(np.flatnonzero(~finite[:, t])[0])
    bad = finite.size - int(finite.sum())
    warnings.warn(
        f"states of {system.source} became NaN/Inf at step t={t} of sample b={b} (first "
        f"occurrence; {bad} of {finite.size} (sample, step) states are affected). They are "
        "stored as computed: the dynamics explode for these inputs (check the spectral radius "
        "or lower the input scale)",
        NonFiniteStateWarning, stacklevel=3,
    )


def trace_metadata(system: RecurrentSystem, shape: tuple[int, ...]) -> dict[str, Any]:
    B, T, I = shape
    return {
        "model_class": system.source,
        "kind": system.kind,
        "num_layers": len(system.layers),
        "hidden_size": system.layers[0].hidden_size if system.layers else None,
        "state_size": system.state_size,
        "input_size": I,
        "batch_size": B,
        "n_steps": T,
        "output_part": system.output_part,
        "time_reversed": system.time_reversed,
        "direction": getattr(system, "direction", None),
        "layer": getattr(system, "layer_index", None),
        "dt": system.dt,
        "fingerprint": system.fingerprint,
        "dtype": str(system.dtype).replace("torch.", ""),
        **_precision_note(system),
        "hiddenlens_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }


def _precision_note(system: RecurrentSystem) -> dict[str, Any]:
    """Say so when a model's own weights have another precision than the analysis."""
    model = getattr(system, "model", None)
    params = [p for p in model.parameters()] if isinstance(model, torch.nn.Module) else []
    dtypes = {p.dtype for p in params if p.is_floating_point()}
    if len(dtypes) != 1 or system.dtype in dtypes:
        return {}
    own = str(next(iter(dtypes))).replace("torch.", "")
    used = str(system.dtype).replace("torch.", "")
    return {"model_dtype": own,
            "precision_note": f"the {own} model was analysed in {used} (weight copies "
                              f"converted); pass dtype=torch.{own} to keep its precision"}
