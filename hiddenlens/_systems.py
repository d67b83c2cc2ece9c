"""Recurrent systems: one uniform step ``s_t = F(s_{t-1}, x_t)`` on flat per-sample states.

:func:`wrap` turns a PyTorch recurrent module (``nn.RNN``/``GRU``/``LSTM``, their cells, or a model
that contains exactly one of them) or a plain step function into a :class:`RecurrentSystem`. A
system made from a module holds detached copies of its weights, so nothing hiddenlens does can
change the user's model; it is a snapshot of the weights at the time of wrapping.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

from ._guard import private_copy
from ._results import frozen_mapping
from ._validation import as_dtype

__all__ = ["LayerWeights", "RecurrentSystem", "wrap", "CELL_KINDS"]

CELL_KINDS = ("rnn_tanh", "rnn_relu", "gru", "lstm")
_GATES = {"rnn_tanh": 1, "rnn_relu": 1, "gru": 3, "lstm": 4}
_RECURRENT_TYPES = (nn.RNNBase, nn.RNNCellBase)

StepFn = Callable[[torch.Tensor, torch.Tensor], torch.Tensor]


@dataclass(frozen=True, eq=False)
class LayerWeights:
    """Weights of one recurrent layer, in PyTorch's own gate order and bias convention.

    Attributes
    ----------
    kind : {"rnn_tanh", "rnn_relu", "gru", "lstm"}
    input_size, hidden_size : int
    w_ih : Tensor of shape (G * hidden_size, input_size)
        Input weights; G gates stacked as PyTorch stores them (GRU: r, z, n; LSTM: i, f, g, o).
    w_hh : Tensor of shape (G * hidden_size, hidden_size)
    b_ih, b_hh : Tensor of shape (G * hidden_size,) or None
    h : slice
        Where this layer's hidden state sits in the flat state.
    c : slice or None
        Where this layer's LSTM cell state sits (None for other kinds).
    """

    kind: str
    input_size: int
    hidden_size: int
    w_ih: torch.Tensor
    w_hh: torch.Tensor
    b_ih: torch.Tensor | None
    b_hh: torch.Tensor | None
    h: slice
    c: slice | None

    @property
    def params(self) -> list[torch.Tensor]:
        """The weight list in the order PyTorch's fused kernels take it."""
        out = [self.w_ih, self.w_hh]
        if self.b_ih is not None:
            out += [self.b_ih, self.b_hh]
        return out

    def cell(self, x: torch.Tensor, h: torch.Tensor, c: torch.Tensor | None = None):
        """One step of this layer for batched (B, .) or single (.) tensors; returns h' (and c')."""
        gi = F.linear(x, self.w_ih, self.b_ih)  # (B, G*H)
        gh = F.linear(h, self.w_hh, self.b_hh)  # (B, G*H)
        if self.kind == "rnn_tanh":
            return torch.tanh(gi + gh)
        if self.kind == "rnn_relu":
            return torch.relu(gi + gh)
        if self.kind == "gru":
            i_r, i_z, i_n = gi.chunk(3, dim=-1)
            h_r, h_z, h_n = gh.chunk(3, dim=-1)
            r = torch.sigmoid(i_r + h_r)
            z = torch.sigmoid(i_z + h_z)
            n = torch.tanh(i_n + r * h_n)
            return (1 - z) * n + z * h
        i, f, g, o = (gi + gh).chunk(4, dim=-1)
        c_new = torch.sigmoid(f) * c + torch.sigmoid(i) * torch.tanh(g)
        return torch.sigmoid(o) * torch.tanh(c_new), c_new


class RecurrentSystem:
    """A recurrent map ``s_t = F(s_{t-1}, x_t)`` on flat states of shape (B, S), inputs (B, I).

    Build one with :func:`wrap`. ``parts`` names slices of the flat state (``"layer0.h"``,
    ``"layer0.c"``, ...); ``layers`` holds the weight copies of a module-backed system (empty for a
    plain step function), which closed-form analyses use.

    Attributes
    ----------
    state_size : int
        S, the length of the flat state.
    input_size : int
        I, the number of input features per step (0 for an autonomous map).
    parts : Mapping[str, slice]
    dtype : torch.dtype
    layers : tuple of LayerWeights
    kind : str
        "rnn_tanh", "rnn_relu", "gru", "lstm" or "callable".
    source : str
        Class name of what was wrapped.
    output_part : str
        The part that a module returns as its output sequence (top layer's ``h``).
    time_reversed : bool
        True for the backward direction of a bidirectional module: the system runs over the
        sequence from its last step to its first.
    """

    def __init__(
        self,
        *,
        state_size: int,
        input_size: int,
        parts: Mapping[str, slice],
        dtype: torch.dtype,
        kind: str,
        source: str,
        fingerprint: str,
        layers: tuple[LayerWeights, ...] = (),
        step_fn: StepFn | None = None,
        time_reversed: bool = False,
        model: Any = None,
    ) -> None:
        self.state_size = int(state_size)
        self.input_size = int(input_size)
        self.parts = frozen_mapping(parts)
        self.dtype = dtype
        self.kind = kind
        self.source = source
        self.fingerprint = fingerprint
        self.layers = tuple(layers)
        self.time_reversed = bool(time_reversed)
        self._step_fn = step_fn
        # kept for analyses that must call the whole user model (they guard it); never mutated
        self.model = model
        self.output_part = f"layer{len(self.layers) - 1}.h" if self.layers else next(iter(parts))

    # ------------------------------------------------------------------ one step
    def step(self, state: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
        """Advance flat states (B, S) by one step with inputs (B, I); differentiable, vmap-able."""
        if self._step_fn is not None:
            return self._step_fn(state, x)  # a module step function is a private eval copy
        new = []
        inp = x
        for layer in self.layers:
            h = state[..., layer.h]
            if layer.kind == "lstm":
                h_new, c_new = layer.cell(inp, h, state[..., layer.c])
                new += [h_new, c_new]
            else:
                h_new = layer.cell(inp, h)
                new.append(h_new)
            inp = h_new  # within one step, layer l reads layer l-1's new state
        return torch.cat(new, dim=-1)

    def zeros(self, batch: int) -> torch.Tensor:
        """Zero initial states (B, S) in the system's dtype."""
        return torch.zeros(batch, self.state_size, dtype=self.dtype)

    @property
    def is_module(self) -> bool:
        """True when the system's weights come from ``nn.RNN``/``GRU``/``LSTM`` or a cell."""
        return bool(self.layers)

    # ------------------------------------------------------------------ whole sequences
    @torch.no_grad()
    def run(self, inputs: torch.Tensor, h0: torch.Tensor, *, progress: bool | None = None
            ) -> torch.Tensor:
        """States after each step, (B, T, S), from validated inputs (B, T, I) and states (B, S).

        Module-backed systems use PyTorch's fused per-layer kernels; plain step functions loop
        over time (batched over B).
        """
        if self.layers:
            return _run_layers(self.layers, inputs, h0, self.state_size)
        return _run_callable(self, inputs, h0, progress)

    def __repr__(self) -> str:
        dims = f"S={self.state_size}, I={self.input_size}"
        parts = ", ".join(self.parts)
        return f"RecurrentSystem({self.source}, kind={self.kind}, {dims}, parts=[{parts}])"


# ---------------------------------------------------------------------- running
def _run_layers(layers, inputs, h0, state_size):
    B, T, _ = inputs.shape
    out = torch.empty(B, T, state_size, dtype=inputs.dtype)  # (B, T, S)
    out_tm = out.transpose(0, 1)  # (T, B, S) view: each layer writes its columns into it
    # the fused kernels work time-major internally; transposing once here, rather than in every
    # layer's call, also gives the LSTM cell rebuild contiguous per-step slices
    x = inputs.transpose(0, 1).contiguous()  # (T, B, I)
    for layer in layers:
        h0_l = h0[:, layer.h].unsqueeze(0).contiguous()  # (1, B, H)
        has_bias = layer.b_ih is not None
        if layer.kind == "lstm":
            c0 = h0[:, layer.c].contiguous()  # (B, H)
            seq, _, _ = torch._VF.lstm(
                x, (h0_l, c0.unsqueeze(0)), layer.params, has_bias, 1, 0.0, False, False, False,
            )  # seq (T, B, H)
            _lstm_cells(layer, x, h0_l[0], seq, c0, out_tm[:, :, layer.c])
        else:
            fused = torch._VF.gru if layer.kind == "gru" else (
                torch._VF.rnn_tanh if layer.kind == "rnn_tanh" else torch._VF.rnn_relu)
            seq, _ = fused(x, h0_l, layer.params, has_bias, 1, 0.0, False, False, False)
        out_tm[:, :, layer.h] = seq
        x = seq
    return out


# time steps per block of the LSTM cell rebuild: the gates of one block (block * B * 3H floats)
# stay in cache between the matmul, the activations and the recurrence
_LSTM_BLOCK = 64


def _lstm_cells(layer: LayerWeights, x, h_first, h_seq, c0, out):
    """Write c_t for all steps into ``out`` (T, B, H); the fused LSTM kernel returns only c_T.

    NOTE: [LSTM cell states without a time loop over matmuls]
    Once h_{t-1} is known for every t (it is the output sequence shifted by one step), the i, f, g
    gate pre-activations of all steps come from matmuls over the whole sequence:
    [x_t, h_{t-1}] @ [W_ih; W_hh]^T + b, done as two accumulating ``addmm`` into one buffer (no
    concatenated copy of the inputs). The o gate is never needed, so only 3/4 of the weight rows
    are multiplied. What is left, c_t = f_t * c_{t-1} + i_t * g_t, is an elementwise linear
    recurrence: one fused ``addcmul`` per step. A log-depth associative scan over it does
    O(T log T) elementwise work and measured slower than this loop for T in the hundreds
    (benchmarks/bench_record.py). The work runs in blocks of time steps so the gates of a block
    stay in cache.
    """
    H = layer.hidden_size
    T, B, _ = h_seq.shape
    rows = slice(0, 3 * H)  # i, f, g
    w_x = layer.w_ih[rows].t()  # (I, 3H)
    w_h = layer.w_hh[rows].t()  # (H, 3H)
    bias = None
    if layer.b_ih is not None:
        bias = layer.b_ih[rows] + layer.b_hh[rows]  # (3H,)
    x_flat = x.reshape(T * B, -1)  # (T*B, I)
    h_flat = h_seq.reshape(T * B, H)  # (T*B, H): row block t holds h_t
    prev = c0
    for t0 in range(0, T, _LSTM_BLOCK):
        t1 = min(T, t0 + _LSTM_BLOCK)
        xs = x_flat[t0 * B:t1 * B]
        gates = xs @ w_x if bias is None else torch.addmm(bias, xs, w_x)  # (n*B, 3H)
        if t0 == 0:  # step 0 reads the initial state, the others the output sequence
            gates[:B].addmm_(h_first, w_h)
            gates[B:].addmm_(h_flat[:(t1 - 1) * B], w_h)
        else:
            gates.addmm_(h_flat[(t0 - 1) * B:(t1 - 1) * B], w_h)
        gates = gates.view(t1 - t0, B, 3 * H)
        gates[..., :2 * H].sigmoid_()  # i, f
        g = gates[..., 2 * H:].tanh_()
        u = gates[..., :H].mul_(g)  # i_t * g_t
        f = gates[..., H:2 * H]
        for k in range(t1 - t0):
            prev = torch.addcmul(u[k], f[k], prev, out=out[t0 + k])
    return out


def _run_callable(system: RecurrentSystem, inputs, h0, progress):
    from tqdm.auto import tqdm

    B, T, _ = inputs.shape
    out = torch.empty(B, T, system.state_size, dtype=system.dtype)  # (B, T, S)
    xs = inputs.transpose(0, 1).contiguous()  # (T, B, I): contiguous per-step inputs
    s = h0
    show = progress if progress is not None else T >= 20_000
    # a module step function is already a private copy in eval mode (see _guard.private_copy)
    for t in tqdm(range(T), disable=not show, desc="recording", leave=False):
        s = system._step_fn(s, xs[t])
        if t == 0:
            _check_step_output(s, B, system.state_size)
        s = s.to(system.dtype)  # keep the promised dtype if the function promotes
        out[:, t] = s
    return out


def _check_step_output(s, B, S):
    if not isinstance(s, torch.Tensor):
        raise TypeError(f"the step function must return a tensor of shape ({B}, {S}), "
                        f"got {type(s).__name__}")
    if tuple(s.shape) != (B, S):
        raise ValueError(
            f"the step function returned shape {tuple(s.shape)} but states have shape ({B}, {S}); "
            "it must map (B, S) states and (B, I) inputs to (B, S) states"
        )


# ---------------------------------------------------------------------- wrapping
def wrap(
    obj: Any,
    *,
    dtype: Any = torch.float32,
    submodule: str | None = None,
    direction: str | None = None,
    state_size: int | None = None,
    input_size: int | None = None,
    parts: Mapping[str, slice] | None = None,
    name: str | None = None,
) -> RecurrentSystem:
    """Wrap a recurrent PyTorch model or a step function as a :class:`RecurrentSystem`.

    Parameters
    ----------
    obj : nn.RNN, nn.GRU, nn.LSTM, nn.RNNCell, nn.GRUCell, nn.LSTMCell, nn.Module or callable
        A recurrent module; a model containing exactly one recurrent submodule (found
        automatically, or named with ``submodule``); or a step function
        ``fn(state, x) -> state`` on (B, S) states and (B, I) inputs built from torch ops.
    dtype : torch.float32 or torch.float64, default float32
        Precision of the weight copies, the inputs and the recorded states.
    submodule : str, optional
        Name (as in ``model.named_modules()``) of the recurrent submodule to analyse.
    direction : {"forward", "backward"}, optional
        Which direction of a single-layer bidirectional module to analyse.
    state_size, input_size : int
        Required for a step function; ``input_size=0`` for an autonomous map.
    parts : Mapping[str, slice], optional
        Names for slices of a step function's state (default: one part ``"state"``).
    name : str, optional
        Label stored in traces (default: the class or function name).

    Returns
    -------
    RecurrentSystem

    Notes
    -----
    Dropout between layers is off: hiddenlens analyses the deterministic map. The system holds
    copies of the weights taken now; wrap again after further training.
    """
    dt = as_dtype(dtype)
    if isinstance(obj, RecurrentSystem):
        raise TypeError("obj is already a RecurrentSystem; pass it on directly instead of "
                        "wrapping it again")
    if isinstance(obj, nn.Module) and state_size is None:
        module, path = _find_recurrent(obj, submodule)
        return _wrap_module(module, dt, direction, source=name or type(obj).__name__,
                            path=path, model=obj)
    if callable(obj):
        for arg, val in (("submodule", submodule), ("direction", direction)):
            if val is not None:
                raise ValueError(f"{arg}= applies to recurrent modules, not to step functions")
        return _wrap_callable(obj, dt, state_size, input_size, parts, name)
    raise TypeError(
        f"cannot wrap a {type(obj).__name__}; pass an nn.RNN/nn.GRU/nn.LSTM (or a cell), a model "
        "containing one, or a step function fn(state, x) -> state with state_size= and input_size="
    )


def _find_recurrent(model: nn.Module, submodule: str | None) -> tuple[nn.Module, str]:
    if isinstance(model, _RECURRENT_TYPES) and submodule is None:
        return model, ""
    found = [(n, m) for n, m in model.named_modules() if isinstance(m, _RECURRENT_TYPES)]
    if submodule is not None:
        for n, m in found:
            if n == submodule:
                return m, n
        names = ", ".join(repr(n) for n, _ in found) or "none"
        raise ValueError(f"{type(model).__name__} has no recurrent submodule named "
                         f"{submodule!r}; recurrent submodules: {names}")
    if not found:
        raise ValueError(
            f"{type(model).__name__} contains no recurrent submodule (nn.RNN, nn.GRU, nn.LSTM or "
            "their cells); for a custom recurrence pass its step function: "
            "wrap(fn, state_size=S, input_size=I)"
        )
    if len(found) > 1:
        names = ", ".join(repr(n) for n, _ in found)
        raise ValueError(
            f"{type(model).__name__} contains {len(found)} recurrent submodules ({names}); pick "
            f"one with wrap(model, submodule={found[0][0]!r})"
        )
    return found[0][1], found[0][0]


def _weight(module: nn.Module, attr: str, dtype: torch.dtype) -> torch.Tensor:
    p = getattr(module, attr)
    if p.device.type != "cpu":
        try:
            p = p.detach().to("cpu")
        except (RuntimeError, NotImplementedError) as err:
            raise ValueError(
                f"parameter {attr} is on device '{p.device}', which holds no data or is not "
                "available here; hiddenlens analyses on the CPU: load the weights with "
                "map_location='cpu' or call model.cpu() first"
            ) from err
    return p.detach().to(dtype=dtype, copy=True)


def fingerprint(module: Any) -> str:
    """SHA-256 (first 16 hex digits) of a module's parameter names, shapes, dtypes and bytes."""
    h = hashlib.sha256()
    if isinstance(module, nn.Module):
        for n, p in module.named_parameters():
            t = p.detach()
            h.update(f"{n}:{tuple(t.shape)}:{t.dtype}".encode())
            if t.device.type == "meta":
                continue
            h.update(t.cpu().contiguous().reshape(-1).view(torch.uint8).numpy())
    else:
        h.update(getattr(module, "__qualname__", type(module).__qualname__).encode())
    return h.hexdigest()[:16]


def _module_kind(module: nn.Module) -> str:
    if isinstance(module, (nn.LSTM, nn.LSTMCell)):
        return "lstm"
    if isinstance(module, (nn.GRU, nn.GRUCell)):
        return "gru"
    if isinstance(module, (nn.RNN, nn.RNNCell)):
        return "rnn_relu" if module.nonlinearity == "relu" else "rnn_tanh"
    raise ValueError(f"unsupported recurrent module {type(module).__name__}; supported: nn.RNN, "
                     "nn.GRU, nn.LSTM, nn.RNNCell, nn.GRUCell, nn.LSTMCell")


def _wrap_module(module, dtype, direction, *, source, path, model):
    kind = _module_kind(module)
    label = f"{type(module).__name__}" + (f" '{path}'" if path else "")
    if isinstance(module, nn.RNNCellBase):
        if direction is not None:
            raise ValueError(f"{label} is a cell, which has one direction; drop direction=")
        names = [("weight_ih", "weight_hh", "bias_ih", "bias_hh")]
        num_layers, suffix = 1, ""
    else:
        if getattr(module, "proj_size", 0):
            raise ValueError(
                f"{label} has proj_size={module.proj_size}; LSTMs with projections are not "
                "supported: analyse a model trained without proj_size"
            )
        num_layers = module.num_layers
        suffix = ""
        if module.bidirectional:
            if num_layers > 1:
                raise ValueError(
                    f"{label} is bidirectional with num_layers={num_layers}: each upper layer "
                    "reads both directions of the layer below over the whole sequence, so no "
                    "single direction is a recurrent system; analyse a single-layer "
                    "bidirectional module with direction='forward' or 'backward'"
                )
            if direction not in ("forward", "backward"):
                raise ValueError(
                    f"{label} is bidirectional; pick the direction to analyse with "
                    "wrap(model, direction='forward') or direction='backward' (the backward "
                    "direction runs from the last step to the first)"
                )
            suffix = "_reverse" if direction == "backward" else ""
        elif direction not in (None, "forward"):
            raise ValueError(f"{label} is not bidirectional; direction={direction!r} does not "
                             "apply (drop it)")
        names = [(f"weight_ih_l{k}{suffix}", f"weight_hh_l{k}{suffix}",
                  f"bias_ih_l{k}{suffix}", f"bias_hh_l{k}{suffix}") for k in range(num_layers)]
    has_bias = bool(module.bias)
    H = module.hidden_size
    layers, parts, start = [], {}, 0
    for k, (wi, wh, bi, bh) in enumerate(names):
        h = slice(start, start + H)
        start += H
        c = None
        if kind == "lstm":
            c = slice(start, start + H)
            start += H
        w_ih = _weight(module, wi, dtype)
        layers.append(LayerWeights(
            kind=kind, input_size=w_ih.shape[1], hidden_size=H, w_ih=w_ih,
            w_hh=_weight(module, wh, dtype),
            b_ih=_weight(module, bi, dtype) if has_bias else None,
            b_hh=_weight(module, bh, dtype) if has_bias else None, h=h, c=c))
        parts[f"layer{k}.h"] = h
        if c is not None:
            parts[f"layer{k}.c"] = c
    return RecurrentSystem(
        state_size=start, input_size=module.input_size, parts=parts, dtype=dtype, kind=kind,
        source=source, fingerprint=fingerprint(model), layers=tuple(layers),
        time_reversed=suffix == "_reverse", model=model,
    )


def _wrap_callable(fn, dtype, state_size, input_size, parts, name):
    if state_size is None or input_size is None:
        raise ValueError(
            "a step function needs its sizes: wrap(fn, state_size=S, input_size=I) "
            "(input_size=0 for an autonomous map)"
        )
    for arg, val, low in (("state_size", state_size, 1), ("input_size", input_size, 0)):
        if isinstance(val, bool) or not isinstance(val, int) or val < low:
            raise ValueError(f"{arg} must be an integer >= {low}, got {val!r}")
    parts = dict(parts) if parts else {"state": slice(0, state_size)}
    for pname, sl in parts.items():
        if not isinstance(sl, slice) or sl.step not in (None, 1):
            raise ValueError(f"part {pname!r} must be a contiguous slice, got {sl!r}")
        lo = 0 if sl.start is None else sl.start
        hi = state_size if sl.stop is None else sl.stop
        if not (isinstance(lo, int) and isinstance(hi, int) and 0 <= lo < hi <= state_size):
            raise ValueError(f"part {pname!r} = {sl!r} lies outside the state of size "
                             f"{state_size}")
        parts[pname] = slice(lo, hi)
    source = name or getattr(fn, "__name__", type(fn).__name__)
    # a module runs as a private frozen copy: the user's module is never run nor flipped
    step_fn = private_copy(fn) if isinstance(fn, nn.Module) else fn
    return RecurrentSystem(
        state_size=state_size, input_size=input_size, parts=parts, dtype=dtype,
        kind="callable", source=source, fingerprint=fingerprint(fn), step_fn=step_fn,
        model=step_fn if isinstance(fn, nn.Module) else None,
    )
