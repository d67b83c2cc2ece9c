"""Recurrent systems: one uniform step ``s_t = F(s_{t-1}, x_t)`` on flat per-sample states.

:func:`wrap` turns a PyTorch recurrent module (``nn.RNN``/``GRU``/``LSTM``, their cells, or a model
that contains exactly one of them) or a plain step function into a :class:`RecurrentSystem`. A
system made from a module holds detached copies of its weights, so nothing hiddenlens does can
change the user's model; it is a snapshot of the weights at the time of wrapping.
"""

from __future__ import annotations

import copy
import hashlib
import inspect
import numbers
import types
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from .results import frozen_mapping
from .validation import as_dtype

if TYPE_CHECKING:  # the aliases of the public signatures
    from .aliases import ModelLike

__all__ = ["LayerWeights", "RecurrentSystem", "wrap", "CELL_KINDS"]

CELL_KINDS = ("rnn_tanh", "rnn_relu", "gru", "lstm", "leaky")
_GATES = {"rnn_tanh": 1, "rnn_relu": 1, "gru": 3, "lstm": 4, "leaky": 1}
LEAKY_NONLINEARITIES = ("tanh", "relu", "softplus")
ORDERS = ("input_first", "state_first")


def leaky_activation(name: str, pre: torch.Tensor) -> torch.Tensor:
    """The rate function f of a leaky RNN."""
    if name == "tanh":
        return torch.tanh(pre)
    if name == "relu":
        return torch.relu(pre)
    return F.softplus(pre)
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
    alpha : Tensor of shape (hidden_size,) or None
        Leaky RNNs only: the leak a = dt / tau of each unit.
    nonlinearity : str or None
        Leaky RNNs only: the rate function, "tanh", "relu" or "softplus".
    dt : float or None
        Leaky RNNs only: the time step in the model's own time unit, when known.
    w_hr : Tensor of shape (proj_size, hidden_size) or None
        LSTMs with ``proj_size`` only: h = w_hr (o * tanh(c)); h then has proj_size units.
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
    alpha: torch.Tensor | None = None
    nonlinearity: str | None = None
    dt: float | None = None
    w_hr: torch.Tensor | None = None

    def __post_init__(self) -> None:
        if self.kind not in CELL_KINDS:
            raise ValueError(f"LayerWeights kind must be one of {', '.join(CELL_KINDS)}, got "
                             f"{self.kind!r}; build layers with hiddenlens.wrap(module)")
        for name in ("w_ih", "w_hh"):
            if not isinstance(getattr(self, name), torch.Tensor):
                raise TypeError(f"LayerWeights {name} must be a tensor, got "
                                f"{type(getattr(self, name)).__name__}")

    @property
    def params(self) -> list[torch.Tensor]:
        """The weight list in the order PyTorch's fused kernels take it."""
        out = [self.w_ih, self.w_hh]
        if self.b_ih is not None:
            out += [self.b_ih, self.b_hh]
        if self.w_hr is not None:
            out.append(self.w_hr.to(self.w_hh.dtype))
        return out

    def cell(self, x: torch.Tensor, h: torch.Tensor, c: torch.Tensor | None = None):
        """One step of this layer for batched (B, .) or single (.) tensors; returns h' (and c')."""
        gi = F.linear(x, self.w_ih, self.b_ih)  # (B, G*H)
        gh = F.linear(h, self.w_hh, self.b_hh)  # (B, G*H)
        if self.kind == "leaky":
            a = self.alpha.to(h.dtype)
            return (1 - a) * h + a * leaky_activation(self.nonlinearity, gi + gh)
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
        h_new = torch.sigmoid(o) * torch.tanh(c_new)
        if self.w_hr is not None:
            h_new = F.linear(h_new, self.w_hr.to(h_new.dtype))
        return h_new, c_new


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
        "rnn_tanh", "rnn_relu", "gru", "lstm", "leaky" or "callable".
    source : str
        Class name of what was wrapped.
    output_part : str
        The part that a module returns as its output sequence (top layer's ``h``).
    time_reversed : bool
        True for the backward direction of a bidirectional module: the system runs over the
        sequence from its last step to its first.
    dt : float or None
        The time one step stands for (leaky RNNs built with ``dt``), else None.
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
        if not parts:
            raise ValueError("RecurrentSystem needs at least one named part of the state, e.g. "
                             "parts={'state': slice(0, S)}; build systems with hiddenlens.wrap")
        if (step_fn is None) == (not layers):
            raise ValueError("RecurrentSystem needs either layers (LayerWeights) or a step_fn, "
                             "exactly one of them; build systems with hiddenlens.wrap")
        if int(state_size) < 1 or int(input_size) < 0:
            raise ValueError(f"RecurrentSystem sizes must be state_size >= 1 and input_size >= 0, "
                             f"got {state_size} and {input_size}")
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
        self.front: nn.Module | None = None  # pre-processing of raw inputs (wrap(front=...))
        self.front_name: str | None = None
        # kept for analyses that must call the whole user model (they guard it); never mutated
        self.model = model
        self.output_part = next(iter(parts))
        if self.layers:  # the top layer's h, whichever layer of the module it is
            top = self.layers[-1].h
            self.output_part = next((n for n, sl in self.parts.items()
                                     if n.endswith(".h") and sl == top), self.output_part)
        self.direction: str | None = None  # "forward" / "backward" of a bidirectional module
        self.layer_index: int | None = None  # the module's layer when one layer was wrapped

    @property
    def dt(self) -> float | None:
        """The time step of a leaky RNN in its own time unit, when it was given (else None)."""
        return self.layers[0].dt if self.layers else None

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

    def without_front(self) -> RecurrentSystem:
        """This system reading the recurrent part's own inputs (B, T, I): no front end.

        Analyses that draw probe inputs of their own (the memory probe) feed the recurrent
        part directly; the weight copies are shared, never changed.
        """
        if self.front is None:
            return self
        core = copy.copy(self)
        core.front = None
        core.front_name = None
        return core

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
        if layer.kind == "leaky":
            seq = _leaky_sequence(layer, x, h0_l[0])
        elif layer.kind == "lstm":
            c0 = h0[:, layer.c].contiguous()  # (B, H)
            with warnings.catch_warnings():
                # torch notes that its oneDNN path lacks projections and takes its own: no action
                warnings.filterwarnings("ignore", message=".*projections is not supported.*")
                seq, _, _ = torch._VF.lstm(
                    x, (h0_l, c0.unsqueeze(0)), layer.params, has_bias, 1, 0.0, False, False,
                    False,
                )  # seq (T, B, H or proj_size)
            _lstm_cells(layer, x, h0_l[0], seq, c0, out_tm[:, :, layer.c])
        else:
            fused = torch._VF.gru if layer.kind == "gru" else (
                torch._VF.rnn_tanh if layer.kind == "rnn_tanh" else torch._VF.rnn_relu)
            seq, _ = fused(x, h0_l, layer.params, has_bias, 1, 0.0, False, False, False)
        out_tm[:, :, layer.h] = seq
        x = seq
    return out


def _leaky_sequence(layer: LayerWeights, x: torch.Tensor, h: torch.Tensor) -> torch.Tensor:
    """States (T, B, H) of a leaky layer: the input drive of all steps in one matmul."""
    T = x.shape[0]
    a = layer.alpha.to(x.dtype)
    keep = 1 - a
    w_hh = layer.w_hh.t()  # (H, H)
    drive = F.linear(x, layer.w_ih, layer.b_ih)  # (T, B, H)
    if layer.b_hh is not None:
        drive = drive + layer.b_hh
    seq = torch.empty(T, *h.shape, dtype=x.dtype)  # (T, B, H)
    for t in range(T):
        pre = torch.addmm(drive[t], h, w_hh)
        h = torch.addcmul(keep * h, a, leaky_activation(layer.nonlinearity, pre), out=seq[t])
    return seq


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
    w_h = layer.w_hh[rows].t()  # (H or proj_size, 3H)
    bias = None
    if layer.b_ih is not None:
        bias = layer.b_ih[rows] + layer.b_hh[rows]  # (3H,)
    x_flat = x.reshape(T * B, -1)  # (T*B, I)
    h_flat = h_seq.reshape(T * B, -1)  # (T*B, H or proj_size): row block t holds h_t
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


def random_step_message(source: str) -> str:
    """What every analysis says of a step function that draws random numbers."""
    return (f"the step function of {source} draws random numbers from torch's global "
            "generator; hiddenlens analyses a deterministic map and never draws from your "
            "generator: pass the noise as an input (one more input feature, drawn beforehand "
            "with your own torch.Generator) or remove it")


def refuse_random_steps(system: RecurrentSystem, s: Any, x: Any) -> None:
    """Refuse a step function that draws from torch's global RNG, before it draws anything.

    One step under ``vmap(randomness="error")`` raises at the first random operation, so the
    user's global generator is never advanced (and never saved and restored behind their back).
    Other failures inside vmap are left for the caller to meet. ``s`` (1, S) and ``x`` (1, I)
    are one state and one input (tensors or arrays); module-backed systems are not checked
    (their closed forms draw nothing).
    """
    if system.layers or system._step_fn is None:
        return
    from torch.func import vmap

    def one(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
        return system._step_fn(a[None], b[None])[0]

    try:
        s, x = (torch.as_tensor(np.array(v) if isinstance(v, np.ndarray) else v,
                                dtype=system.dtype) for v in (s, x))  # copies of read-only arrays
        s = s.reshape(1, system.state_size)  # (1, S)
        x = x.reshape(1, system.input_size)  # (1, I)
        with torch.no_grad():
            vmap(one, randomness="error")(s, x)
    except RuntimeError as err:
        if "random" in str(err).lower():
            raise TypeError(random_step_message(system.source)) from None
    except Exception:  # noqa: BLE001 - anything else is the caller's to report
        pass


_refuse_random_steps = refuse_random_steps


def _run_callable(system: RecurrentSystem, inputs, h0, progress):
    from tqdm.auto import tqdm

    B, T, _ = inputs.shape
    out = torch.empty(B, T, system.state_size, dtype=system.dtype)  # (B, T, S)
    xs = inputs.transpose(0, 1).contiguous()  # (T, B, I): contiguous per-step inputs
    s = h0
    show = progress if progress is not None else T >= 20_000
    _refuse_random_steps(system, s[:1], xs[0, :1])
    # a module step function is already a private copy in eval mode (see _snapshot)
    for t in tqdm(range(T), disable=not show, desc="recording", leave=False):
        s = system._step_fn(s, xs[t])
        # every step, cheaply: a step function may change its output shape later on
        if not isinstance(s, torch.Tensor) or s.shape != (B, system.state_size):
            _check_step_output(s, B, system.state_size, t)
        s = s.to(system.dtype)  # keep the promised dtype if the function promotes
        out[:, t] = s
    return out


def _check_step_output(s, B, S, t=0):
    if not isinstance(s, torch.Tensor):
        raise TypeError(f"the step function must return a tensor of shape ({B}, {S}), "
                        f"got {type(s).__name__} at step t={t}")
    if tuple(s.shape) != (B, S):
        raise ValueError(
            f"the step function returned shape {tuple(s.shape)} but states have shape ({B}, {S}) "
            f"(at step t={t}); it must map (B, S) states and (B, I) inputs to (B, S) states"
        )


# ---------------------------------------------------------------------- wrapping
def wrap(
    obj: ModelLike,
    *,
    dtype: Any = torch.float32,
    submodule: str | None = None,
    cell: str | None = None,
    direction: str | None = None,
    layer: int | None = None,
    state_size: int | None = None,
    input_size: int | None = None,
    parts: Mapping[str, slice] | None = None,
    order: str | None = None,
    front: str | None = None,
    name: str | None = None,
) -> RecurrentSystem:
    """Wrap a recurrent PyTorch model, a cell or a step function as a :class:`RecurrentSystem`.

    Parameters
    ----------
    obj : nn.RNN, nn.GRU, nn.LSTM, nn.RNNCell, nn.GRUCell, nn.LSTMCell, nn.Module or callable
        A recurrent module; a leaky RNN module exposing its weights (see Notes); a model
        containing exactly one of them (found automatically, or named with ``submodule``); a
        cell module of your own whose forward is PyTorch's ``cell(input, hidden) -> hidden``
        (or ``-> (output, hidden)``); or a step function on (B, S) states and (B, I) inputs
        built from torch ops, ``fn(state, x) -> state`` (or input first, see ``order``).
    dtype : torch.float32 or torch.float64, default float32
        Precision of the weight copies, the inputs and the recorded states.
    submodule : str, optional
        Name (as in ``model.named_modules()``) of the recurrent submodule to analyse.
    cell : str, optional
        Name of a submodule of ``obj`` that is a cell of your own, called as
        ``cell(input, hidden)``; its sizes come from its ``hidden_size`` / ``input_size``
        attributes or from ``state_size`` / ``input_size``.
    direction : {"forward", "backward"}, optional
        Which direction of a bidirectional module to analyse (required for one).
    layer : int, optional
        One layer of a stacked ``nn.RNN``/``GRU``/``LSTM`` as the system, fed by the layers
        below it: they become the system's front end (a private copy run by torch over the
        whole sequence, both directions for a bidirectional stack), so :func:`record` still
        takes the module's own inputs. Default: the whole stack; for a bidirectional stack of
        several layers, the top layer (each layer above the first reads both directions of
        the layer below over the whole sequence, so only one layer and one direction at a time
        is a recurrent system).
    state_size, input_size : int
        Required for a step function (and a cell without ``hidden_size`` / ``input_size``
        attributes); ``input_size=0`` for an autonomous map.
    parts : Mapping[str, slice], optional
        Names for slices of a step function's state (default: one part ``"state"``).
    order : {"input_first", "state_first"}, optional
        Argument order of a cell or step function. Decided automatically where it can be: a
        module's argument names (``input``/``x`` versus ``hidden``/``h``/``hx``/``state``) or
        a probe call when the input and state sizes differ. A cell module whose order cannot be
        decided (equal sizes, neutral names) is refused until ``order`` is given; a plain
        function with neutral names is taken as hiddenlens' ``fn(state, x)``.
    front : str, optional
        Name of the submodule of ``obj`` that turns the model's raw inputs into the recurrent
        part's inputs (an ``nn.Embedding`` fed token ids, a linear encoder, an
        ``nn.Sequential`` of such). :func:`hiddenlens.record` then takes the raw inputs, passes
        them through a copy of it, and records the recurrent part; the trace stores what the
        recurrent part received.
    name : str, optional
        Label stored in traces (default: the class or function name).

    Returns
    -------
    RecurrentSystem

    Notes
    -----
    Dropout between layers is off: hiddenlens analyses the deterministic map. The system holds
    copies of the weights taken now; wrap again after further training. A cell module or a step
    function is deep-copied at wrap time too (a module; a bound method's module; the modules and
    tensors held in a function's closure), so later changes to the original do not reach the
    system; modules reached through global names are not copied.

    A module is taken as a leaky (continuous-time) RNN, ``h <- (1 - a) h + a f(W h + U x + b)``,
    when it has ``weight_hh`` (H, H) and ``weight_ih`` (H, I) tensors, ``alpha`` (a number or
    (H,) tensor) or both ``dt`` and ``tau``, and optionally ``bias`` (H,) and ``nonlinearity``
    ("tanh", "relu" or "softplus"; default tanh). Its own forward is checked against the
    closed form on a probe at wrap time; noise its forward adds is not part of the system.
    """
    if front is not None:
        front_module = _front_of(obj, front)
        system = wrap(obj, dtype=dtype, submodule=submodule, cell=cell, direction=direction,
                      layer=layer, state_size=state_size, input_size=input_size, parts=parts,
                      order=order, name=name)
        if system.front is not None:  # the user's front end, then the stack's lower layers
            system.front = nn.Sequential(front_module, system.front).eval()
            system.front_name = f"{front} + {system.front_name}"
        else:
            system.front = front_module
            system.front_name = front
        return system
    dt = as_dtype(dtype)
    if isinstance(obj, RecurrentSystem):
        raise TypeError("obj is already a RecurrentSystem; pass it on directly instead of "
                        "wrapping it again")
    if order is not None and order not in ORDERS:
        raise ValueError(f"order must be 'input_first' (PyTorch's cell(input, hidden)) or "
                         f"'state_first' (fn(state, x)), got {order!r}")
    if cell is not None:
        if not isinstance(obj, nn.Module):
            raise TypeError(f"cell= names a submodule of a model; got a {type(obj).__name__}")
        if submodule is not None:
            raise ValueError("give either submodule= (a built-in recurrent module) or cell= "
                             "(a cell of your own), not both")
        if layer is not None or direction is not None:
            raise ValueError("layer= and direction= apply to nn.RNN/GRU/LSTM stacks, not to a "
                             "cell of your own (drop them)")
        target = _named_submodule(obj, cell)
        label = name or f"{type(obj).__name__}.{cell}"
        if _is_leaky_module(target) and state_size is None and order is None:
            return _wrap_leaky_module(target, dt, source=label, model=obj)
        return _wrap_cell_module(target, dt, state_size, input_size, parts, order, label)
    if isinstance(obj, nn.Module) and state_size is None:
        module, path = find_recurrent(obj, submodule, allow_cell=True)
        if module is None:  # obj itself is a cell of the user's own
            return _wrap_cell_module(obj, dt, state_size, input_size, parts, order, name)
        if _is_leaky_module(module):
            if direction is not None or layer not in (None, 0):
                raise ValueError("a leaky RNN has one direction and one layer; drop direction= "
                                 "and layer=")
            return _wrap_leaky_module(module, dt, source=name or type(obj).__name__,
                                      model=obj)
        return _wrap_module(module, dt, direction, source=name or type(obj).__name__,
                            path=path, model=obj, layer=layer)
    if isinstance(obj, nn.Module):
        if submodule is not None or direction is not None or layer is not None:
            raise ValueError("submodule=, direction= and layer= apply to built-in recurrent "
                             "modules, not to a cell wrapped with state_size=")
        return _wrap_cell_module(obj, dt, state_size, input_size, parts, order, name)
    if callable(obj):
        for arg, val in (("submodule", submodule), ("direction", direction), ("layer", layer)):
            if val is not None:
                raise ValueError(f"{arg}= applies to recurrent modules, not to step functions")
        return _wrap_callable(obj, dt, state_size, input_size, parts, name, order)
    raise TypeError(
        f"cannot wrap a {type(obj).__name__}; pass an nn.RNN/nn.GRU/nn.LSTM (or a cell), a model "
        "containing one, or a step function fn(state, x) -> state with state_size= and input_size="
    )


def _front_of(obj: Any, front: str) -> nn.Module:
    if not isinstance(obj, nn.Module):
        raise TypeError(f"front= names a submodule of a model; got a {type(obj).__name__}")
    if not isinstance(front, str):
        raise TypeError(f"front must be the name of a submodule (a string), got {front!r}")
    return _copy_module(_named_submodule(obj, front, " to use as front end"))


def _named_submodule(obj: nn.Module, name: str, purpose: str = "") -> nn.Module:
    """``obj.get_submodule(name)``, or a ValueError listing the submodules there are."""
    try:
        return obj.get_submodule(name)
    except AttributeError:
        names = ", ".join(repr(n) for n, _ in obj.named_modules() if n) or "none"
        raise ValueError(f"{type(obj).__name__} has no submodule named {name!r}{purpose}; its "
                         f"submodules: {names}") from None


def leaky_rnn(
    W: Any,
    U: Any,
    b: Any = None,
    *,
    alpha: Any = None,
    dt: float | None = None,
    tau: Any = None,
    nonlinearity: str = "tanh",
    dtype: Any = torch.float32,
    name: str = "leaky_rnn",
) -> RecurrentSystem:
    """A leaky (discretised continuous-time) RNN from weight arrays.

    ``h_t = (1 - a) h_{t-1} + a f(W h_{t-1} + U x_t + b)``, the Euler step of
    ``tau dh/dt = -h + f(W h + U x + b)`` with ``a = dt / tau``.

    Parameters
    ----------
    W : array of shape (H, H)
        Recurrent weights.
    U : array of shape (H, I)
        Input weights (I may be 0 for an autonomous network).
    b : array of shape (H,), optional
        Bias (zero by default).
    alpha : float or array of shape (H,), optional
        The leak a in (0, 1], shared or per unit. Give it, or ``dt`` and ``tau``.
    dt : float, optional
        The time one step stands for; with it, Lyapunov exponents are also reported per unit
        time (exponent per step / dt).
    tau : float or array of shape (H,), optional
        Time constants, in the unit of ``dt``; ``alpha = dt / tau``.
    nonlinearity : {"tanh", "relu", "softplus"}, default "tanh"
    dtype : torch.float32 or torch.float64

    Returns
    -------
    RecurrentSystem
        kind ``"leaky"``, one part ``"layer0.h"``, step Jacobians in closed form:
        ``J = diag(1 - a) + diag(a f'(pre)) W``.
    """
    dtp = as_dtype(dtype)
    W_t = _as_weight(W, "W", dtp, 2)
    H = W_t.shape[0]
    if W_t.shape != (H, H):
        raise ValueError(f"W must be square (H, H), got shape {tuple(W_t.shape)}")
    U_t = _as_weight(U, "U", dtp, 2)
    if U_t.shape[0] != H:
        raise ValueError(f"U must have shape ({H}, I) to match W, got {tuple(U_t.shape)}")
    b_t = None if b is None else _as_weight(b, "b", dtp, 1)
    if b_t is not None and b_t.shape != (H,):
        raise ValueError(f"b must have shape ({H},), got {tuple(b_t.shape)}")
    alpha_t = _leak(alpha, dt, tau, H, dtp, "leaky_rnn")
    layer = _leaky_layer(W_t, U_t, b_t, alpha_t, nonlinearity, dt)
    h = fingerprint_tensors([W_t, U_t, alpha_t] + ([] if b_t is None else [b_t]))
    return RecurrentSystem(
        state_size=H, input_size=U_t.shape[1], parts={"layer0.h": slice(0, H)}, dtype=dtp,
        kind="leaky", source=name, fingerprint=h, layers=(layer,),
    )


def _as_weight(value: Any, what: str, dtype: torch.dtype, ndim: int) -> torch.Tensor:
    if isinstance(value, torch.Tensor):
        t = value.detach().to("cpu", dtype=dtype, copy=True)
    else:
        import numpy as np

        arr = np.asarray(value)
        if not np.issubdtype(arr.dtype, np.number):
            raise TypeError(f"{what} must be a numeric array, got dtype {arr.dtype}")
        t = torch.tensor(arr, dtype=dtype)
    if t.ndim != ndim:
        raise ValueError(f"{what} must be {ndim}-D, got shape {tuple(t.shape)}")
    if not torch.isfinite(t).all():
        raise ValueError(f"{what} holds NaN or Inf; pass finite weights")
    return t


def _leak(alpha, dt, tau, H, dtype, label) -> torch.Tensor:
    if alpha is None:
        if dt is None or tau is None:
            raise ValueError(f"{label} needs the leak: alpha= (a number or one per unit), or "
                             "dt= and tau= (alpha = dt / tau)")
        tau_t = torch.as_tensor(tau.detach() if isinstance(tau, torch.Tensor) else tau,
                                dtype=torch.float64)
        if not (tau_t > 0).all():
            raise ValueError(f"tau must be positive, got {tau!r}")
        alpha = float(dt) / tau_t
    a = torch.as_tensor(alpha.detach() if isinstance(alpha, torch.Tensor) else alpha,
                        dtype=torch.float64).reshape(-1)
    if a.numel() == 1:
        a = a.expand(H)
    if a.shape != (H,):
        raise ValueError(f"alpha must be a number or hold one value per unit ({H}), got "
                         f"{a.numel()} values")
    if not ((a > 0) & (a <= 1)).all():
        raise ValueError(f"alpha = dt / tau must lie in (0, 1] (the Euler step is unstable "
                         f"beyond 1), got values in [{a.min().item():.3g}, {a.max().item():.3g}]")
    if dt is not None and (isinstance(dt, bool) or not (isinstance(dt, numbers.Real) and dt > 0)):
        raise ValueError(f"dt must be a positive number, got {dt!r}")
    return a.to(dtype).clone()


def _leaky_layer(W, U, b, alpha, nonlinearity, dt) -> LayerWeights:
    if nonlinearity not in LEAKY_NONLINEARITIES:
        raise ValueError(f"nonlinearity must be one of {LEAKY_NONLINEARITIES}, got "
                         f"{nonlinearity!r}")
    H = W.shape[0]
    return LayerWeights(kind="leaky", input_size=U.shape[1], hidden_size=H, w_ih=U, w_hh=W,
                        b_ih=b, b_hh=None, h=slice(0, H), c=None, alpha=alpha,
                        nonlinearity=nonlinearity, dt=None if dt is None else float(dt))


def _is_leaky_module(m: nn.Module) -> bool:
    if isinstance(m, _RECURRENT_TYPES):
        return False
    w_hh, w_ih = getattr(m, "weight_hh", None), getattr(m, "weight_ih", None)
    if not (isinstance(w_hh, torch.Tensor) and isinstance(w_ih, torch.Tensor)):
        return False
    return getattr(m, "alpha", None) is not None or (
        getattr(m, "dt", None) is not None and getattr(m, "tau", None) is not None)


def _wrap_leaky_module(module, dtype, *, source, model):
    label = type(module).__name__
    W = _weight(module, "weight_hh", dtype)
    U = _weight(module, "weight_ih", dtype)
    H = W.shape[0]
    if W.shape != (H, H) or U.ndim != 2 or U.shape[0] != H:
        raise ValueError(f"{label} looks like a leaky RNN but weight_hh has shape "
                         f"{tuple(W.shape)} and weight_ih {tuple(U.shape)}; expected (H, H) and "
                         "(H, I)")
    b = _weight(module, "bias", dtype) if isinstance(getattr(module, "bias", None),
                                                      torch.Tensor) else None
    dt = getattr(module, "dt", None)
    dt = float(dt) if isinstance(dt, numbers.Real) and not isinstance(dt, bool) else None
    alpha = _leak(getattr(module, "alpha", None), dt, getattr(module, "tau", None), H, dtype,
                  label)
    nl = getattr(module, "nonlinearity", "tanh")
    layer = _leaky_layer(W, U, b, alpha, nl, dt)
    system = RecurrentSystem(
        state_size=H, input_size=U.shape[1], parts={"layer0.h": slice(0, H)}, dtype=dtype,
        kind="leaky", source=source, fingerprint=fingerprint(model), layers=(layer,),
        model=model,
    )
    _check_leaky_forward(module, system, label)
    return system


def _check_leaky_forward(module, system, label):
    """The module's own forward, called as cell(input, hidden), must match the closed form."""
    gen = torch.Generator().manual_seed(0)
    p = next(module.parameters(), None)
    wdt = p.dtype if p is not None else torch.float32
    x = torch.randn(3, system.input_size, generator=gen, dtype=torch.float64)
    h = 0.5 * torch.randn(3, system.state_size, generator=gen, dtype=torch.float64)
    probe = copy.deepcopy(module).eval()
    try:
        with torch.no_grad():
            out = probe(x.to(wdt), h.to(wdt))
    except Exception:  # noqa: BLE001 - a forward of another shape: the weights are what we use
        return
    out = _hidden_of(out, 3, system.state_size)
    if out is None:
        return
    ours = system.step(h.to(system.dtype), x.to(system.dtype)).to(torch.float64)
    err = (out.to(torch.float64) - ours).abs().max().item()
    if not err <= 1e-4 * (1 + ours.abs().max().item()):
        raise ValueError(
            f"{label} exposes leaky-RNN weights (weight_hh, weight_ih, alpha or dt/tau) but its "
            f"forward(input, hidden) differs from h' = (1 - a) h + a f(W h + U x + b) by "
            f"{err:.3g}; check nonlinearity= and the bias, turn its noise off in eval mode, or "
            "wrap it as a cell: wrap(module, state_size=H, input_size=I, order='input_first')")


def _hidden_of(out, B, S):
    """The new hidden state from a cell's output: a tensor, or the last of (output, hidden)."""
    if isinstance(out, (tuple, list)) and len(out) == 2:
        out = out[1]
    if isinstance(out, torch.Tensor) and tuple(out.shape) == (B, S):
        return out
    return None


_BUILTIN_NAMES = ("RNN", "GRU", "LSTM", "RNNCell", "GRUCell", "LSTMCell")


def _class_name(m: nn.Module) -> str | None:
    """"GRU", "LSTMCell", ... for torch's recurrent modules, scripted (TorchScript) ones too."""
    if isinstance(m, torch.jit.ScriptModule):
        name = getattr(m, "original_name", None)
        if name in _BUILTIN_NAMES and hasattr(m, "hidden_size"):
            return name
        return None
    for name, cls in (("LSTMCell", nn.LSTMCell), ("GRUCell", nn.GRUCell),
                      ("RNNCell", nn.RNNCell), ("LSTM", nn.LSTM), ("GRU", nn.GRU),
                      ("RNN", nn.RNN)):
        if isinstance(m, cls):
            return name
    return None


def _is_recurrent(m: nn.Module) -> bool:
    return isinstance(m, _RECURRENT_TYPES) or _class_name(m) is not None \
        or _is_leaky_module(m)


def _takes_two(module: nn.Module) -> bool:
    """True when the module's forward can be called with two positional arguments."""
    try:
        sig = inspect.signature(module.forward)
    except (TypeError, ValueError):
        return False
    pos = [p for p in sig.parameters.values()
           if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
    var = any(p.kind == p.VAR_POSITIONAL for p in sig.parameters.values())
    return len(pos) >= 2 or var


def find_recurrent(model: nn.Module, submodule: str | None, allow_cell: bool = False
                    ) -> tuple[nn.Module | None, str]:
    """The recurrent submodule to analyse; (None, "") when ``model`` itself is a custom cell."""
    if _is_recurrent(model) and submodule is None:
        return model, ""
    found = [(n, m) for n, m in model.named_modules() if _is_recurrent(m)]
    if submodule is not None:
        for n, m in found:
            if n == submodule:
                return m, n
        names = ", ".join(repr(n) for n, _ in found) or "none"
        raise ValueError(f"{type(model).__name__} has no recurrent submodule named "
                         f"{submodule!r}; recurrent submodules: {names}")
    if not found:
        if allow_cell and _takes_two(model) and _sizes_of(model) is not None:
            return None, ""
        raise ValueError(
            f"{type(model).__name__} contains no recurrent submodule (nn.RNN, nn.GRU, nn.LSTM, "
            "their cells, or a leaky RNN exposing weight_hh/weight_ih/alpha); for a cell of "
            "your own called as cell(input, hidden) use wrap(cell, state_size=H, input_size=I) "
            "or wrap(model, cell='name'); for a custom recurrence pass its step function: "
            "wrap(fn, state_size=S, input_size=I)"
        )
    if len(found) > 1:
        names = ", ".join(repr(n) for n, _ in found)
        raise ValueError(
            f"{type(model).__name__} contains {len(found)} recurrent submodules ({names}); pick "
            f"one with wrap(model, submodule={found[0][0]!r})"
        )
    return found[0][1], found[0][0]


def _sizes_of(module: nn.Module) -> tuple[int, int] | None:
    S, I = getattr(module, "hidden_size", None), getattr(module, "input_size", None)
    if isinstance(S, int) and isinstance(I, int) and not isinstance(S, bool):
        return S, I
    return None


# ---------------------------------------------------------------------- cells and step functions
_INPUT_NAMES = {"input", "inputs", "x", "x_t", "xt", "u", "u_t", "inp", "data"}
_STATE_NAMES = {"hidden", "h", "hx", "h_t", "ht", "h_prev", "state", "s", "s_prev", "prev",
                "hidden_state", "carry", "states", "z"}


def _arg_names(fn: Any) -> list[str]:
    target = fn.forward if isinstance(fn, nn.Module) else fn
    try:
        sig = inspect.signature(target)
    except (TypeError, ValueError):
        return []
    return [p.name for p in sig.parameters.values()
            if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)][:2]


def _order_from_names(fn: Any) -> str | None:
    names = [n.lower() for n in _arg_names(fn)]
    if len(names) < 2:
        return None
    if names[0] in _INPUT_NAMES and names[1] in _STATE_NAMES:
        return "input_first"
    if names[0] in _STATE_NAMES and names[1] in _INPUT_NAMES:
        return "state_first"
    return None


def _order_from_probe(fn: Any, S: int, I: int) -> str | None:
    """Call with both argument orders on zeros; the one order that gives (B, S) back decides."""
    if I == S:
        return None
    ok = []
    s, x = torch.zeros(2, S), torch.zeros(2, I)
    for order, args in (("state_first", (s, x)), ("input_first", (x, s))):
        try:
            with torch.no_grad(), warnings.catch_warnings():
                warnings.simplefilter("ignore")
                out = fn(*args)
        except Exception:  # noqa: BLE001 - a wrong order fails with whatever the code raises
            continue
        if _hidden_of(out, 2, S) is not None:
            ok.append(order)
    return ok[0] if len(ok) == 1 else None


def _decide_order(fn: Any, S: int, I: int, order: str | None, is_cell: bool, label: str) -> str:
    if order is not None:
        return order
    # probe only cells (deep copies in eval mode): a plain function may draw random numbers
    by_probe = _order_from_probe(fn, S, I) if is_cell else None
    if by_probe is not None:
        return by_probe
    by_name = _order_from_names(fn)
    if by_name is not None:
        return by_name
    if not is_cell:
        return "state_first"  # hiddenlens' own convention for plain functions
    names = ", ".join(_arg_names(fn)) or "?"
    raise ValueError(
        f"cannot tell the argument order of {label}({names}): input size equals state size "
        f"({S}) and the argument names do not say which is the input; pass "
        "order='input_first' for PyTorch's cell(input, hidden) or order='state_first' for "
        "fn(state, x)")


def _snapshot(fn: Any) -> tuple[Any, list[Any]]:
    """A copy of a step function with the modules and tensors it holds, and those held items."""
    if isinstance(fn, nn.Module):
        c = _copy_module(fn)
        return c, [c]
    if isinstance(fn, types.MethodType) and isinstance(fn.__self__, nn.Module):
        c = _copy_module(fn.__self__)
        return types.MethodType(fn.__func__, c), [c]
    if isinstance(fn, types.FunctionType) and fn.__closure__:
        held, cells = [], []
        for cell in fn.__closure__:
            try:
                value = cell.cell_contents
            except ValueError:  # an empty cell (a name assigned later)
                cells.append(cell)
                continue
            if isinstance(value, nn.Module):
                value = _copy_module(value)
                held.append(value)
                cells.append(types.CellType(value))
            elif isinstance(value, torch.Tensor):
                value = value.detach().clone()
                held.append(value)
                cells.append(types.CellType(value))
            else:
                cells.append(cell)
        if not held:
            return fn, []
        new = types.FunctionType(fn.__code__, fn.__globals__, fn.__name__, fn.__defaults__,
                                 tuple(cells))
        new.__kwdefaults__ = fn.__kwdefaults__
        new.__qualname__ = fn.__qualname__
        return new, held
    return fn, []


def _copy_module(module: nn.Module) -> nn.Module:
    try:
        c = copy.deepcopy(module)
    except Exception as err:  # noqa: BLE001 - any failure to copy is reported the same way
        raise TypeError(
            f"cannot copy the {type(module).__name__} to take a snapshot of its weights "
            f"({type(err).__name__}: {err}); wrap a step function that builds on a copyable "
            "module") from None
    c.eval()  # dropout off in the copy; the user's module keeps its own flag
    for p in c.parameters():
        p.requires_grad_(False)
    return c


def fingerprint_tensors(tensors: Any, label: str = "") -> str:
    """SHA-256 (first 16 hex digits) of a label and tensors' shapes, dtypes and bytes."""
    h = hashlib.sha256(label.encode())
    for t in tensors:
        if isinstance(t, nn.Module):
            for n, p in list(t.named_parameters()) + list(t.named_buffers()):
                _hash_tensor(h, n, p)
        else:
            _hash_tensor(h, "", t)
    return h.hexdigest()[:16]


def _hash_tensor(h, name: str, t: torch.Tensor) -> None:
    t = t.detach()
    h.update(f"{name}:{tuple(t.shape)}:{t.dtype}".encode())
    if t.device.type != "meta":
        h.update(t.cpu().contiguous().reshape(-1).view(torch.uint8).numpy())


def _wrap_cell_module(module, dtype, state_size, input_size, parts, order, name):
    sizes = _sizes_of(module)
    if state_size is None or input_size is None:
        if sizes is None:
            raise ValueError(
                f"{type(module).__name__} is taken as a cell called as cell(input, hidden) but "
                "its sizes are unknown (no hidden_size / input_size attributes); pass "
                "wrap(cell, state_size=H, input_size=I)")
        state_size = sizes[0] if state_size is None else state_size
        input_size = sizes[1] if input_size is None else input_size
    return _wrap_callable(module, dtype, state_size, input_size, parts,
                          name or type(module).__name__, order, is_cell=True)


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
    if not torch.is_floating_point(p):
        raise TypeError(f"parameter {attr} has dtype {str(p.dtype).replace('torch.', '')}; "
                        "recurrent weights must be floating-point: convert the model with "
                        "model.float() or model.double() before wrapping it")
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
    name = _class_name(module)
    if name in ("LSTM", "LSTMCell"):
        return "lstm"
    if name in ("GRU", "GRUCell"):
        return "gru"
    if name in ("RNN", "RNNCell"):
        return "rnn_relu" if getattr(module, "nonlinearity", "tanh") == "relu" else "rnn_tanh"
    raise ValueError(f"unsupported recurrent module {type(module).__name__}; supported: nn.RNN, "
                     "nn.GRU, nn.LSTM, nn.RNNCell, nn.GRUCell, nn.LSTMCell (scripted too)")


def _wrap_module(module, dtype, direction, *, source, path, model, layer=None):
    kind = _module_kind(module)
    label = f"{_class_name(module)}" + (f" '{path}'" if path else "")
    if isinstance(module, torch.jit.ScriptModule):
        label = f"scripted {label}"
    if _class_name(module).endswith("Cell"):
        if direction is not None:
            raise ValueError(f"{label} is a cell, which has one direction; drop direction=")
        if layer not in (None, 0):
            raise ValueError(f"{label} is a cell, which has one layer; drop layer=")
        names = [("weight_ih", "weight_hh", "bias_ih", "bias_hh")]
        layer_ids, suffix = [0], ""
    else:
        num_layers = module.num_layers
        suffix = ""
        if layer is not None and (isinstance(layer, bool) or not isinstance(layer, int)
                                  or not -num_layers <= layer < num_layers):
            raise ValueError(f"layer must be an integer in 0 .. {num_layers - 1} (the layers of "
                             f"{label}), got {layer!r}")
        if layer is not None:
            layer %= num_layers
        if module.bidirectional:
            if direction not in ("forward", "backward"):
                which = "" if num_layers == 1 else (
                    f" and, for its {num_layers} layers, the layer with layer=k (default: the "
                    f"top layer, {num_layers - 1}; each layer above the first reads both "
                    "directions of the layer below, which a front end of the lower layers "
                    "computes)")
                raise ValueError(
                    f"{label} is bidirectional; pick the direction to analyse with "
                    "wrap(model, direction='forward') or direction='backward' (the backward "
                    f"direction runs from the last step to the first){which}"
                )
            suffix = "_reverse" if direction == "backward" else ""
            if layer is None and num_layers > 1:
                layer = num_layers - 1
        elif direction not in (None, "forward"):
            raise ValueError(f"{label} is not bidirectional; direction={direction!r} does not "
                             "apply (drop it)")
        layer_ids = list(range(num_layers)) if layer is None else [layer]
        names = [(f"weight_ih_l{k}{suffix}", f"weight_hh_l{k}{suffix}",
                  f"bias_ih_l{k}{suffix}", f"bias_hh_l{k}{suffix}") for k in layer_ids]
    has_bias = bool(module.bias)
    H = module.hidden_size
    P = int(getattr(module, "proj_size", 0) or 0)  # LSTM projection: h has P units, c has H
    layers, parts, start = [], {}, 0
    for k, (wi, wh, bi, bh) in zip(layer_ids, names, strict=True):
        h = slice(start, start + (P or H))
        start += P or H
        c = None
        if kind == "lstm":
            c = slice(start, start + H)
            start += H
        w_ih = _weight(module, wi, dtype)
        layers.append(LayerWeights(
            kind=kind, input_size=w_ih.shape[1], hidden_size=H, w_ih=w_ih,
            w_hh=_weight(module, wh, dtype),
            b_ih=_weight(module, bi, dtype) if has_bias else None,
            b_hh=_weight(module, bh, dtype) if has_bias else None, h=h, c=c,
            w_hr=_weight(module, wh.replace("weight_hh", "weight_hr"), dtype) if P else None))
        parts[f"layer{k}.h"] = h
        if c is not None:
            parts[f"layer{k}.c"] = c
    system = RecurrentSystem(
        state_size=start, input_size=layers[0].input_size, parts=parts, dtype=dtype, kind=kind,
        source=source, fingerprint=fingerprint(model), layers=tuple(layers),
        time_reversed=suffix == "_reverse", model=model,
    )
    system.direction = direction if direction is not None else (
        "forward" if getattr(module, "bidirectional", False) else None)
    system.layer_index = layer_ids[0] if len(layer_ids) == 1 and layer is not None else None
    if layer_ids[0] > 0:
        # the layers below, run by torch over the whole sequence, feed this one
        system.front = _lower_layers(module, kind, layer_ids[0], dtype)
        system.front_name = f"layers 0..{layer_ids[0] - 1} of {label}"
    return system


class LowerLayers(nn.Module):
    """The first layers of a stacked module (both directions), returning their output (B, T, .).

    The front end of one layer of a stack: a private copy built from the module's weights, in
    eval mode, batch first, in the analysis' precision.
    """

    def __init__(self, stack: nn.Module) -> None:
        super().__init__()
        self.stack = stack

    def forward(self, x: torch.Tensor, lengths: list[int] | None = None) -> torch.Tensor:
        p = next(self.stack.parameters())
        x = x.to(p.dtype)
        with warnings.catch_warnings():
            # torch notes that its oneDNN path lacks projections and takes its own: no action
            warnings.filterwarnings("ignore", message=".*projections is not supported.*")
            if lengths is None:
                return self.stack(x)[0]
            # each sequence on its own length: the backward direction starts at its last real
            # step, as for a packed batch (padded steps come out as zeros)
            packed = nn.utils.rnn.pack_padded_sequence(
                x, torch.as_tensor(lengths), batch_first=True, enforce_sorted=False)
            out = self.stack(packed)[0]
            return nn.utils.rnn.pad_packed_sequence(out, batch_first=True,
                                                    total_length=x.shape[1])[0]


def _lower_layers(module: nn.Module, kind: str, n: int, dtype: torch.dtype) -> nn.Module:
    name = _class_name(module)
    cls = {"LSTM": nn.LSTM, "GRU": nn.GRU, "RNN": nn.RNN}[name]
    kw: dict[str, Any] = {"num_layers": n, "bias": bool(module.bias), "batch_first": True,
                          "bidirectional": bool(module.bidirectional), "dtype": dtype}
    if name == "RNN":
        kw["nonlinearity"] = "relu" if kind == "rnn_relu" else "tanh"
    if name == "LSTM" and int(getattr(module, "proj_size", 0) or 0):
        kw["proj_size"] = int(module.proj_size)
    # built on the meta device, so no initialisation draws from torch's global generator
    stack = cls(module.input_size, module.hidden_size, device="meta", **kw).to_empty(
        device="cpu")
    with torch.no_grad():
        for pname, p in stack.named_parameters():
            p.copy_(_weight(module, pname, dtype))
    stack.eval()
    for p in stack.parameters():
        p.requires_grad_(False)
    return LowerLayers(stack).eval()


def _wrap_callable(fn, dtype, state_size, input_size, parts, name, order=None, is_cell=False):
    if state_size is None or input_size is None:
        raise ValueError(
            "a step function needs its sizes: wrap(fn, state_size=S, input_size=I) "
            "(input_size=0 for an autonomous map)"
        )
    for arg, val, low in (("state_size", state_size, 1), ("input_size", input_size, 0)):
        if isinstance(val, bool) or not isinstance(val, numbers.Integral) or val < low:
            raise ValueError(f"{arg} must be an integer >= {low}, got {val!r}")
    state_size, input_size = int(state_size), int(input_size)  # numpy integers too
    parts = dict(parts) if parts else {"state": slice(0, state_size)}
    for pname, sl in parts.items():
        if not isinstance(sl, slice) or sl.step not in (None, 1):
            raise ValueError(f"part {pname!r} must be a contiguous slice, got {sl!r}")
        lo = 0 if sl.start is None else sl.start
        hi = state_size if sl.stop is None else sl.stop
        if not (isinstance(lo, numbers.Integral) and isinstance(hi, numbers.Integral)
                and not isinstance(lo, bool) and not isinstance(hi, bool)
                and 0 <= lo < hi <= state_size):
            raise ValueError(f"part {pname!r} = {sl!r} lies outside the state of size "
                             f"{state_size}")
        parts[pname] = slice(int(lo), int(hi))
    source = name or getattr(fn, "__name__", type(fn).__name__)
    is_cell = is_cell or isinstance(fn, nn.Module)
    snap, held = _snapshot(fn)
    chosen = _decide_order(snap, state_size, input_size, order, is_cell, source)
    step = _adapt(snap, chosen, unpack=is_cell or chosen == "input_first")
    label = getattr(fn, "__qualname__", type(fn).__qualname__)
    system = RecurrentSystem(
        state_size=state_size, input_size=input_size, parts=parts, dtype=dtype,
        kind="callable", source=source, fingerprint=fingerprint_tensors(held, label),
        step_fn=step, model=snap if isinstance(snap, nn.Module) else None,
    )
    system.order = chosen
    return system


def _adapt(fn, order: str, unpack: bool) -> StepFn:
    """A step ``(state, x) -> state`` from a function in either order; a cell's (out, h) -> h."""
    if order == "state_first" and not unpack:
        return fn

    def step(state: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
        out = fn(x, state) if order == "input_first" else fn(state, x)
        if unpack and isinstance(out, (tuple, list)):
            if len(out) == 2 and isinstance(out[1], torch.Tensor):
                return out[1]
            raise TypeError(
                f"the cell returned a {type(out).__name__} of {len(out)} items; hiddenlens "
                "takes a cell returning its new hidden state, or (output, hidden) with hidden "
                "one tensor of shape (B, S); wrap a step function that concatenates tuple "
                "states (e.g. h and c) into one flat state")
        return out

    step.__name__ = getattr(fn, "__name__", type(fn).__name__)
    return step
