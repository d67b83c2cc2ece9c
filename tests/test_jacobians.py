"""Step Jacobians: closed forms against torch.func, the fallback, and jacobians() along traces."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn
from torch.func import jacrev, vmap

import hiddenlens as hl
from hiddenlens._core.jacobians import (
    input_jacobians,
    linearize,
    step_jacobians,
    step_jvp,
    step_vjp,
)

TOL = {torch.float32: 1e-5, torch.float64: 1e-12}


def _reference(system, prev, x, argnums=0):
    """torch.func.jacrev of the system's own step, batched with vmap (the reference library)."""

    def f(s, u):
        return system.step(s.unsqueeze(0), u.unsqueeze(0)).squeeze(0)

    return vmap(jacrev(f, argnums=argnums))(prev, x)


def _points(system, gen, n=6, scale=1.5):
    S, I = system.state_size, system.input_size
    prev = (torch.rand(n, S, generator=gen, dtype=torch.float64) * 2 - 1) * scale
    x = torch.randn(n, I, generator=gen, dtype=torch.float64)
    return prev.to(system.dtype), x.to(system.dtype)


def _check_all(system, gen):
    prev, x = _points(system, gen)
    tol = TOL[system.dtype]
    J_ref = _reference(system, prev, x)  # (N, S, S)
    K_ref = _reference(system, prev, x, argnums=1)  # (N, S, I)
    # reference: torch.func.jacrev (vmap over states)
    torch.testing.assert_close(step_jacobians(system, prev, x), J_ref, atol=tol, rtol=tol)
    torch.testing.assert_close(input_jacobians(system, prev, x), K_ref, atol=tol, rtol=tol)
    V = torch.randn(prev.shape[0], system.state_size, 3, generator=gen,
                    dtype=torch.float64).to(system.dtype)
    # JVP / VJP against products with the jacrev matrices (torch.func reference)
    torch.testing.assert_close(step_jvp(system, prev, x, V), J_ref @ V, atol=tol, rtol=tol)
    torch.testing.assert_close(step_vjp(system, prev, x, V), J_ref.mT @ V, atol=tol, rtol=tol)
    lin = linearize(system, prev, x)
    U = V[:, : system.input_size]
    torch.testing.assert_close(lin.input_jvp(U), K_ref @ U, atol=tol, rtol=tol)
    torch.testing.assert_close(lin.input_vjp(V), K_ref.mT @ V, atol=tol, rtol=tol)
    torch.testing.assert_close(lin.new_state, system.step(prev, x), atol=tol, rtol=tol)


def _kinds(suffix: str = "") -> list:
    """nn's four recurrent step kinds (tanh and relu RNN, GRU, LSTM); suffix "Cell": the cells."""
    rnn = [pytest.param((getattr(nn, "RNN" + suffix), {"nonlinearity": nl}),
                        id=f"rnn{suffix.lower()}_{nl}") for nl in ("tanh", "relu")]
    return rnn + [pytest.param((getattr(nn, name + suffix), {}), id=(name + suffix).lower())
                  for name in ("GRU", "LSTM")]


KINDS = _kinds()
CELLS = _kinds("Cell")
DTYPES = pytest.mark.parametrize("dtype", [torch.float32, torch.float64], ids=["f32", "f64"])
BIASES = pytest.mark.parametrize("bias", [True, False], ids=["bias", "nobias"])


@DTYPES
@BIASES
@pytest.mark.parametrize("num_layers", [1, 2, 3])
@pytest.mark.parametrize("kind", KINDS)
def test_closed_forms_equal_jacrev(kind, num_layers, bias, dtype, make, gen):
    cls, kw = kind
    model = make(cls, 3, 5, num_layers=num_layers, bias=bias, gen=gen, scale=0.8, **kw)
    _check_all(hl.wrap(model, dtype=dtype), gen)


@DTYPES
@BIASES
@pytest.mark.parametrize("kind", CELLS)
def test_cells_equal_jacrev(kind, bias, dtype, make, gen):
    cls, kw = kind
    _check_all(hl.wrap(make(cls, 4, 6, bias=bias, gen=gen, scale=0.8, **kw), dtype=dtype), gen)


def test_closed_form_float32_weights_in_float64(make, gen):
    # a float32 system linearised in float64 equals the float64 system's closed form
    model = make(nn.GRU, 3, 5, num_layers=2, gen=gen)
    s32, s64 = hl.wrap(model), hl.wrap(model, dtype=torch.float64)
    prev, x = _points(s64, gen)
    J = linearize(s32, prev, x, dtype=torch.float64).dense()
    assert J.dtype == torch.float64
    torch.testing.assert_close(J, _reference(s64, prev, x), atol=1e-12, rtol=1e-12)


def test_jacobians_along_trace_start_at_initial(make, gen):
    model = make(nn.LSTM, 3, 4, num_layers=2, gen=gen)
    rng = np.random.default_rng(1)
    inputs = rng.normal(size=(2, 7, 3)).astype(np.float32)
    h0 = rng.normal(size=(2, 16)).astype(np.float32)
    trace = hl.record(model, inputs, h0=h0)
    J = hl.jacobians(model, trace)
    K = hl.jacobians(model, trace, wrt="input")
    assert J.shape == (2, 7, 16, 16) and K.shape == (2, 7, 16, 3)
    system = hl.wrap(model)
    prev = torch.from_numpy(trace.previous_states().reshape(-1, 16))
    x = torch.from_numpy(np.array(trace.inputs).reshape(-1, 3))
    assert np.array_equal(trace.previous_states()[:, 0], trace.initial)
    # reference: torch.func.jacrev at the recorded previous states (initial at step 0)
    np.testing.assert_allclose(J.reshape(-1, 16, 16), _reference(system, prev, x).numpy(),
                               atol=1e-5, rtol=1e-5)
    np.testing.assert_allclose(K.reshape(-1, 16, 3), _reference(system, prev, x, 1).numpy(),
                               atol=1e-5, rtol=1e-5)
    # the cross-layer block (layer 1 rows, layer 0 columns) is filled, the block above is zero
    assert np.abs(J[..., 8:, :8]).max() > 1e-3
    assert np.abs(J[..., :8, 8:]).max() == 0.0


def test_jacobians_dtype_and_chunks_agree(make, gen):
    model = make(nn.GRU, 2, 6, gen=gen)
    trace = hl.record(model, np.random.default_rng(0).normal(size=(3, 5, 2)).astype(np.float32))
    J32 = hl.jacobians(model, trace)
    J64 = hl.jacobians(model, trace, dtype="float64", chunk=4)
    assert J32.dtype == np.float32 and J64.dtype == np.float64
    np.testing.assert_allclose(J32, J64, atol=1e-6)
    np.testing.assert_allclose(hl.jacobians(model, trace, chunk=1), J32, atol=1e-6)


def test_callable_fallback_is_batched_and_exact():
    a, b = 1.4, 0.3
    calls = []

    def henon(s, x):
        calls.append(1)
        u, v = s[..., 0], s[..., 1]
        return torch.stack([1 - a * u * u + v, b * u], dim=-1)

    system = hl.wrap(henon, state_size=2, input_size=0, dtype=torch.float64)
    trace = hl.record(system, np.zeros((2, 400, 0)), h0=np.array([0.1, 0.1]))
    calls.clear()
    J = hl.jacobians(system, trace)
    # one vmap call covers all B * T states: a few traced calls, not one per step
    assert len(calls) <= 3
    prev = trace.previous_states()
    # the Henon map's Jacobian [[-2 a u, 1], [b, 0]] (Henon 1976)
    expected = np.zeros_like(J)
    expected[..., 0, 0] = -2 * a * prev[..., 0]
    expected[..., 0, 1] = 1.0
    expected[..., 1, 0] = b
    np.testing.assert_allclose(J, expected, atol=1e-12)
    # the determinant is -b at every step (Henon 1976)
    np.testing.assert_allclose(np.linalg.det(J), -b, atol=1e-12)


def test_callable_jvp_vjp_match_dense(gen):
    W = torch.randn(5, 5, generator=gen, dtype=torch.float64) * 0.4
    system = hl.wrap(lambda s, x: torch.tanh(s @ W.T + x[..., :1]), state_size=5, input_size=2,
                     dtype=torch.float64)
    prev, x = _points(system, gen)
    J = step_jacobians(system, prev, x)
    V = torch.randn(prev.shape[0], 5, 4, generator=gen, dtype=torch.float64)
    # reference: torch.func.jacrev matrices times V
    torch.testing.assert_close(J, _reference(system, prev, x))
    torch.testing.assert_close(step_jvp(system, prev, x, V), J @ V)
    torch.testing.assert_close(step_vjp(system, prev, x, V), J.mT @ V)
    K = _reference(system, prev, x, argnums=1)
    lin = linearize(system, prev, x)
    torch.testing.assert_close(lin.input_jvp(V[:, :2]), K @ V[:, :2])
    torch.testing.assert_close(lin.input_vjp(V), K.mT @ V)
    sub = linearize(system, prev, x).select(torch.tensor([1, 3]))
    torch.testing.assert_close(sub.dense(), J[[1, 3]])


def test_select_keeps_closed_form_points(make, gen):
    system = hl.wrap(make(nn.LSTM, 3, 4, num_layers=2, gen=gen), dtype=torch.float64)
    prev, x = _points(system, gen)
    lin = linearize(system, prev, x)
    idx = torch.tensor([4, 0])
    torch.testing.assert_close(lin.select(idx).dense(), lin.dense()[idx])
    V = torch.randn(2, system.state_size, 2, generator=gen, dtype=torch.float64)
    torch.testing.assert_close(lin.select(idx).vjp(V), lin.dense()[idx].mT @ V)


def test_step_jacobians_stay_differentiable(make, gen):
    system = hl.wrap(make(nn.GRU, 2, 3, gen=gen), dtype=torch.float64)
    prev, x = _points(system, gen)
    prev.requires_grad_(True)
    J = step_jacobians(system, prev, x)
    J.sum().backward()
    assert prev.grad is not None and torch.isfinite(prev.grad).all()


def test_model_left_unchanged(make, gen, snapshot):
    model = make(nn.GRU, 2, 3, gen=gen)
    snap = snapshot(model)
    trace = hl.record(model, np.ones((1, 4, 2), dtype=np.float32))
    hl.jacobians(model, trace)
    snap.assert_unchanged()


def test_bad_options(make, gen):
    model = make(nn.GRU, 2, 3, gen=gen)
    trace = hl.record(model, np.ones((1, 4, 2), dtype=np.float32))
    with pytest.raises(ValueError, match="wrt must be 'state' or 'input'"):
        hl.jacobians(model, trace, wrt="inputs")
    with pytest.raises(ValueError, match="chunk must be a positive integer"):
        hl.jacobians(model, trace, chunk=0)
    with pytest.raises(TypeError, match="trace must be a hiddenlens Trace"):
        hl.jacobians(model, trace.states)
    other = hl.record(make(nn.GRU, 2, 4, gen=gen), np.ones((1, 4, 2), dtype=np.float32))
    with pytest.raises(ValueError, match="record the trace with this system"):
        hl.jacobians(model, other)
    with pytest.raises(ValueError, match="dtype must be float32 or float64"):
        hl.jacobians(model, trace, dtype="int8")
