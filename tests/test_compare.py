"""Run comparison: linear CKA against its definition, and compare_runs tables and plots."""

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pytest
import torch
from matplotlib.figure import Figure
from numpy.testing import assert_allclose

import hiddenlens
from hiddenlens import compare_runs, linear_cka
from hiddenlens._analyses.compare import RunComparison
from hiddenlens._core.registry import analysis_spec
from hiddenlens._faces.summary import ANALYSES, available_analyses, key_figures
from tests.conftest import gaussian_inputs, gaussian_module


def _hsic_cka(X, Y):
    """CKA straight from its definition with linear kernels (Kornblith et al. 2019, eqs. 3-4):
    HSIC(K, L) = tr(K H L H) / (n - 1)^2 with H = I - 11^T / n, K = X X^T, L = Y Y^T, and
    CKA = HSIC(K, L) / sqrt(HSIC(K, K) HSIC(L, L))."""
    n = X.shape[0]
    H = np.eye(n) - np.ones((n, n)) / n
    K, L = X @ X.T, Y @ Y.T

    def hsic(A, B):
        return np.trace(A @ H @ B @ H) / (n - 1) ** 2

    return hsic(K, L) / np.sqrt(hsic(K, K) * hsic(L, L))


def _orthogonal(p, rng):
    q, r = np.linalg.qr(rng.standard_normal((p, p)))
    return q * np.sign(np.diag(r))


@pytest.mark.parametrize("n, p1, p2", [(60, 7, 11), (12, 30, 5), (40, 40, 40)])
def test_linear_cka_equals_hsic_definition(n, p1, p2):
    rng = np.random.default_rng(n + p1)
    X = rng.standard_normal((n, p1)) + 3.0  # uncentred on purpose: CKA centres the features
    Y = np.tanh(X @ rng.standard_normal((p1, p2))) + 0.3 * rng.standard_normal((n, p2))
    # reference: the HSIC formula of Kornblith et al. (2019) computed directly with numpy
    assert_allclose(linear_cka(X, Y), _hsic_cka(X, Y), rtol=1e-10)


def test_linear_cka_invariances():
    rng = np.random.default_rng(1)
    X = rng.standard_normal((80, 9))
    Y = X @ rng.standard_normal((9, 6)) + rng.standard_normal((80, 6))
    base = linear_cka(X, Y)
    # Kornblith et al. (2019), section 3: invariant to orthogonal transforms and isotropic scaling
    assert_allclose(linear_cka(X @ _orthogonal(9, rng), Y), base, rtol=1e-10)
    assert_allclose(linear_cka(X, 7.5 * Y), base, rtol=1e-10)
    assert_allclose(linear_cka(X + 4.0, Y - 2.0), base, rtol=1e-10)  # centring
    assert_allclose(linear_cka(X, X), 1.0, rtol=1e-12)
    assert_allclose(linear_cka(X, 3.0 * X @ _orthogonal(9, rng)), 1.0, rtol=1e-10)
    assert_allclose(linear_cka(Y, X), base, rtol=1e-12)  # symmetric
    assert 0.0 <= base <= 1.0
    # ...and not to an arbitrary invertible map (same paper): anisotropic scaling changes it
    assert abs(linear_cka(X * np.geomspace(1, 100, 9), Y) - base) > 1e-3


def test_linear_cka_of_independent_features_is_small():
    rng = np.random.default_rng(2)
    X, Y = rng.standard_normal((5000, 4)), rng.standard_normal((5000, 4))
    # E[CKA] of independent data tends to 0 like p / n (common practice)
    assert linear_cka(X, Y) < 0.01


def test_linear_cka_takes_states_and_refuses_bad_input():
    rng = np.random.default_rng(3)
    S1, S2 = rng.standard_normal((4, 25, 6)), rng.standard_normal((4, 25, 3))  # (B, T, S)
    assert_allclose(linear_cka(S1, S2), _hsic_cka(S1.reshape(100, 6), S2.reshape(100, 3)))
    assert_allclose(linear_cka(torch.from_numpy(S1), S1), 1.0)
    with pytest.raises(ValueError, match="same examples"):
        linear_cka(S1, S2[:2])
    with pytest.raises(ValueError, match="constant"):
        linear_cka(np.ones((10, 3)), S1[0, :10])
    with pytest.raises(TypeError, match="floating-point"):
        linear_cka(np.ones((10, 3), dtype=int), S1[0, :10])
    with pytest.raises(ValueError, match="NaN"):
        linear_cka(np.full((10, 3), np.nan), S1[0, :10])


# ---------------------------------------------------------------------- compare_runs
@pytest.fixture(scope="module")
def runs():
    return {name: _module(cls, hidden, seed) for seed, (name, cls, hidden) in enumerate(
        (("rnn", torch.nn.RNN, 8), ("gru", torch.nn.GRU, 12), ("lstm", torch.nn.LSTM, 6)))}


def _module(cls, hidden, seed, n_in=3):
    return gaussian_module(cls, n_in, hidden, seed=seed)


@pytest.fixture(scope="module")
def inputs():
    return gaussian_inputs((3, 40, 3), seed=4)


@pytest.fixture(scope="module")
def comparison(runs, inputs):
    return compare_runs(runs, inputs, which=["pca"])


def test_compare_runs_table_and_cka(comparison, runs, inputs):
    c = comparison
    assert isinstance(c, RunComparison)
    assert c.names == ("rnn", "gru", "lstm")
    t = c.table
    assert list(t.index) == ["rnn", "gru", "lstm"]
    assert list(t["state_size"]) == [8, 12, 12]  # LSTM: h and c
    pr = {n: hiddenlens.pca_trajectories(hiddenlens.record(m, inputs)).participation_ratio
          for n, m in runs.items()}
    assert_allclose(t["participation_ratio"].to_numpy(), [pr[n] for n in c.names])
    assert_allclose(t["Δ participation_ratio"].to_numpy(),
                    [pr[n] - pr["rnn"] for n in c.names])
    assert c.to_frame().equals(t) and c.to_frame() is not t
    # CKA of the runs' top-layer hidden states (h only for the LSTM), widths 8, 12 and 6
    h = {n: hiddenlens.record(m, inputs) for n, m in runs.items()}
    h = {n: tr.states[:, :, tr.columns(tr.metadata["output_part"])] for n, tr in h.items()}
    assert c.cka.shape == (3, 3) and not c.cka.flags.writeable
    assert_allclose(np.diag(c.cka), 1.0)
    assert_allclose(c.cka, c.cka.T)
    assert_allclose(c.cka[0, 2], _hsic_cka(h["rnn"].reshape(120, -1), h["lstm"].reshape(120, -1)),
                    rtol=1e-8)
    assert set(c.results) == set(c.names) and "pca" in c.results["gru"]
    assert c.figures["gru"] == key_figures(c.results["gru"])
    assert all(isinstance(s, str) and s for s in c.summaries().values())


def test_compare_runs_whole_state_cka(runs, inputs):
    c = compare_runs({"a": runs["lstm"], "b": runs["gru"]}, inputs, which=["pca"],
                     cka_parts="all")
    s = hiddenlens.record(runs["lstm"], inputs).states
    g = hiddenlens.record(runs["gru"], inputs).states
    assert_allclose(c.cka[0, 1], linear_cka(s, g))


def test_compare_runs_leaves_models_untouched(runs, inputs):
    before = {n: {k: v.clone() for k, v in m.state_dict().items()} for n, m in runs.items()}
    for m in runs.values():
        m.train()
    rng = torch.get_rng_state()
    compare_runs(runs, inputs, which=["pca"])
    assert torch.equal(torch.get_rng_state(), rng)
    for n, m in runs.items():
        assert m.training
        for k, v in m.state_dict().items():
            assert torch.equal(v, before[n][k])


def test_compare_runs_progress_callback(runs, inputs):
    calls = []
    compare_runs({"a": runs["rnn"], "b": runs["gru"]}, inputs, which=["pca"],
                 progress=lambda *a: calls.append(a))
    assert calls == [("a: pca", 0, 2), ("b: pca", 1, 2), ("done", 2, 2)]


def test_compare_plots_draw_on_given_axes(comparison):
    for analysis in ("cka", "pca"):
        ax = Figure().add_subplot()
        assert comparison.plot(analysis, ax=ax) is ax
        assert ax.has_data()
    with pytest.raises(ValueError, match="no run has"):
        comparison.plot("memory", ax=Figure().add_subplot())
    with pytest.raises(ValueError, match="unknown analysis"):
        comparison.plot("nonsense")


@pytest.mark.skipif(set(available_analyses()) != set(ANALYSES),
                    reason="an analysis module is not available")
def test_compare_runs_every_analysis_overlays(runs, inputs):
    c = compare_runs({"rnn": runs["rnn"], "gru": runs["gru"]}, inputs[:2, :30],
                     options={"memory": {"max_lag": 5, "n_steps": 300},
                              "fixed_points": {"n_starts": 8}})
    free = [a for a in ANALYSES if not analysis_spec(a).needs]  # no task targets given here
    assert all(set(c.results[n]) == set(free) for n in c.names)
    for a in free:
        ax = Figure().add_subplot()
        assert c.plot(a, ax=ax) is ax
        assert ax.get_legend() is not None
    assert c.table.loc["rnn", "Δ lyapunov_max"] == 0.0
    assert_allclose(c.table.loc["gru", "Δ lyapunov_max"],
                    c.table.loc["gru", "lyapunov_max"] - c.table.loc["rnn", "lyapunov_max"])


def test_compare_runs_refuses_bad_runs(runs, inputs):
    with pytest.raises(TypeError, match="non-empty mapping"):
        compare_runs({}, inputs)
    with pytest.raises(TypeError, match="non-empty mapping"):
        compare_runs([runs["rnn"]], inputs)
    other = _module(torch.nn.GRU, 5, 0, n_in=4)
    with pytest.raises(ValueError, match="different input sizes"):
        compare_runs({"a": runs["rnn"], "b": other}, inputs)
    with pytest.raises(ValueError, match="cka_parts"):
        compare_runs(runs, inputs, cka_parts="some")
    with pytest.raises(ValueError, match="features"):
        compare_runs(runs, inputs[..., :2], which=["pca"])


# ---------------------------------------------------------------------- intervals in the table
def test_compare_runs_intervals_and_noise_marks():
    from scipy import stats

    inputs = np.random.default_rng(7).standard_normal((12, 40, 3)).astype(np.float32)
    base = _module(torch.nn.RNN, 8, 0)
    scaled = _module(torch.nn.RNN, 8, 0)
    with torch.no_grad():
        scaled.weight_hh_l0.mul_(3.0)  # a much larger recurrent gain: a real change
    runs = {"a": base, "same": _module(torch.nn.RNN, 8, 0), "scaled": scaled}
    c = compare_runs(runs, inputs, which=["lyapunov"], options={"lyapunov": {"k": 1}})
    t = c.table
    cols = list(t.columns)
    i = cols.index("lyapunov_max")
    assert cols[i:i + 5] == ["lyapunov_max", "lyapunov_max low", "lyapunov_max high",
                             "Δ lyapunov_max", "Δ lyapunov_max within noise"]
    # reference: the expanded percentile bootstrap of the mean per-sequence exponent by hand
    # with numpy and scipy (Efron & Tibshirani 1993, ch. 13; tails from Hesterberg 2015),
    # the same resampling indices as the library (default_rng(seed), n_boot rows of B draws)
    B, n_boot = 12, 200
    idx = np.random.default_rng(0).integers(0, B, size=(n_boot, B))
    tail = 100 * stats.norm.cdf(np.sqrt(B / (B - 1)) * stats.t.ppf(0.05, B - 1))
    per = {n: np.asarray(c.results[n]["lyapunov"].per_sample)[:, 0] for n in c.names}
    for n in c.names:
        lo, hi = np.percentile(per[n][idx].mean(axis=1), [tail, 100 - tail])
        assert_allclose([t.loc[n, "lyapunov_max low"], t.loc[n, "lyapunov_max high"]],
                        [lo, hi], rtol=1e-10)
    for n in ("same", "scaled"):
        d = per[n][idx].mean(axis=1) - per["a"][idx].mean(axis=1)
        lo, hi = np.percentile(d, [tail, 100 - tail])
        assert t.loc[n, "Δ lyapunov_max within noise"] == bool(lo <= 0 <= hi)
    assert t.loc["a", "Δ lyapunov_max within noise"] is None
    assert t.loc["same", "Δ lyapunov_max within noise"] is True  # identical weights
    assert t.loc["scaled", "Δ lyapunov_max within noise"] is False
    assert c.noise("lyapunov_max", "scaled") is False and c.noise("lyapunov_max", "a") is None
    assert set(c.intervals) == set(c.names)
    # intervals=False: the plain table of before
    plain = compare_runs(runs, inputs, which=["lyapunov"], options={"lyapunov": {"k": 1}},
                         intervals=False)
    assert plain.intervals is None
    assert not [k for k in plain.table.columns if k.endswith((" low", " high", " noise"))]
    assert_allclose(plain.table["lyapunov_max"], t["lyapunov_max"])
    wide = compare_runs(runs, inputs, which=["lyapunov"], options={"lyapunov": {"k": 1}},
                        intervals={"level": 0.99})
    assert (wide.table["lyapunov_max low"] < t["lyapunov_max low"]).all()
    with pytest.raises(ValueError, match="unknown keys"):
        compare_runs(runs, inputs, which=["lyapunov"], intervals={"levels": 0.9})
    with pytest.raises(TypeError, match="intervals must be"):
        compare_runs(runs, inputs, which=["lyapunov"], intervals="yes")


def test_compare_runs_draw_intervals_on_request(runs, inputs):
    opts = {"memory": {"max_lag": 5, "n_steps": 300}}
    two = dict(list(runs.items())[:2])
    c = compare_runs(two, inputs, which=["memory"], options=opts)
    assert "memory_capacity low" not in c.table.columns  # draws cost reruns: off by default
    c = compare_runs(two, inputs, which=["memory"], options=opts, intervals={"n_draws": 2})
    assert c.intervals["rnn"].methods[c.intervals["rnn"].figures.index("memory_capacity")] \
        == "draws"
    # the range of the point value and two reruns with seeds 1, 2 (a rough range, not a
    # calibrated interval: the point value may fall outside its 90% percentiles)
    lo, hi = c.table["memory_capacity low"], c.table["memory_capacity high"]
    assert np.isfinite(lo).all() and (lo <= hi).all()
