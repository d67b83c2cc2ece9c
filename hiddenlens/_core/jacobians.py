"""Per-step Jacobians of a recurrent system: d s_t / d s_{t-1} and d s_t / d x_t.

This module is the one place that computes step Jacobians; every analysis that needs them
(spectra, gradient flow, Lyapunov exponents, fixed-point stability, input sensitivity) calls it.
Module-backed systems (``nn.RNN``/``GRU``/``LSTM`` and their cells) use closed forms; any other
system uses torch.func transforms batched over all requested states at once.
"""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
import torch.nn.functional as F
from torch.func import jacrev, jvp, vjp, vmap

from .systems import LayerWeights, RecurrentSystem, refuse_random_steps
from .threads import single_thread
from .validation import as_dtype

if TYPE_CHECKING:  # the aliases of the public signatures
    from .aliases import ModelLike
    from .trace import Trace

__all__ = [
    "StepLinearization",
    "input_jacobians",
    "jacobians",
    "linearize",
    "step_jacobians",
    "step_jvp",
    "step_vjp",
]

# Elements per block of the closed-form writer: one block of Jacobians stays in a core's L2 cache
# while its gate terms are summed into it, so the result is written to memory about once.
_CACHE_ELEMENTS = 1 << 18


def _per_sample(system: RecurrentSystem):
    # the step works on batches (B, S); give it a batch of one so any step function fits vmap
    def f(s: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
        return system.step(s.unsqueeze(0), x.unsqueeze(0)).squeeze(0)

    return f


def _needs_autograd(*tensors: torch.Tensor) -> bool:
    return torch.is_grad_enabled() and any(t.requires_grad for t in tensors)


def step_jacobians(system: RecurrentSystem, prev: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    """State Jacobians J = dF/ds at states ``prev`` (N, S) with inputs ``x`` (N, I): (N, S, S).

    Closed form for module-backed systems; torch.func ``vmap(jacrev)`` otherwise (and whenever
    ``prev`` or ``x`` requires grad, so that the result stays differentiable).
    """
    if system.layers and not _needs_autograd(prev, x):
        return linearize(system, prev, x).dense()
    return vmap(jacrev(_per_sample(system), argnums=0))(prev, x)


def input_jacobians(system: RecurrentSystem, prev: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    """Input Jacobians dF/dx at states ``prev`` (N, S) with inputs ``x`` (N, I): (N, S, I)."""
    if system.layers and not _needs_autograd(prev, x):
        return linearize(system, prev, x).input_dense()
    return vmap(jacrev(_per_sample(system), argnums=1))(prev, x)


def step_jvp(system: RecurrentSystem, prev: torch.Tensor, x: torch.Tensor,
             tangents: torch.Tensor) -> torch.Tensor:
    """J @ V for the state Jacobians at (``prev`` (N, S), ``x`` (N, I)); V (N, S, k) -> (N, S, k).

    No Jacobian is formed: closed forms apply the gate weights to V directly (a few GEMMs over
    all N * k vectors), other systems use ``torch.func.jvp``.
    """
    return linearize(system, prev, x).jvp(tangents)


def step_vjp(system: RecurrentSystem, prev: torch.Tensor, x: torch.Tensor,
             cotangents: torch.Tensor) -> torch.Tensor:
    """J^T @ W for the state Jacobians at (``prev``, ``x``); W (N, S, k) -> (N, S, k)."""
    return linearize(system, prev, x).vjp(cotangents)


def linearize(system: RecurrentSystem, prev: torch.Tensor, x: torch.Tensor, *,
              dtype: torch.dtype | None = None) -> StepLinearization:
    """The derivative of one step at N (state, input) pairs, to apply (JVP/VJP) or write out.

    Parameters
    ----------
    system : RecurrentSystem
    prev : Tensor of shape (N, S)
        States before the step.
    x : Tensor of shape (N, I)
        Inputs of the step.
    dtype : torch.dtype, optional
        Precision of the computation (default: the system's). Closed forms honour it by using
        weight copies in that precision; a step function always runs in its own precision.

    Returns
    -------
    StepLinearization
        ``.new_state`` (N, S) is the step's output F(prev, x); ``.dtype`` the precision used.
    """
    if system.layers:
        return _ClosedForm(system, prev, x, dtype or system.dtype)
    return _Autograd(system, prev.to(system.dtype), x.to(system.dtype))


class StepLinearization:
    """The linear map ds_t = J ds_{t-1} (+ K dx_t) of one step at N points.

    Attributes
    ----------
    new_state : Tensor of shape (N, S)
        F(prev, x), the state after the step.
    """

    new_state: torch.Tensor
    dtype: torch.dtype

    def select(self, index: torch.Tensor) -> StepLinearization:
        """The linearisation at a subset of the N points (``index`` into the first axis)."""
        raise NotImplementedError

    def jvp(self, tangents: torch.Tensor) -> torch.Tensor:
        """J @ V: (N, S, k) -> (N, S, k)."""
        raise NotImplementedError

    def vjp(self, cotangents: torch.Tensor) -> torch.Tensor:
        """J^T @ W: (N, S, k) -> (N, S, k)."""
        raise NotImplementedError

    def input_jvp(self, tangents: torch.Tensor) -> torch.Tensor:
        """K @ U for input tangents U (N, I, k) -> (N, S, k)."""
        raise NotImplementedError

    def input_vjp(self, cotangents: torch.Tensor) -> torch.Tensor:
        """K^T @ W for cotangents W (N, S, k) -> (N, I, k)."""
        raise NotImplementedError

    def dense(self, out: torch.Tensor | None = None) -> torch.Tensor:
        """The state Jacobians J, (N, S, S), written into ``out`` when given."""
        raise NotImplementedError

    def input_dense(self, out: torch.Tensor | None = None) -> torch.Tensor:
        """The input Jacobians K = dF/dx, (N, S, I)."""
        raise NotImplementedError


# ---------------------------------------------------------------------- torch.func fallback
def _batched_jvp(f, primal: torch.Tensor, tangents: torch.Tensor) -> torch.Tensor:
    """J v for a block of tangents (N, ., p), with f batched over N: one jvp per column."""
    def one(v: torch.Tensor) -> torch.Tensor:
        return jvp(f, (primal,), (v,))[1]

    with warnings.catch_warnings():
        # torch's first forward-mode call scripts its decompositions and warns about
        # torch.jit.script itself; nothing the caller can act on
        warnings.filterwarnings("ignore", message=r".*torch\.jit\.script.*",
                                category=DeprecationWarning)
        return vmap(one, in_dims=2, out_dims=2)(tangents.to(primal.dtype))


def _batched_vjp(f, primal: torch.Tensor, cotangents: torch.Tensor) -> torch.Tensor:
    """J^T w for a block of cotangents (N, S, p): one pull-back, vmapped over the columns."""
    _, pull = vjp(f, primal)

    def one(w: torch.Tensor) -> torch.Tensor:
        return pull(w)[0]

    return vmap(one, in_dims=2, out_dims=2)(cotangents.to(primal.dtype))


class _Autograd(StepLinearization):
    """Any step function: transforms of the batched step (samples are independent)."""

    def __init__(self, system: RecurrentSystem, prev: torch.Tensor, x: torch.Tensor) -> None:
        self.system, self.prev, self.x = system, prev, x
        self.dtype = system.dtype
        with torch.no_grad():
            self.new_state = system.step(prev, x)

    def select(self, index: torch.Tensor) -> StepLinearization:
        return _Autograd(self.system, self.prev[index], self.x[index])

    def _f(self, s: torch.Tensor) -> torch.Tensor:
        return self.system.step(s, self.x)

    def jvp(self, tangents: torch.Tensor) -> torch.Tensor:
        return _batched_jvp(self._f, self.prev, tangents)

    def vjp(self, cotangents: torch.Tensor) -> torch.Tensor:
        return _batched_vjp(self._f, self.prev, cotangents)

    def _g(self, x: torch.Tensor) -> torch.Tensor:
        return self.system.step(self.prev, x)

    def input_jvp(self, tangents: torch.Tensor) -> torch.Tensor:
        return _batched_jvp(self._g, self.x, tangents)

    def input_vjp(self, cotangents: torch.Tensor) -> torch.Tensor:
        return _batched_vjp(self._g, self.x, cotangents)

    def dense(self, out: torch.Tensor | None = None) -> torch.Tensor:
        J = vmap(jacrev(_per_sample(self.system), argnums=0))(self.prev, self.x)
        return J if out is None else out.copy_(J)

    def input_dense(self, out: torch.Tensor | None = None) -> torch.Tensor:
        K = vmap(jacrev(_per_sample(self.system), argnums=1))(self.prev, self.x)
        return K if out is None else out.copy_(K)


# ---------------------------------------------------------------------- closed forms
# NOTE: [Closed-form step Jacobians]
# Every supported cell computes gate pre-activations a = W_ih u + b_ih + W_hh h + b_hh, stacked as
# G blocks of H rows (PyTorch's order: GRU r, z, n; LSTM i, f, g, o). Each output row i depends on
# the pre-activations of row i of every gate only, so
#     dh'/dh = diag(d_h) + sum_g diag(a_hh[g]) W_hh[g],   dh'/du = sum_g diag(a_ih[g]) W_ih[g],
# with per-sample coefficient vectors a (N, G, H) and an optional diagonal d_h (N, H):
#   tanh RNN  a = 1 - h'^2;  relu RNN  a = [pre > 0]
#   leaky     h' = (1 - alpha) h + alpha f(pre): a = alpha f'(pre), d_h = 1 - alpha
#             (f' = 1 - f^2 for tanh, [pre > 0] for relu, sigmoid(pre) for softplus)
#   GRU       n = tanh(i_n + r * (W_hn h + b_hn)), h' = (1 - z) n + z h:
#             a_r = (1-z)(1-n^2) (W_hn h + b_hn) r(1-r),  a_z = (h - n) z(1-z),
#             a_n = (1-z)(1-n^2) r  for W_hh (r multiplies W_hn h)  but  (1-z)(1-n^2)  for W_ih;
#             d_h = z
#   LSTM      c' = f c + i g, h' = o tanh(c'), with k = o (1 - tanh^2 c'):
#             c' rows: a = (g i(1-i), c f(1-f), i(1-g^2), 0),  dc'/dc = diag(f)
#             h' rows: a = k * (c' coefficients) except a_o = tanh(c') o(1-o),  dh'/dc = diag(k f)
#             with proj_size: h' = W_hr m, so the h' rows above (those of m) are left-multiplied
#             by W_hr: dh'/dh = W_hr (sum_g diag(a_g) W_hh[g]), dh'/dc = W_hr diag(k f)
# Within one step layer l reads layer l-1's new h as its input u, so by the chain rule the rows of
# layer l are its own block plus (dh'_l/du) @ (rows of layer l-1's h), which fills the blocks below
# the diagonal; blocks above it are zero.
class _LayerTerms:
    """Coefficients of one layer at N points (see NOTE: [Closed-form step Jacobians])."""

    _FIELDS = ("a_hh", "a_ih", "c_hh", "d_h", "d_hc", "d_cc", "h_new", "c_new")

    def __init__(self, layer: LayerWeights, u: torch.Tensor, h: torch.Tensor,
                 c: torch.Tensor | None, dtype: torch.dtype) -> None:
        H, kind = layer.hidden_size, layer.kind
        G = {"rnn_tanh": 1, "rnn_relu": 1, "gru": 3, "lstm": 4, "leaky": 1}[kind]
        self.layer = layer
        self.hidden_size = H
        # weights in the working precision (no copy when it is the system's own)
        self.w_ih, self.w_hh = layer.w_ih.to(dtype), layer.w_hh.to(dtype)
        b_ih = None if layer.b_ih is None else layer.b_ih.to(dtype)
        b_hh = None if layer.b_hh is None else layer.b_hh.to(dtype)
        self.W_hh = self.w_hh.view(G, H, -1)  # (G, H, H or proj_size)
        self.w_hr = None if layer.w_hr is None else layer.w_hr.to(dtype)  # (P, H)
        self.W_ih = self.w_ih.view(G, H, layer.input_size)
        self.d_h = self.d_hc = self.d_cc = None
        self.c_hh = None  # LSTM c' rows, gates i, f, g
        gi = F.linear(u, self.w_ih, b_ih)  # (N, G*H)
        gh = F.linear(h, self.w_hh, b_hh)  # (N, G*H)
        if kind == "leaky":
            pre = gi + gh
            alpha = layer.alpha.to(dtype)
            if layer.nonlinearity == "tanh":
                act = torch.tanh(pre)
                slope = 1 - act * act
            elif layer.nonlinearity == "relu":
                act = torch.relu(pre)
                slope = (pre > 0).to(pre.dtype)  # relu'(0) = 0 as in PyTorch's backward
            else:
                act = F.softplus(pre)
                # softplus' = sigmoid, and 1 where torch's softplus turns linear (pre > 20)
                slope = torch.where(pre > 20, torch.ones_like(pre), torch.sigmoid(pre))
            self.h_new = (1 - alpha) * h + alpha * act
            a = (alpha * slope).unsqueeze(1)  # (N, 1, H)
            self.a_hh, self.a_ih = a, a
            self.d_h = (1 - alpha).expand_as(h)
            self.c_new = None
        elif kind == "rnn_tanh":
            h_new = torch.tanh(gi + gh)
            a = (1 - h_new * h_new).unsqueeze(1)  # (N, 1, H)
            self.h_new, self.a_hh, self.a_ih = h_new, a, a
            self.c_new = None
        elif kind == "rnn_relu":
            pre = gi + gh
            h_new = torch.relu(pre)
            a = (pre > 0).to(pre.dtype).unsqueeze(1)  # relu'(0) = 0 as in PyTorch's backward
            self.h_new, self.a_hh, self.a_ih = h_new, a, a
            self.c_new = None
        elif kind == "gru":
            i_r, i_z, i_n = gi.chunk(3, dim=-1)
            h_r, h_z, h_n = gh.chunk(3, dim=-1)
            r = torch.sigmoid(i_r + h_r)
            z = torch.sigmoid(i_z + h_z)
            n = torch.tanh(i_n + r * h_n)
            self.h_new = (1 - z) * n + z * h
            self.c_new = None
            a_n = (1 - z) * (1 - n * n)  # (N, H)
            a_r = a_n * h_n * r * (1 - r)
            a_z = (h - n) * z * (1 - z)
            self.a_hh = torch.stack([a_r, a_z, a_n * r], dim=1)  # (N, 3, H)
            self.a_ih = torch.stack([a_r, a_z, a_n], dim=1)  # (N, 3, H)
            self.d_h = z
        else:
            pre = gi + gh
            si = torch.sigmoid(pre[:, :H])
            sf = torch.sigmoid(pre[:, H:2 * H])
            tg = torch.tanh(pre[:, 2 * H:3 * H])
            so = torch.sigmoid(pre[:, 3 * H:])
            c_new = sf * c + si * tg
            tc = torch.tanh(c_new)
            self.h_new, self.c_new = so * tc, c_new
            if self.w_hr is not None:  # projection: h' = W_hr m with m = o tanh(c')
                self.h_new = F.linear(self.h_new, self.w_hr)
            k = so * (1 - tc * tc)
            cc = torch.stack([tg * si * (1 - si), c * sf * (1 - sf), si * (1 - tg * tg)], dim=1)
            self.c_hh = cc  # (N, 3, H): c' rows, gates i, f, g
            self.a_hh = torch.cat([k.unsqueeze(1) * cc, (tc * so * (1 - so)).unsqueeze(1)],
                                  dim=1)  # (N, 4, H): h' rows
            self.a_ih = self.a_hh
            self.d_hc = k * sf  # dh'/dc
            self.d_cc = sf  # dc'/dc

    def select(self, index: torch.Tensor) -> _LayerTerms:
        new = object.__new__(_LayerTerms)
        new.__dict__.update(self.__dict__)
        for name in self._FIELDS:
            v = getattr(self, name)
            if v is not None:
                setattr(new, name, v[index])
        if self.a_ih is self.a_hh:
            new.a_ih = new.a_hh
        return new

    # --- apply to row-vector blocks: arrays (N, k, H) -----------------------------------
    def forward_local(self, v_h, v_c, du):
        """Tangents of (h', c') from tangents of (h, c) and of the input u (None = zero)."""
        G, H = self.a_hh.shape[1], self.hidden_size
        N, k = (v_h if v_h is not None else du).shape[:2]
        # gate pre-activation tangents of the h path and of the input path, (N, k, G, H)
        pre = F.linear(v_h, self.w_hh).view(N, k, G, H) if v_h is not None else None
        pin = F.linear(du, self.w_ih).view(N, k, G, H) if du is not None else None
        if self.a_ih is self.a_hh and pre is not None and pin is not None:
            pre, pin = pre + pin, None  # same coefficients: add before scaling
        out_h = 0
        out_c = 0
        for p, a in ((pre, self.a_hh), (pin, self.a_ih)):
            if p is None:
                continue
            out_h = out_h + (p * a.unsqueeze(1)).sum(2)  # (N, k, H)
            if self.c_new is not None:
                out_c = out_c + (p[:, :, :3] * self.c_hh.unsqueeze(1)).sum(2)
        if v_h is not None and self.d_h is not None:
            out_h = out_h + self.d_h.unsqueeze(1) * v_h
        if self.c_new is None:
            return out_h, None
        if v_c is not None:
            out_h = out_h + self.d_hc.unsqueeze(1) * v_c
            out_c = out_c + self.d_cc.unsqueeze(1) * v_c
        if self.w_hr is not None:
            out_h = F.linear(out_h, self.w_hr)  # tangent of m -> of h' = W_hr m
        return out_h, out_c

    def backward_local(self, w_h, w_c, need_input: bool):
        """Cotangents of (h, c) and of the input u from cotangents of (h', c')."""
        G, H = self.a_hh.shape[1], self.hidden_size
        N, k = w_h.shape[:2]
        if self.w_hr is not None:
            w_h = torch.matmul(w_h, self.w_hr)  # cotangent of h' = W_hr m -> of m, (N, k, H)
        g_hh = self.a_hh.unsqueeze(1) * w_h.unsqueeze(2)  # (N, k, G, H)
        if self.c_new is not None:
            g_hh[:, :, :3] += self.c_hh.unsqueeze(1) * w_c.unsqueeze(2)
        gb_h = torch.matmul(g_hh.reshape(N, k, G * H), self.w_hh)  # (N, k, H)
        gb_c = None
        if self.d_h is not None:
            gb_h += self.d_h.unsqueeze(1) * w_h
        if self.c_new is not None:
            gb_c = self.d_hc.unsqueeze(1) * w_h + self.d_cc.unsqueeze(1) * w_c
        gb_u = None
        if need_input:
            g_ih = g_hh if self.a_ih is self.a_hh else self.a_ih.unsqueeze(1) * w_h.unsqueeze(2)
            gb_u = torch.matmul(g_ih.reshape(N, k, G * H), self.w_ih)  # (N, k, I_l)
        return gb_h, gb_c, gb_u

    # --- dense blocks -------------------------------------------------------------------
    def write_local(self, out: torch.Tensor, rows: slice, cols: slice, a: torch.Tensor,
                    W: torch.Tensor, diag: torch.Tensor | None) -> None:
        """out[:, rows, cols] = sum_g diag(a[:, g]) W[g] (+ diag(diag)), in cache-sized blocks."""
        R, K = W.shape[1], W.shape[2]
        step = max(1, _CACHE_ELEMENTS // max(R * K, 1))
        G = a.shape[1]
        with single_thread():  # memory-bound blocks: a second thread adds no bandwidth
            self._write_blocks(out, rows, cols, a, W, diag, step, G)

    @staticmethod
    def _write_blocks(out, rows, cols, a, W, diag, step, G):
        for n0 in range(0, out.shape[0], step):
            o = out[n0:n0 + step, rows, cols]  # (n, R, K)
            aa = a[n0:n0 + step]
            torch.mul(aa[:, 0, :, None], W[0], out=o)
            for g in range(1, G):
                o.addcmul_(aa[:, g, :, None], W[g])
            if diag is not None:
                o.diagonal(dim1=1, dim2=2).add_(diag[n0:n0 + step])


def _write_diag(out: torch.Tensor, rows: slice, cols: slice, diag: torch.Tensor) -> None:
    o = out[:, rows, cols]
    o.zero_()
    o.diagonal(dim1=1, dim2=2).copy_(diag)


class _ClosedForm(StepLinearization):
    """Module-backed systems: gate coefficients per layer, applied or written without autograd."""

    def __init__(self, system: RecurrentSystem, prev: torch.Tensor, x: torch.Tensor,
                 dtype: torch.dtype) -> None:
        self.system = system
        self.dtype = dtype
        prev = prev.detach().to(dtype)
        x = x.detach().to(dtype)
        self.N = prev.shape[0]
        terms = []
        new = []
        u = x
        with torch.no_grad():
            for layer in system.layers:
                c = prev[:, layer.c] if layer.c is not None else None
                t = _LayerTerms(layer, u, prev[:, layer.h], c, dtype)
                terms.append(t)
                new.append(t.h_new)
                if t.c_new is not None:
                    new.append(t.c_new)
                u = t.h_new
            self.new_state = torch.cat(new, dim=-1)
        self.terms = terms

    def select(self, index: torch.Tensor) -> StepLinearization:
        new = object.__new__(_ClosedForm)
        new.system, new.dtype = self.system, self.dtype
        new.terms = [t.select(index) for t in self.terms]
        new.new_state = self.new_state[index]
        new.N = new.new_state.shape[0]
        return new

    # --- JVP / VJP on (N, S, k) ------------------------------------------------------------
    def _forward(self, V: torch.Tensor | None, U: torch.Tensor | None) -> torch.Tensor:
        """Tangent of the new state from a state tangent V (N, k, S) and input tangent U."""
        rows = V if V is not None else U
        N, k = rows.shape[:2]
        dtype = self.dtype
        out = torch.empty(N, k, self.system.state_size, dtype=dtype)
        du = U
        for t in self.terms:
            layer = t.layer
            v_h = v_c = None
            if V is not None:
                v_h = V[:, :, layer.h]
                v_c = V[:, :, layer.c] if layer.c is not None else None
            o_h, o_c = t.forward_local(v_h, v_c, du)
            out[:, :, layer.h] = o_h
            if o_c is not None:
                out[:, :, layer.c] = o_c
            du = o_h
        return out

    def _backward(self, W: torch.Tensor, need_state: bool, need_input: bool):
        """Cotangents of the previous state (N, k, S) and of the input (N, k, I)."""
        N, k = W.shape[:2]
        grad_s = torch.empty(N, k, self.system.state_size, dtype=self.dtype) \
            if need_state else None
        carry = None  # cotangent flowing into the layer below through its new h
        gb_u = None
        for li in range(len(self.terms) - 1, -1, -1):
            t = self.terms[li]
            layer = t.layer
            w_h = W[:, :, layer.h]
            if carry is not None:
                w_h = w_h + carry
            w_c = W[:, :, layer.c] if layer.c is not None else None
            gb_h, gb_c, gb_u = t.backward_local(w_h, w_c, li > 0 or need_input)
            if grad_s is not None:
                grad_s[:, :, layer.h] = gb_h
                if gb_c is not None:
                    grad_s[:, :, layer.c] = gb_c
            carry = gb_u
        return grad_s, gb_u

    def jvp(self, tangents: torch.Tensor) -> torch.Tensor:
        V = tangents.to(self.dtype).transpose(1, 2)  # (N, k, S)
        return self._forward(V, None).transpose(1, 2)

    def vjp(self, cotangents: torch.Tensor) -> torch.Tensor:
        W = cotangents.to(self.dtype).transpose(1, 2)  # (N, k, S)
        return self._backward(W, True, False)[0].transpose(1, 2)

    def input_jvp(self, tangents: torch.Tensor) -> torch.Tensor:
        """K @ U for input tangents U (N, I, k) -> (N, S, k)."""
        U = tangents.to(self.dtype).transpose(1, 2)  # (N, k, I)
        return self._forward(None, U).transpose(1, 2)

    def input_vjp(self, cotangents: torch.Tensor) -> torch.Tensor:
        """K^T @ W for cotangents W (N, S, k) -> (N, I, k)."""
        W = cotangents.to(self.dtype).transpose(1, 2)
        return self._backward(W, False, True)[1].transpose(1, 2)

    # --- dense ----------------------------------------------------------------------------
    def dense(self, out: torch.Tensor | None = None) -> torch.Tensor:
        S = self.system.state_size
        if out is None:
            out = torch.empty(self.N, S, S, dtype=self.dtype)
        prev_h = None  # rows of the previous layer's h
        for t in self.terms:
            layer = t.layer
            lo = layer.h.start
            hi = layer.c.stop if layer.c is not None else layer.h.stop
            if hi < S:
                out[:, lo:hi, hi:].zero_()
            if t.c_new is None:
                t.write_local(out, layer.h, layer.h, t.a_hh, t.W_hh, t.d_h)
            elif t.w_hr is not None:
                M = torch.empty(self.N, t.hidden_size, t.W_hh.shape[2], dtype=self.dtype)
                t.write_local(M, slice(None), slice(None), t.a_hh, t.W_hh, None)  # dm/dh
                out[:, layer.h, layer.h] = torch.matmul(t.w_hr, M)
                t.write_local(out, layer.c, layer.h, t.c_hh, t.W_hh[:3], None)
                out[:, layer.h, layer.c] = t.w_hr * t.d_hc.unsqueeze(1)  # W_hr diag(k f)
                _write_diag(out, layer.c, layer.c, t.d_cc)
            else:
                t.write_local(out, layer.h, layer.h, t.a_hh, t.W_hh, None)
                t.write_local(out, layer.c, layer.h, t.c_hh, t.W_hh[:3], None)
                _write_diag(out, layer.h, layer.c, t.d_hc)
                _write_diag(out, layer.c, layer.c, t.d_cc)
            if prev_h is not None:
                # rows of the layer below cover every column before this layer's own (lo)
                D = self._input_block(t)  # (N, R, H_prev)
                out[:, lo:hi, :lo] = torch.bmm(D, out[:, prev_h, :lo])
            prev_h = layer.h
        return out

    def _input_block(self, t: _LayerTerms) -> torch.Tensor:
        """d(h', c')/du of one layer, (N, R, I_l): R = H, or 2H with the LSTM cell rows."""
        layer = t.layer
        H = layer.hidden_size
        P = layer.h.stop - layer.h.start  # H, or proj_size
        R = P + H if t.c_new is not None else H
        D = torch.empty(self.N, R, layer.input_size, dtype=self.dtype)
        if t.w_hr is None:
            t.write_local(D, slice(0, H), slice(None), t.a_ih, t.W_ih, None)
        else:
            M = torch.empty(self.N, H, layer.input_size, dtype=self.dtype)
            t.write_local(M, slice(None), slice(None), t.a_ih, t.W_ih, None)  # dm/du
            D[:, :P] = torch.matmul(t.w_hr, M)
        if t.c_new is not None:
            t.write_local(D, slice(P, R), slice(None), t.c_hh, t.W_ih[:3], None)
        return D

    def input_dense(self, out: torch.Tensor | None = None) -> torch.Tensor:
        S, I = self.system.state_size, self.system.input_size
        if out is None:
            out = torch.empty(self.N, S, I, dtype=self.dtype)
        prev_h = None
        for t in self.terms:
            layer = t.layer
            lo = layer.h.start
            hi = layer.c.stop if layer.c is not None else layer.h.stop
            D = self._input_block(t)
            if prev_h is None:
                out[:, lo:hi] = D
            else:
                out[:, lo:hi] = torch.bmm(D, out[:, prev_h])
            prev_h = layer.h
        return out


# ---------------------------------------------------------------------- public: along a trace
def trace_tensors(system: RecurrentSystem, trace: Any) -> tuple[torch.Tensor, torch.Tensor]:
    """Previous states (B, T, S) and inputs (B, T, I) of a trace, checked against the system."""
    from .trace import Trace

    if not isinstance(trace, Trace):
        raise TypeError(f"trace must be a hiddenlens Trace, got {type(trace).__name__}; make one "
                        "with hiddenlens.record(model, inputs)")
    if trace.state_size != system.state_size or trace.input_size != system.input_size:
        raise ValueError(
            f"the trace has states of size {trace.state_size} and {trace.input_size} input "
            f"features but the {system.source} system has S={system.state_size}, "
            f"I={system.input_size}; record the trace with this system or model"
        )
    prev = torch.from_numpy(np.ascontiguousarray(trace.previous_states())).to(system.dtype)
    x = torch.from_numpy(np.array(trace.inputs, dtype=prev.numpy().dtype))  # writable copy
    # a trace recorded elsewhere may meet a random step function here first: refuse it before
    # any step runs outside vmap (which would draw from the user's global generator)
    refuse_random_steps(system, prev[:1, 0], x[:1, 0])
    return prev, x


def system_for_trace(system: Any, trace: Any) -> RecurrentSystem:
    """``as_system`` that wraps a model in the trace's precision."""
    from .record import as_system
    from .systems import RecurrentSystem

    if isinstance(system, RecurrentSystem):
        return system
    dtype = getattr(getattr(trace, "states", None), "dtype", np.float32)
    return as_system(system, dtype=torch.float64 if dtype == np.float64 else torch.float32)


def check_chunk(chunk: Any, name: str = "chunk") -> int | None:
    """Validate a chunk-size option (None or a positive integer)."""
    if chunk is None:
        return None
    if isinstance(chunk, bool) or not isinstance(chunk, (int, np.integer)) or chunk < 1:
        raise ValueError(f"{name} must be a positive integer (number of states per batch) or "
                         f"None for automatic, got {chunk!r}")
    return int(chunk)


def jacobians(system: ModelLike, trace: Trace, *, wrt: str = "state", dtype: Any = None,
              chunk: int | None = None, progress: bool | None = None) -> np.ndarray:
    """Per-step Jacobians along a recorded trace, materialised.

    Parameters
    ----------
    system : RecurrentSystem, nn.Module or callable
        The system that produced ``trace`` (a model is wrapped in the trace's precision).
    trace : Trace
        States (B, T, S) with their initial states and inputs.
    wrt : {"state", "input"}, default "state"
        ``"state"``: J_t = d s_t / d s_{t-1}, shape (B, T, S, S); ``"input"``: d s_t / d x_t,
        shape (B, T, S, I).
    dtype : torch.float32 or torch.float64, optional
        Precision of the result (default: the system's). Closed forms are computed in it; a
        step function runs in its own precision and its Jacobians are converted.
    chunk : int, optional
        States per batch of the computation (default: automatic). Smaller chunks use less
        temporary memory in the torch.func fallback.
    progress : bool, optional
        Show a progress bar (default: only for large requests).

    Returns
    -------
    ndarray of shape (B, T, S, S) or (B, T, S, I)
        In the system's dtype. J at step 0 is taken at ``trace.initial``. The flat state covers
        every layer (and LSTM cell states), so multi-layer stacks have blocks below the diagonal
        (layer l reads layer l-1's new state within the same step).

    Notes
    -----
    This array holds B*T*S*S numbers; analyses that only need spectra or norms
    (:func:`hiddenlens.jacobian_spectra`, :func:`hiddenlens.gradient_flow`) never form it whole.
    Module-backed systems use closed forms (see ``NOTE: [Closed-form step Jacobians]`` in the
    source); other systems use ``torch.func.vmap(jacrev)`` over all states at once.
    """
    system = system_for_trace(system, trace)
    if wrt not in ("state", "input"):
        raise ValueError(f"wrt must be 'state' or 'input', got {wrt!r}")
    chunk = check_chunk(chunk)
    work = system.dtype if dtype is None else as_dtype(dtype)
    prev, x = trace_tensors(system, trace)
    B, T, S = prev.shape
    N = B * T
    cols = S if wrt == "state" else system.input_size
    # torch's allocator, not numpy's: numpy asks for transparent huge pages on large arrays,
    # which stalls on memory compaction when memory is fragmented (seconds for a few GiB)
    out = torch.empty(N, S, cols, dtype=work)  # (N, S, cols)
    result = out.numpy().reshape(B, T, S, cols)
    prev = prev.reshape(N, S)
    x = x.reshape(N, -1)
    if chunk is None:
        # closed forms block internally; the fallback needs a few S x S temporaries per state
        chunk = N if system.layers else max(1, (1 << 24) // max(S * max(S, cols), 1))
    starts = range(0, N, chunk)
    show = progress if progress is not None else (len(starts) > 4 and N * S * cols > 1 << 27)
    from tqdm.auto import tqdm

    with torch.no_grad():
        for a in tqdm(starts, disable=not show, desc="jacobians", leave=False):
            lin = linearize(system, prev[a:a + chunk], x[a:a + chunk], dtype=work)
            if wrt == "state":
                lin.dense(out=out[a:a + chunk])
            else:
                lin.input_dense(out=out[a:a + chunk])
    return result
