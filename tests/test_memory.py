"""Tests of memory_curve: memory curves by decoding, perturbation and input sensitivity."""

from __future__ import annotations

import copy
import dataclasses
import subprocess
import sys

import numpy as np
import pytest
import scipy.linalg
import torch
from sklearn.linear_model import Ridge, RidgeClassifierCV, RidgeCV
from sklearn.model_selection import PredefinedSplit, cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

import hiddenlens
from hiddenlens._analyses.memory import MemoryCurve, memory_curve
from hiddenlens._analyses.memory_decoding import _folds
from hiddenlens._core.record import as_system

F64 = torch.float64


def mem(system, x, **kw):
    """memory_curve on a recording of ``x`` (the analysis takes the trace)."""
    wrap_options = {n: kw.pop(n) for n in ("dtype", "direction", "submodule") if n in kw}
    system = as_system(system, **wrap_options)
    return memory_curve(system, None if x is None else hiddenlens.record(system, x), **kw)


def reservoir(W, w, nonlin=None, dtype=F64):
    """s_t = W s_{t-1} + w x_t (optionally through ``nonlin``) as a plain-callable system."""
    W = torch.as_tensor(np.asarray(W, dtype=float), dtype=dtype)
    w = torch.as_tensor(np.asarray(w, dtype=float).reshape(W.shape[0], -1), dtype=dtype)

    def step(s, x):
        z = s @ W.T + x @ w.T
        return z if nonlin is None else nonlin(z)

    return hiddenlens.wrap(step, state_size=W.shape[0], input_size=w.shape[1], dtype=dtype)


def orthogonal(n, seed):
    q, r = np.linalg.qr(np.random.default_rng(seed).standard_normal((n, n)))
    return q * np.sign(np.diag(r))


def run_numpy(W, w, x, nonlin=None):
    """Independent numpy run of s_t = nonlin(W s_{t-1} + w x_t) from zeros; x (B, T, I)."""
    B, T, _ = x.shape
    s = np.zeros((B, W.shape[0]))
    out = np.empty((B, T, W.shape[0]))
    for t in range(T):
        s = s @ W.T + x[:, t] @ np.atleast_2d(w).reshape(W.shape[0], -1).T
        s = s if nonlin is None else nonlin(s)
        out[:, t] = s
    return out


# ---------------------------------------------------------------------- decoding: Jaeger (2001)
def test_delay_line_remembers_exactly_its_length():
    # Jaeger (2001), short-term memory in echo state networks: a shift register of N units
    # holds x_t..x_{t-N+1} exactly, so R^2 = 1 up to lag N-1, 0 beyond, and MC = N
    N = 8
    curve = memory_curve(reservoir(np.eye(N, k=-1), np.eye(N)[0]), max_lag=15, n_steps=1200)
    assert np.all(curve.scores[:N] > 0.999)
    assert np.all(np.abs(curve.scores[N:]) < 0.01)
    assert abs(curve.capacity - N) < 0.05
    assert curve.span == N - 1
    assert curve.method == "decoding" and curve.mode == "probe" and curve.metadata["split"] \
        == "sequences"


def test_linear_orthogonal_reservoir_matches_analytic_memory_curve():
    # Jaeger (2001): for a linear reservoir s_t = W s_{t-1} + w x_t with i.i.d. unit-variance
    # input, the optimal linear readout of x_{t-k} has R^2 = (W^k w)^T Sigma^-1 (W^k w), with
    # Sigma = W Sigma W^T + w w^T the stationary covariance (scipy's discrete Lyapunov solver);
    # the sum over all k is N
    N, K = 10, 60
    W = 0.9 * orthogonal(N, seed=1)
    w = np.random.default_rng(2).standard_normal(N)
    sigma = scipy.linalg.solve_discrete_lyapunov(W, np.outer(w, w))
    v = np.stack([np.linalg.matrix_power(W, k) @ w for k in range(K + 1)])  # (K+1, N)
    analytic = np.einsum("ki,ij,kj->k", v, np.linalg.inv(sigma), v)
    assert abs(analytic.sum() - N) < 1e-3  # the tail beyond K is negligible
    curve = memory_curve(reservoir(W, w), max_lag=K, n_steps=4000)
    np.testing.assert_allclose(curve.scores, analytic, atol=0.03)
    assert abs(curve.capacity - N) < 0.5


def test_linear_reservoir_capacity_at_most_n():
    # Jaeger (2001): MC <= N for a linear reservoir of N units with i.i.d. input; a random
    # Gaussian W is ill-conditioned, so only the bound is checked (plus sampling slack)
    N = 12
    rng = np.random.default_rng(3)
    W = rng.standard_normal((N, N))
    W *= 0.95 / np.abs(np.linalg.eigvals(W)).max()
    curve = memory_curve(reservoir(W, rng.standard_normal(N)), max_lag=40, n_steps=2000)
    assert 1.0 < curve.capacity <= N + 0.1


def test_saturating_tanh_reservoir_stays_below_n():
    # Jaeger (2001): saturating units lose linear memory; MC stays clearly below N
    N = 10
    W = 0.9 * orthogonal(N, seed=1)
    w = 3.0 * np.random.default_rng(2).standard_normal(N)
    curve = memory_curve(reservoir(W, w, torch.tanh), max_lag=40, n_steps=2000)
    assert curve.capacity < 0.6 * N
    assert curve.scores[0] > 0.5


@pytest.mark.parametrize("nonlin", [None, torch.tanh])
def test_state_reset_every_step_has_no_memory_beyond_lag_0(nonlin):
    # common practice: s_t = f(w x_t) (W = 0) holds the present input only
    w = np.random.default_rng(4).standard_normal(6)
    curve = memory_curve(reservoir(np.zeros((6, 6)), w, nonlin), max_lag=10, n_steps=1500)
    assert curve.scores[0] > 0.95
    assert np.all(curve.scores[1:] < 0.01)
    assert curve.span == 0
    assert curve.capacity < curve.scores[0] + 0.02


# ---------------------------------------------------------------------- decoding vs scikit-learn
def _tanh_data(B=5, T=400, I=1, seed=5):
    rng = np.random.default_rng(seed)
    N = 12
    W = 0.8 * orthogonal(N, seed=seed)
    w = rng.standard_normal((N, I))
    x = rng.standard_normal((B, T, I))
    return W, w, x, run_numpy(W, w, x, np.tanh)


@pytest.mark.parametrize("alphas", [1.0, (0.01, 1.0, 100.0)])
def test_decoding_scores_match_sklearn_cross_val_score(alphas):
    # scikit-learn: cross_val_score of StandardScaler + Ridge (one alpha) or RidgeCV (exact
    # leave-one-out choice per fold), one held-out sequence per fold, on lags 0, 2 and 5
    W, w, x, states = _tanh_data(I=2)
    K, B, T = 6, *x.shape[:2]
    curve = mem(reservoir(W, w, torch.tanh), x, max_lag=K, alphas=alphas,
                         n_folds=B)
    assert curve.mode == "data" and not curve.categorical
    X = states[:, K:].reshape(-1, states.shape[2])
    groups = np.repeat(np.arange(B), T - K)
    model = Ridge(alpha=alphas) if np.ndim(alphas) == 0 else RidgeCV(alphas=alphas)
    for k in (0, 2, 5):
        refs = [cross_val_score(make_pipeline(StandardScaler(), model), X,
                                x[:, K - k:T - k, i].reshape(-1), cv=PredefinedSplit(groups),
                                scoring="r2") for i in range(2)]  # per feature, (n_folds,)
        np.testing.assert_allclose(curve.samples[:, k], np.mean(refs, axis=0), rtol=1e-7,
                                   atol=1e-9)
        np.testing.assert_allclose(curve.feature_scores[k], np.mean(refs, axis=1), rtol=1e-7,
                                   atol=1e-9)
    # the baseline decodes from the present input alone
    Xb = x[:, K:].reshape(-1, 2)
    for k in (0, 3):
        refs = [cross_val_score(make_pipeline(StandardScaler(), model), Xb,
                                x[:, K - k:T - k, i].reshape(-1), cv=PredefinedSplit(groups),
                                scoring="r2") for i in range(2)]
        np.testing.assert_allclose(curve.baseline[k], np.mean(refs), rtol=1e-7, atol=1e-9)


def test_categorical_tokens_match_sklearn_ridge_classifier():
    # scikit-learn: RidgeClassifierCV (same +-1 coding and leave-one-out choice) scored by
    # balanced_accuracy, one held-out sequence per fold
    rng = np.random.default_rng(6)
    B, T, C, N, K = 5, 300, 3, 10, 5
    tokens = rng.integers(C, size=(B, T))
    x = np.eye(C)[tokens]  # (B, T, C) one-hot
    W = 0.7 * orthogonal(N, seed=6)
    w = rng.standard_normal((N, C))
    states = run_numpy(W, w, x, np.tanh)
    alphas = (0.1, 10.0, 1000.0)
    curve = mem(reservoir(W, w, torch.tanh), x, max_lag=K, alphas=alphas)
    assert curve.categorical and curve.chance == pytest.approx(1 / C)
    assert curve.score_name == "balanced accuracy"
    X = states[:, K:].reshape(-1, N)
    groups = np.repeat(np.arange(B), T - K)
    for k in (0, 1, 4):
        ref = cross_val_score(make_pipeline(StandardScaler(), RidgeClassifierCV(alphas=alphas)),
                              X, tokens[:, K - k:T - k].reshape(-1),
                              cv=PredefinedSplit(groups), scoring="balanced_accuracy")
        np.testing.assert_allclose(curve.samples[:, k], ref, rtol=1e-9)
    assert curve.scores[0] > 0.9
    adjusted = (curve.scores - 1 / C) / (1 - 1 / C)
    assert curve.capacity == pytest.approx(np.clip(adjusted, 0, None).sum())
    assert curve.baseline[0] == pytest.approx(1.0) and abs(curve.baseline[3] - 1 / C) < 0.05


def test_autocorrelated_inputs_are_matched_by_the_baseline():
    # common practice: for AR(1) inputs x_t = rho x_{t-1} + noise, x_t predicts x_{t-k} with
    # R^2 = rho^(2k); a memoryless system (W = 0) scores just that, like the baseline
    rho, B, T, K = 0.8, 5, 2000, 6
    rng = np.random.default_rng(7)
    x = np.zeros((B, T, 1))
    x[:, 0] = rng.standard_normal((B, 1))
    for t in range(1, T):
        x[:, t] = rho * x[:, t - 1] + np.sqrt(1 - rho**2) * rng.standard_normal((B, 1))
    curve = mem(reservoir(np.zeros((3, 3)), np.ones(3)), x, max_lag=K)
    np.testing.assert_allclose(curve.scores, rho ** (2 * np.arange(K + 1)), atol=0.04)
    # equal up to the ridge penalty acting on 3 copies of x_t instead of 1
    np.testing.assert_allclose(curve.scores, curve.baseline, atol=1e-4)
    assert curve.capacity == pytest.approx(curve.baseline_capacity, abs=1e-3)


def test_time_block_folds_are_contiguous_and_leave_a_gap():
    # common practice (blocked cross-validation of time series): held-out blocks are
    # contiguous and training rows within `gap` steps of them are dropped
    B, t_start, T, gap = 2, 10, 210, 10
    b_idx = np.repeat(np.arange(B), T - t_start)
    t_idx = np.tile(np.arange(t_start, T), B)
    folds, split = _folds(b_idx, t_idx, B, t_start, T, 4, gap)
    assert split == "time blocks" and len(folds) == 4
    covered = np.concatenate([te for _, te in folds])
    assert np.array_equal(np.sort(covered), np.arange(b_idx.size))
    for tr, te in folds:
        lo, hi = t_idx[te].min(), t_idx[te].max()
        assert hi - lo + 1 == te.size // B
        assert np.all((t_idx[tr] < lo - gap) | (t_idx[tr] > hi + gap))
    curve = memory_curve(reservoir(np.eye(4, k=-1), np.eye(4)[0]), max_lag=6, n_sequences=1,
                         n_steps=800)
    assert curve.metadata["split"] == "time blocks" and abs(curve.capacity - 4) < 0.05


# ---------------------------------------------------------------------- perturbation
@pytest.mark.parametrize("mode", ["probe", "data"])
def test_perturbation_of_linear_map_decays_as_a_to_the_k(mode):
    # analytic: for s_t = a s_{t-1} + x_t an impulse's effect after k steps is a^k times it
    a, K = 0.8, 12
    x = np.random.default_rng(8).standard_normal((3, 100, 1)) if mode == "data" else None
    curve = mem(reservoir([[a]], [1.0]), x, max_lag=K, method="perturbation")
    np.testing.assert_allclose(curve.scores, a ** np.arange(K + 1), rtol=1e-10)
    np.testing.assert_allclose(curve.spread, 0, atol=1e-10)
    assert curve.time_constant == pytest.approx(-1 / np.log(a), rel=1e-8)
    assert curve.capacity == pytest.approx((1 - a ** (K + 1)) / (1 - a))
    assert curve.span == int(np.floor(np.log(0.5) / np.log(a)))


def test_perturbation_normalisations():
    # analytic: with normalize="none" the distance is impulse * std(x) * a^k; a diagonal map
    # decays per unit, and an impulse of any direction decays as the mix of both
    a, K, scale = 0.5, 6, 2.0
    sys1 = reservoir([[a]], [1.0])
    raw = memory_curve(sys1, max_lag=K, method="perturbation", normalize="none", impulse=0.5,
                       scale=scale)
    np.testing.assert_allclose(raw.scores, 0.5 * scale * a ** np.arange(K + 1), rtol=1e-10)
    assert raw.reference == 1.0
    spread = memory_curve(sys1, max_lag=K, method="perturbation", normalize="spread",
                          n_steps=4000, n_sequences=4)
    assert spread.reference == pytest.approx(1 / np.sqrt(1 - a**2), rel=0.05)


def test_zero_memory_perturbation_and_sensitivity():
    # analytic: with W = 0 an input reaches the state at its own step only
    for method in ("perturbation", "sensitivity"):
        curve = memory_curve(reservoir(np.zeros((3, 3)), np.ones(3)), max_lag=5, method=method)
        np.testing.assert_array_equal(curve.scores, [1, 0, 0, 0, 0, 0])
        assert curve.time_constant == 0.0 and curve.span == 0


# ---------------------------------------------------------------------- sensitivity
def test_sensitivity_of_linear_map_is_a_to_the_k_without_underflow():
    # analytic: d s_t / d x_{t-k} = a^k; 0.5^250 ~ 5e-76 is far below float32's range, which a
    # plain product of float32 Jacobians would flush to zero
    a, K = 0.5, 250
    curve = memory_curve(reservoir([[a]], [1.0], dtype=torch.float32), max_lag=K,
                         method="sensitivity", n_sequences=1, n_steps=K + K + 20)
    np.testing.assert_allclose(curve.scores, a ** np.arange(K + 1), rtol=1e-6)
    assert curve.time_constant == pytest.approx(-1 / np.log(a), rel=1e-5)


def _reference_rnn(input_size, seed=0):
    with torch.random.fork_rng():
        torch.manual_seed(seed)
        return torch.nn.RNN(input_size, 5, batch_first=True)


def _full_jacobian(rnn, x):
    """d s_t / d x_tau for all t, tau by torch.autograd on a float64 copy: (B, T, H, B, T, I)."""
    model = copy.deepcopy(rnn).double()
    return torch.autograd.functional.jacobian(lambda u: model(u)[0], torch.as_tensor(x))


def test_sensitivity_matches_autograd():
    # torch.autograd: the Jacobian of the whole run, read off at d s_{tau+k} / d x_tau
    rnn = _reference_rnn(2)
    before = copy.deepcopy(rnn.state_dict())
    x = np.random.default_rng(9).standard_normal((2, 14, 2))
    K, washout = 4, 3
    curve = mem(rnn, x, max_lag=K, method="sensitivity", washout=washout,
                         dtype=F64)
    jac = _full_jacobian(rnn, x).numpy()
    sigma = x.reshape(-1, 2).std(axis=0)
    ref = np.array([[[np.linalg.norm(jac[b, tau + k, :, b, tau, :] * sigma) for k in range(K + 1)]
                     for tau in range(washout, 14 - K)] for b in range(2)]).reshape(-1, K + 1)
    ref /= ref[:, 0].mean()
    np.testing.assert_allclose(curve.samples, ref, rtol=1e-9)
    np.testing.assert_allclose(curve.scores, ref.mean(axis=0), rtol=1e-9)
    assert all(torch.equal(v, rnn.state_dict()[n]) for n, v in before.items())


def test_small_impulse_follows_autograd_jacobian():
    # torch.autograd: for a small impulse the distance after k steps is |d s_{t0+k}/d x_t0| delta
    rnn = _reference_rnn(1, seed=1)
    x = np.random.default_rng(10).standard_normal((3, 40, 1))
    K, washout = 5, 4
    curve = mem(rnn, x, max_lag=K, method="perturbation", washout=washout,
                         impulse=1e-7, dtype=F64)
    jac = _full_jacobian(rnn, x).numpy()
    t0s = curve.metadata["impulse_times"]
    ref = np.array([[[np.linalg.norm(jac[b, t0 + k, :, b, t0, 0]) for k in range(K + 1)]
                     for t0 in t0s] for b in range(3)]).reshape(-1, K + 1)
    ref /= ref[:, 0].mean()
    np.testing.assert_allclose(curve.samples, ref, rtol=1e-5)


# ---------------------------------------------------------------------- contract and errors
@pytest.fixture(scope="module")
def gru():
    with torch.random.fork_rng():
        torch.manual_seed(0)
        return torch.nn.GRU(3, 16, batch_first=True)


@pytest.mark.parametrize("method", ["decoding", "perturbation", "sensitivity"])
@pytest.mark.parametrize("dtype", [torch.float32, F64])
def test_gru_contract(gru, method, dtype):
    # common practice: frozen result, read-only arrays, repeatable under a seed, the user's
    # model and the global random states untouched
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    params = copy.deepcopy(gru.state_dict())
    gru.train()
    # the legacy global state is read only to prove it is left alone
    torch_rng, np_rng = torch.get_rng_state(), np.random.get_state()[1].copy()  # noqa: NPY002
    kw = dict(max_lag=8, method=method, dtype=dtype)
    kw.update({"decoding": dict(n_steps=400), "perturbation": {},
               "sensitivity": dict(n_sequences=2, n_steps=60)}[method])
    curve = memory_curve(gru, **kw)
    assert torch.equal(torch.get_rng_state(), torch_rng)
    assert np.array_equal(np.random.get_state()[1], np_rng)  # noqa: NPY002
    assert gru.training and all(p.requires_grad and p.grad is None for p in gru.parameters())
    assert all(torch.equal(v, gru.state_dict()[n]) for n, v in params.items())
    assert isinstance(curve, MemoryCurve)
    assert curve.lags.tolist() == list(range(9))
    assert curve.scores.shape == curve.spread.shape == (9,)
    assert curve.samples.shape[1] == 9 and np.all(np.isfinite(curve.scores))
    np.testing.assert_allclose(curve.scores, curve.samples.mean(axis=0))
    assert not curve.scores.flags.writeable and not curve.samples.flags.writeable
    with pytest.raises(dataclasses.FrozenInstanceError):
        curve.span = 3
    if dtype == F64:
        again = memory_curve(gru, **kw)
        np.testing.assert_array_equal(again.scores, curve.scores)
        other = memory_curve(gru, **kw, seed=1)
        assert not np.array_equal(other.scores, curve.scores)
    frame = curve.to_frame()
    assert list(frame.columns) == ["score", "spread"] and frame.index.name == "lag"
    fig, ax = plt.subplots()
    assert curve.plot(ax=ax) is ax
    plt.close(fig)
    assert "MemoryCurve(method=" in repr(curve)


def test_data_mode_frame_and_plot_show_baseline_and_parts(gru):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    x = np.random.default_rng(11).standard_normal((2, 300, 3)).astype(np.float32)
    curve = mem(gru, x, max_lag=5, parts="layer0.h", n_folds=3)
    assert curve.metadata["split"] == "time blocks"
    assert list(curve.to_frame().columns) == ["score", "spread", "baseline", "baseline_spread"]
    fig, ax = plt.subplots()
    curve.plot(ax=ax)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any("baseline" in s for s in labels) and any("threshold" in s for s in labels)
    plt.close(fig)


def test_categorical_probe_draws_tokens():
    # common practice: balanced accuracy of guessing among C classes is 1 / C
    N, C = 8, 4
    w = np.random.default_rng(12).standard_normal((N, C))
    curve = memory_curve(reservoir(0.5 * orthogonal(N, 12), w),
                         max_lag=4, categorical=True, n_steps=600)
    assert curve.categorical and curve.chance == pytest.approx(1 / C)
    assert curve.scores[0] > 0.95 and curve.baseline is None


def test_span_conventions():
    # the documented convention: largest k with every lag 0..k at or above the threshold
    from hiddenlens._analyses.memory import _span

    assert _span(np.array([0.9, 0.8, 0.4, 0.7]), 0.5) == 1
    assert _span(np.array([0.4, 0.8]), 0.5) == -1
    assert _span(np.array([0.9, 0.8]), 0.5) == 1
    assert _span(np.array([0.9, np.nan, 0.8]), 0.5) == 0


@pytest.mark.parametrize(("kwargs", "match"), [
    (dict(method="decode"), "'method' option of memory_curve must be one of"),
    (dict(mode="data"), "needs inputs"),
    (dict(max_lag=-1), "'max_lag' option of memory_curve must be an int >= 0"),
    (dict(alphas=0.0), "alphas must be"),
    (dict(alphas=[]), "alphas must be"),
    (dict(n_folds=1), "'n_folds' option of memory_curve must be an int >= 2"),
    (dict(normalize="lag0"), "normalize applies"),
    (dict(method="sensitivity", normalize="spread"), "normalize must be one of"),
    (dict(parts="nope"), "not found"),
    (dict(scale=-1.0), "scale must be"),
    (dict(threshold=float("nan")), "threshold must be"),
    (dict(categorical=True), "at least 2 features"),
    (dict(n_steps=25, max_lag=20), "usable steps"),
    (dict(method="perturbation", n_steps=10, max_lag=20), "too short"),
    (dict(method="sensitivity", n_steps=10, max_lag=20), "too short"),
])
def test_bad_options_fail_clearly(kwargs, match):
    with pytest.raises(ValueError, match=match):
        memory_curve(reservoir([[0.5]], [1.0]), **kwargs)


def test_bad_data_options_fail_clearly():
    sys1 = reservoir([[0.5]], [1.0])
    x = np.zeros((1, 50, 1))
    with pytest.raises(ValueError, match="mode='probe'"):
        mem(sys1, x, mode="probe")
    with pytest.raises(ValueError, match="probe mode only"):
        mem(sys1, x, n_steps=10)
    with pytest.raises(ValueError, match="constant"):
        mem(sys1, x, max_lag=3, method="perturbation")
    with pytest.raises(ValueError, match="not one-hot"):
        mem(reservoir(np.eye(2), np.eye(2)), np.ones((1, 50, 2)), categorical=True)
    auto = hiddenlens.wrap(lambda s, x: s, state_size=2, input_size=0)
    with pytest.raises(ValueError, match="takes no inputs"):
        memory_curve(auto)


def test_import_leaves_matplotlib_out():
    # the core imports without matplotlib (layering rule of the package)
    code = "import sys, hiddenlens._analyses.memory; assert 'matplotlib' not in sys.modules"
    subprocess.run([sys.executable, "-c", code], check=True)


class _LinearStep(torch.nn.Module):
    """s' = a s + x with ``a`` a trainable parameter (requires_grad stays on)."""

    def __init__(self, a, dtype):
        super().__init__()
        self.a = torch.nn.Parameter(torch.tensor([a], dtype=dtype))

    def forward(self, s, x):
        return self.a * s + x


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("mode", ["probe", "data"])
def test_sensitivity_on_module_step_function_with_trainable_parameters(dtype, mode):
    step = _LinearStep(0.5, dtype)
    system = hiddenlens.wrap(step, state_size=1, input_size=1, dtype=dtype)
    if mode == "probe":
        curve = memory_curve(system, max_lag=8, method="sensitivity", n_sequences=1, n_steps=60)
    else:
        data = hiddenlens.record(system, np.random.default_rng(0).standard_normal((1, 60, 1)))
        curve = memory_curve(system, data, max_lag=8, method="sensitivity")
    # analytic: d s_t / d x_{t-k} = a^k
    np.testing.assert_allclose(curve.scores, 0.5 ** np.arange(9), rtol=1e-5)
    assert step.a.requires_grad and step.a.grad is None


def test_memory_data_mode_refuses_overflowing_states_with_step_and_sample():
    system = reservoir([[3.0]], [1.0], dtype=torch.float32)
    x = np.abs(np.random.default_rng(0).standard_normal((2, 200, 1)))
    for method in ("decoding", "sensitivity", "perturbation"):
        with pytest.warns(hiddenlens.NonFiniteStateWarning), pytest.raises(
                ValueError, match=r"states overflowed to inf at step t=\d+ of sample \d.*bounded"):
            memory_curve(system, hiddenlens.record(system, x), max_lag=5, method=method)


def test_memory_data_mode_refuses_constant_inputs():
    # a constant target is "decoded" with R^2 = 1 at every lag: no memory can be claimed
    system = reservoir([[0.5]], [1.0])
    for x in (np.zeros((2, 100, 1)), np.ones((2, 100, 1))):
        with pytest.raises(ValueError, match="the inputs are constant"):
            memory_curve(system, hiddenlens.record(system, x), max_lag=5)


def test_the_inputs_form_warns_and_gives_the_same_curve():
    # 0.1 form memory_curve(system, inputs): recorded first, so the numbers are the same
    rng = np.random.default_rng(0)
    system = as_system(reservoir(0.5 * np.eye(3), np.ones(3)))
    x = rng.standard_normal((2, 300, 1))
    new = memory_curve(system, hiddenlens.record(system, x), max_lag=4)
    with pytest.warns(DeprecationWarning, match=r"memory_curve\(system, hiddenlens.record"):
        old = memory_curve(system, x, max_lag=4)
    with pytest.warns(DeprecationWarning):
        kw = memory_curve(system, inputs=x, max_lag=4)
    np.testing.assert_array_equal(old.scores, new.scores)
    np.testing.assert_array_equal(kw.scores, new.scores)
def test_variance_weighted_r2_beside_the_mean():
    # one feature: the variance-weighted R^2 (scikit-learn's multioutput="variance_weighted")
    # equals the plain R^2; with a feature of zero memory it weights by variance
    W = 0.5 * orthogonal(8, 1)
    curve = memory_curve(reservoir(W, np.ones(8)), max_lag=4, n_sequences=5, n_steps=300)
    np.testing.assert_allclose(curve.weighted_scores, curve.scores)
    x = np.random.default_rng(0).standard_normal((6, 300, 2)) * np.array([1.0, 3.0])
    system = as_system(reservoir(W, np.ones((8, 2))))
    two = memory_curve(system, hiddenlens.record(system, x), max_lag=4)
    assert two.weighted_scores.shape == (5,)
    w = np.array([1.0, 9.0])
    np.testing.assert_allclose(two.weighted_scores, two.feature_scores @ w / w.sum(), rtol=0.05)


# ---------------------------------------------------------------------- range warnings
def _leaky_system(a=0.9):
    def step(s, x):
        return a * s + x

    return hiddenlens.wrap(step, state_size=1, input_size=1, dtype=torch.float64)


def test_probes_outside_the_recorded_range_warn():
    system = _leaky_system()
    rng = np.random.default_rng(0)
    small = hiddenlens.record(system, 0.01 * rng.standard_normal((4, 300, 1)))
    with pytest.warns(hiddenlens.MemoryRangeWarning, match="outside the range"):
        curve = memory_curve(system, max_lag=5, reference=small, n_steps=400)
    # reference: the share of probe states outside the reference box widened by 10% of its
    # range, recomputed with numpy from a recording of the same probes
    probe = np.random.default_rng(0).standard_normal((5, 400, 1))
    states = hiddenlens.record(system, probe).states.ravel()
    lo, hi = small.states.min(), small.states.max()
    pad = 0.1 * (hi - lo)
    expected = np.mean((states < lo - pad) | (states > hi + pad))
    np.testing.assert_allclose(curve.metadata["outside_share"], expected)
    # probes of the inputs' own scale stay inside: no warning (warnings are errors here)
    wide = hiddenlens.record(system, rng.standard_normal((8, 2000, 1)))
    quiet = memory_curve(system, max_lag=5, reference=wide, n_steps=400)
    assert quiet.metadata["outside_share"] <= 0.05
    with pytest.raises(TypeError, match="reference must be a Trace"):
        memory_curve(system, max_lag=5, reference=small.states)


def test_test_r2_below_minus_one_warns():
    # the state holds only channel 1; channel 0 is a per-sequence offset with tiny spread, so
    # a held-out sequence's offset is predicted by the training mean: R^2 far below -1
    # (scikit-learn's r2_score convention, 1 - SSE / SST)
    def step(s, x):
        return x[..., 1:]

    system = hiddenlens.wrap(step, state_size=1, input_size=2, dtype=torch.float64)
    rng = np.random.default_rng(1)
    x = np.stack([np.arange(5)[:, None] + 0.01 * rng.standard_normal((5, 60)),
                  rng.standard_normal((5, 60))], axis=-1)
    with pytest.warns(hiddenlens.MemoryRangeWarning, match="below -1"):
        curve = memory_curve(system, hiddenlens.record(system, x), max_lag=2)
    assert curve.scores.min() < -1


def test_report_and_widget_default_to_the_users_inputs():
    from hiddenlens._analyses.runner import run_analyses

    system = _leaky_system()
    x = np.random.default_rng(2).standard_normal((4, 60, 1))
    out = run_analyses(system, x, which=["memory"])
    assert out["memory"].mode == "data" and out.options["memory"]["mode"] == "data"
    direct = memory_curve(system, out.trace, **{k: v for k, v in out.options["memory"].items()
                                                if k != "mode"})
    np.testing.assert_allclose(out["memory"].scores, direct.scores)
    probe = run_analyses(system, x, which=["memory"], options={"memory": {"mode": "probe"}})
    assert probe["memory"].mode == "probe"
    assert probe["memory"].metadata["outside_share"] is not None  # checked against the trace


def test_data_mode_budget_fits_the_recorded_steps():
    from hiddenlens._analyses.runner import run_analyses

    system = _leaky_system()
    rng = np.random.default_rng(3)
    # 8 sequences of 150 steps: lags up to 40; 3 sequences (time-block folds): (T - 10) // 4
    assert run_analyses(system, rng.standard_normal((8, 150, 1)),
                        which=["memory"]).options["memory"]["max_lag"] == 40
    assert run_analyses(system, rng.standard_normal((3, 50, 1)),
                        which=["memory"]).options["memory"]["max_lag"] == 10
