"""Gradient flow over lag and loss gradients per step, against numpy products and autograd."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._faces.summary import key_figures, summary_sentence


def _linear_system(W: torch.Tensor):
    S = W.shape[0]
    return hl.wrap(lambda s, x: s @ W.T, state_size=S, input_size=0, dtype=torch.float64)


def _flat_trace(S: int, T: int, B: int = 1) -> hl.Trace:
    # a linear map's Jacobian is W everywhere, so the states themselves do not matter
    return hl.Trace(np.zeros((B, T, S)), np.zeros((B, S)), np.zeros((B, T, 0)),
                    {"state": slice(0, S)}, {})


@pytest.mark.parametrize("S", [6, 140])  # 140 > 128 runs the block power iteration
def test_linear_map_norms_equal_matrix_powers(S, gen):
    W = torch.randn(S, S, generator=gen, dtype=torch.float64) / S**0.5
    res = hl.gradient_flow(_linear_system(W), _flat_trace(S, 31))
    Wn = W.numpy()
    powers = [np.linalg.matrix_power(Wn, k) for k in res.lags]
    # reference: numpy.linalg.norm of numpy.linalg.matrix_power(W, k), ord 2 and Frobenius
    np.testing.assert_allclose(res.norms[0], [np.linalg.norm(P, 2) for P in powers], rtol=1e-6)
    np.testing.assert_allclose(res.frobenius[0], [np.linalg.norm(P) for P in powers],
                               rtol=1e-10)
    assert res.lags.tolist() == list(range(1, 31))


@pytest.mark.parametrize("rho", [1.2, 0.8])
def test_log_space_over_5000_steps(rho, gen):
    W = torch.randn(5, 5, generator=gen, dtype=torch.float64) / 5**0.5
    W = W * (rho / np.abs(np.linalg.eigvals(W.numpy())).max())
    res = hl.gradient_flow(_linear_system(W), _flat_trace(5, 5001))
    # ||W^k|| ~ C rho^k, so the fitted log-rate per step is ln(rho) (Gelfand's formula)
    assert res.rate == pytest.approx(math.log(rho), abs=2e-3)
    assert np.isfinite(res.log_norms).all() and np.isfinite(res.log_frobenius).all()
    # 1.2^5000 and 0.8^5000 lie outside float64: the plain norms saturate, the logs do not
    assert res.norms[0, -1] == (np.inf if rho > 1 else 0.0)
    assert res.log_norms[0, -1] == pytest.approx(5000 * math.log(rho), rel=1e-3)
    assert res.verdict == ("exploding" if rho > 1 else "vanishing")
    if rho < 1:
        assert res.half_life == pytest.approx(math.log(2) / -res.rate)
    else:
        assert res.half_life == math.inf


def test_orthogonal_map_is_near_isometric(gen):
    Q = torch.linalg.qr(torch.randn(8, 8, generator=gen, dtype=torch.float64))[0]
    res = hl.gradient_flow(_linear_system(Q), _flat_trace(8, 50))
    np.testing.assert_allclose(res.norms, 1.0, rtol=1e-9)  # orthogonal: every power has norm 1
    np.testing.assert_allclose(res.frobenius, 8**0.5, rtol=1e-9)
    assert abs(res.rate) < 1e-9 and res.verdict == "near-isometric"


def test_tanh_rnn_bound_of_pascanu(make, gen):
    model = make(nn.RNN, 3, 16, gen=gen)
    with torch.no_grad():
        w = model.weight_hh_l0
        w.mul_(0.9 / torch.linalg.matrix_norm(w, ord=2))
    trace = hl.record(model, np.random.default_rng(0).normal(size=(3, 60, 3)).astype(np.float32),
                      dtype=torch.float64)
    res = hl.gradient_flow(model, trace)
    # ||d h_T / d h_t|| <= (||W_hh||_2 * max|tanh'|)^(T-t) = 0.9^(T-t)
    # (Pascanu, Mikolov & Bengio 2013)
    bound = 0.9 ** res.lags.astype(float)
    assert np.all(res.norms <= bound * (1 + 1e-6))
    assert res.verdict == "vanishing"


def test_products_of_materialised_jacobians(make, gen):
    model = make(nn.LSTM, 2, 4, num_layers=2, gen=gen)
    trace = hl.record(model, np.random.default_rng(1).normal(size=(3, 9, 2)).astype(np.float32),
                      h0=np.random.default_rng(2).normal(size=(3, 16)).astype(np.float32))
    J = hl.jacobians(model, trace, dtype="float64")  # (B, T, S, S)
    res = hl.gradient_flow(model, trace, end=6, max_lag=7, samples=[2, 0], parts="layer1.h")
    cols = trace.columns("layer1.h")
    # reference: numpy products J_6 J_5 ... J_{7-L} (the last one taken at trace.initial)
    for row, b in enumerate([2, 0]):
        P = np.eye(16)
        for L in range(1, 8):
            P = P @ J[b, 6 - L + 1]
            sub = P[np.ix_(cols, cols)]
            assert res.norms[row, L - 1] == pytest.approx(np.linalg.norm(sub, 2), rel=1e-9)
            assert res.frobenius[row, L - 1] == pytest.approx(np.linalg.norm(sub), rel=1e-9)
    assert res.samples.tolist() == [2, 0] and res.parts == ("layer1.h",) and res.end == 6


def test_result_frozen_plot_frame(make, gen):
    import matplotlib.pyplot as plt

    model = make(nn.GRU, 2, 6, gen=gen)
    trace = hl.record(model, np.random.default_rng(0).normal(size=(2, 20, 2)).astype(np.float32))
    res = hl.gradient_flow(model, trace, fit_lags=(2, 15))
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.rate = 0.0
    with pytest.raises(ValueError):
        res.norms[0, 0] = 1.0
    fig, ax = plt.subplots()
    assert res.plot(ax=ax) is ax
    assert res.plot(ax=ax, sample=1, norm="frobenius") is ax
    with pytest.raises(ValueError, match="norm must be 'spectral' or 'frobenius'"):
        res.plot(ax=ax, norm="nuclear")
    plt.close(fig)
    df = res.to_frame()
    assert df.shape == (2 * 19, 4)
    assert res.verdict in hl._analyses.gradient_flow.VERDICTS


def test_bad_options(make, gen):
    model = make(nn.GRU, 2, 3, gen=gen)
    trace = hl.record(model, np.ones((2, 6, 2), dtype=np.float32))
    with pytest.raises(ValueError, match=r"The 'max_lag' option of gradient_flow must be None "
                                         r"or an int >= 1; got 0\."):
        hl.gradient_flow(model, trace, max_lag=0)
    with pytest.raises(ValueError, match=r"max_lag must be an integer in \[1, 6\]"):
        hl.gradient_flow(model, trace, max_lag=7)
    with pytest.raises(ValueError, match=r"end must be an integer in \[0, 5\]"):
        hl.gradient_flow(model, trace, end=6)
    with pytest.raises(ValueError, match="threshold must be a number >= 0"):
        hl.gradient_flow(model, trace, threshold=-1)
    with pytest.raises(ValueError, match="fit_lags must be"):
        hl.gradient_flow(model, trace, fit_lags=(3, 2))
    with pytest.raises(ValueError, match="samples must be sample indices"):
        hl.gradient_flow(model, trace, samples=[5])
    with pytest.raises(ValueError, match="no part named 'layer3.h'"):
        hl.gradient_flow(model, trace, parts="layer3.h")
    with pytest.raises(ValueError, match="'max_iter' option of gradient_flow must be an int >= 1"):
        hl.gradient_flow(model, trace, max_iter=0)


# ---------------------------------------------------------------------- loss gradients
class _SeqModel(nn.Module):
    def __init__(self, cls, layers, batch_first, build, gen):
        super().__init__()
        self.rnn = build(cls, 3, 5, num_layers=layers, batch_first=batch_first, gen=gen)
        self.readout = build(nn.Linear, 5, 2, gen=gen, scale=0.5)
        self.batch_first = batch_first

    def forward(self, x):
        out, _ = self.rnn(x if self.batch_first else x.transpose(0, 1))
        return self.readout(out if self.batch_first else out.transpose(0, 1))


class _LastStateModel(nn.Module):
    """Classifies from the final hidden state h_n of the top layer."""

    def __init__(self, build, gen):
        super().__init__()
        self.rnn = build(nn.GRU, 3, 5, num_layers=2, batch_first=True, gen=gen)
        self.readout = build(nn.Linear, 5, 2, gen=gen, scale=0.5)

    def forward(self, x):
        _, hn = self.rnn(x)
        return self.readout(hn[-1])


class _CellModel(nn.Module):
    def __init__(self, build, gen):
        super().__init__()
        self.cell = build(nn.LSTMCell, 3, 5, gen=gen)
        self.readout = build(nn.Linear, 5, 1, gen=gen, scale=0.5)

    def forward(self, x):
        h = c = torch.zeros(x.shape[0], 5, dtype=x.dtype)
        outs = []
        for t in range(x.shape[1]):
            h, c = self.cell(x[:, t], (h, c))
            outs.append(self.readout(h))
        return torch.stack(outs, dim=1)


def _autograd_norms(system, x, head):
    """Reference: unroll the system's own step with retain_grad (torch.autograd)."""
    s = system.zeros(x.shape[0]).requires_grad_(True)
    states = []
    for t in range(x.shape[1]):
        s = system.step(s, x[:, t].double())
        s.retain_grad()
        states.append(s)
    head(states).backward()
    return torch.stack([h.grad.norm(dim=1) for h in states], dim=1).numpy()


@pytest.mark.parametrize("cls,layers,batch_first", [(nn.GRU, 2, False), (nn.LSTM, 2, True),
                                                     (nn.RNN, 1, True)])
def test_loss_gradients_equal_autograd(cls, layers, batch_first, make, gen, snapshot):
    model = _SeqModel(cls, layers, batch_first, make, gen)
    x = torch.randn(3, 10, 3, generator=gen)
    y = torch.randn(3, 3, 2, generator=gen)
    for p in model.readout.parameters():
        p.grad = torch.ones_like(p)  # pre-existing grads must survive untouched
    snap = snapshot(model)
    res = hl.loss_gradient_norms(model, x, nn.functional.mse_loss, targets=y, steps=[2, 5, 9])
    late = hl.loss_gradient_norms(model, x, nn.functional.mse_loss, targets=y[:, :2],
                                  steps=[2, 5])
    assert np.all(late.norms[:, 6:] == 0.0)  # no loss term reads a later state
    snap.assert_unchanged()
    system = hl.wrap(model, dtype=torch.float64)
    top = system.layers[-1].h
    W, b = model.readout.weight.double(), model.readout.bias.double()

    def head(states):
        out = torch.stack([s[:, top] for s in states], dim=1)[:, [2, 5, 9]]
        return nn.functional.mse_loss(nn.functional.linear(out, W, b), y.double())

    ref = _autograd_norms(system, x, head)
    np.testing.assert_allclose(res.norms, ref, rtol=1e-5, atol=1e-7)
    with torch.no_grad():
        direct = nn.functional.mse_loss(model(x)[:, [2, 5, 9]], y).item()
    assert res.loss == pytest.approx(direct, rel=1e-6)
    assert res.loss_steps.tolist() == [2, 5, 9]
    assert set(res.part_norms) == set(system.parts) and res.norms.shape == (3, 10)


def test_loss_gradients_through_final_state(make, gen):
    model = _LastStateModel(make, gen)
    x = torch.randn(2, 8, 3, generator=gen)
    labels = torch.tensor([0, 1])
    res = hl.loss_gradient_norms(model, x, nn.functional.cross_entropy, targets=labels)
    system = hl.wrap(model, dtype=torch.float64)
    W, b = model.readout.weight.double(), model.readout.bias.double()

    def head(states):
        logits = nn.functional.linear(states[-1][:, system.layers[-1].h], W, b)
        return nn.functional.cross_entropy(logits, labels)

    np.testing.assert_allclose(res.norms, _autograd_norms(system, x, head), rtol=1e-5,
                               atol=1e-8)


def test_loss_gradients_of_a_cell_loop(make, gen, snapshot):
    model = _CellModel(make, gen)
    x = torch.randn(2, 7, 3, generator=gen)
    snap = snapshot(model)
    res = hl.loss_gradient_norms(model, x, lambda out: out.pow(2).sum())
    snap.assert_unchanged()
    system = hl.wrap(model, dtype=torch.float64)
    W, b = model.readout.weight.double(), model.readout.bias.double()

    def head(states):
        return sum(nn.functional.linear(s[:, system.layers[0].h], W, b).pow(2).sum()
                   for s in states)

    np.testing.assert_allclose(res.norms, _autograd_norms(system, x, head), rtol=1e-5,
                               atol=1e-8)
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots()
    assert res.plot(ax=ax) is ax
    plt.close(fig)
    assert res.to_frame().shape == (14, 3)


def test_loss_gradient_errors(make, gen):
    model = _SeqModel(nn.GRU, 1, True, make, gen)
    x = torch.randn(2, 4, 3, generator=gen)
    with pytest.raises(TypeError, match="model must be a torch nn.Module"):
        hl.loss_gradient_norms(lambda v: v, x, nn.functional.mse_loss)
    with pytest.raises(ValueError, match="loss_fn must return a scalar tensor"):
        hl.loss_gradient_norms(model, x, lambda out: out)
    with pytest.raises(TypeError, match="loss_fn must be callable"):
        hl.loss_gradient_norms(model, x, "mse")
    bi = nn.Sequential()
    bi.rnn = nn.GRU(3, 4, bidirectional=True, batch_first=True)
    with pytest.raises(ValueError, match="does not handle bidirectional"):
        hl.loss_gradient_norms(bi, x, lambda out: out[0].sum())


def test_non_finite_trajectories(make, gen):
    model = make(nn.GRU, 2, 5, gen=gen)
    trace = hl.record(model, np.random.default_rng(0).normal(size=(2, 10, 2)).astype(np.float32))
    states = np.array(trace.states)
    states[1, 3:] = np.nan
    broken = hl.Trace(states, trace.initial, trace.inputs, trace.parts, trace.metadata)
    res = hl.gradient_flow(model, broken)
    assert np.isnan(res.log_norms[1]).all() and np.isfinite(res.log_norms[0]).all()
    assert res.rate == pytest.approx(res.rates[0]) and res.verdict != "undetermined"
    states[0, 3:] = np.nan
    dead = hl.Trace(states, trace.initial, trace.inputs, trace.parts, trace.metadata)
    # every sample blew up at t=3: the rate comes from the finite part before it, and says so
    res = hl.gradient_flow(model, dead)
    assert res.end == 2 and res.lags.tolist() == [1, 2, 3]
    assert "became NaN at t=3" in res.metadata["verdict_note"]
    assert "only 3 lags" in res.metadata["verdict_note"]
    states[:, 0] = np.nan
    with pytest.raises(ValueError, match="became NaN at t=0"):
        hl.gradient_flow(model, hl.Trace(states, trace.initial, trace.inputs, trace.parts, {}))


def _tripling_relu():
    # h_t = relu(3 h_{t-1} + 1): the states (and d h_T / d h_t = 3^(T-t)) grow x3 per step
    model = nn.RNN(2, 4, nonlinearity="relu", batch_first=True)
    with torch.no_grad():
        for p in model.parameters():
            p.zero_()
        model.weight_hh_l0.copy_(3 * torch.eye(4))
        model.bias_ih_l0.fill_(1.0)
    return model


def test_gradient_flow_verdict_survives_float32_overflow():
    model = _tripling_relu()
    with pytest.warns(hl.NonFiniteStateWarning):
        trace = hl.record(model, np.zeros((2, 120, 2), np.float32))
    t_inf = int(np.argmin(np.isfinite(trace.states).all(axis=2)[0]))
    assert 70 < t_inf < 120  # 3^t passes float32's 3.4e38 near t = 81
    res = hl.gradient_flow(model, trace)
    # the exact rate is ln 3 per step (the Jacobian is 3 I while the units are active)
    assert res.rate == pytest.approx(math.log(3.0), rel=1e-6)
    assert res.verdict == "exploding" and res.half_life == math.inf
    note = res.metadata["verdict_note"]
    assert f"overflowed to inf at t={t_inf}, sample 0" in note and "finite part" in note
    assert res.end == t_inf - 1 and res.metadata["counted_lags"] == t_inf
    figs = key_figures({"gradient_flow": res})
    assert "exploding (states overflowed" in summary_sentence(figs)
    assert "vanishing" not in summary_sentence(figs)


def test_gradient_flow_overflow_in_one_sample_still_reads_exploding():
    model = _tripling_relu()
    x = np.zeros((2, 100, 2), np.float32)
    x[1] = -50.0  # sample 1 stays at zero (relu of a negative drive)
    with torch.no_grad():
        model.weight_ih_l0.fill_(1.0)
    with pytest.warns(hl.NonFiniteStateWarning):
        trace = hl.record(model, x)
    res = hl.gradient_flow(model, trace)
    assert res.verdict == "exploding"
    assert "sample 1 excluded" not in res.metadata["verdict_note"]
    assert "sample 0 excluded" in res.metadata["verdict_note"]
    assert np.isnan(res.log_norms[0]).all()


def test_gradient_flow_flags_rates_from_few_lags(gen):
    W = torch.eye(3, dtype=torch.float64) * 1.5
    res = hl.gradient_flow(_linear_system(W), _flat_trace(3, 30), max_lag=14)
    assert res.metadata["counted_lags"] == 14 and "only 14 lags" in res.metadata["verdict_note"]
    assert "from 14 lags" in repr(res)
    one = hl.gradient_flow(_linear_system(W), _flat_trace(3, 30), max_lag=1)
    assert one.verdict == "undetermined" and "need at least 2" in one.metadata["verdict_note"]
    # a 10x period longer than the lags fitted is an extrapolation, and the sentence says so
    slow = hl.gradient_flow(_linear_system(W * (0.95 / 1.5)), _flat_trace(3, 30), max_lag=14)
    text = summary_sentence(key_figures({"gradient_flow": slow}))
    assert "every 45 steps (extrapolated from 14 lags)" in text


def test_gradient_flow_accepts_numpy_scalars_and_refuses_negative_tol():
    W = torch.eye(3, dtype=torch.float64) * 0.5
    system, trace = _linear_system(W), _flat_trace(3, 10)
    res = hl.gradient_flow(system, trace, threshold=np.float32(0.01), tol=np.float64(1e-9))
    assert res.verdict == "vanishing"
    for bad in ({"tol": -1.0}, {"tol": 0.0}, {"threshold": float("nan")}, {"threshold": -0.1}):
        with pytest.raises(ValueError, match="must be a number|option of gradient_flow must be"):
            hl.gradient_flow(system, trace, **bad)
