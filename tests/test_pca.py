"""Tests of pca_trajectories: PCA trajectories, variance spectrum and participation ratio."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._analyses.pca import PCATrajectories, pca_trajectories
from hiddenlens._core.trace import Trace


def _trace(states, parts=None):
    states = np.asarray(states)
    B, T, S = states.shape
    return Trace(states, np.zeros((B, S), states.dtype), np.zeros((B, T, 0), states.dtype),
                 parts or {"state": slice(0, S)}, {})


def _correlated(B=6, T=80, S=7, seed=0, dtype=np.float64):
    gen = np.random.default_rng(seed)
    mix = gen.normal(size=(S, S)) * np.linspace(2.0, 0.1, S)
    return _trace((gen.normal(size=(B, T, S)) @ mix.T + 3.0).astype(dtype))


@pytest.fixture
def agg():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    yield plt
    plt.close("all")


@pytest.fixture(scope="module")
def gru_run():
    torch.manual_seed(0)
    module = nn.GRU(3, 8, batch_first=True)
    gen = np.random.default_rng(1)
    tr = hl.record(module, torch.tensor(gen.normal(size=(5, 40, 3)), dtype=torch.float32))
    return module, tr


# ---------------------------------------------------------------------- against numpy
@pytest.mark.parametrize("solver", ["full", "covariance_eigh", "arpack", "randomized"])
def test_explained_variance_matches_numpy_eigh_of_the_covariance(solver):
    tr = _correlated()
    res = pca_trajectories(tr, k=3, svd_solver=solver)
    X = tr.states.reshape(-1, tr.state_size)
    # reference library: numpy.linalg.eigh of numpy.cov (unbiased, like scikit-learn)
    lam, vec = np.linalg.eigh(np.cov(X, rowvar=False))
    lam, vec = lam[::-1], vec[:, ::-1]
    np.testing.assert_allclose(res.spectrum, lam, rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(res.explained_variance, lam[:3], rtol=1e-6)
    np.testing.assert_allclose(res.explained_variance_ratio, lam[:3] / lam.sum(), rtol=1e-6)
    np.testing.assert_allclose(res.cumulative, np.cumsum(lam) / lam.sum(), rtol=1e-8)
    np.testing.assert_allclose(res.participation_ratio, lam.sum() ** 2 / (lam**2).sum(),
                               rtol=1e-8)
    # the axes are the eigenvectors up to sign, and projecting uses them
    np.testing.assert_allclose(np.abs(np.sum(res.components * vec[:, :3].T, axis=1)), 1.0,
                               atol=1e-6)
    B, T, _ = tr.states.shape
    proj = ((X - X.mean(0)) @ res.components.T).reshape(B, T, 3)
    np.testing.assert_allclose(res.projected, proj, atol=1e-8)
    assert res.n_components_90 == np.searchsorted(np.cumsum(lam) / lam.sum(), 0.9) + 1
    assert res.n_components_95 == np.searchsorted(np.cumsum(lam) / lam.sum(), 0.95) + 1


def test_participation_ratio_of_isotropic_gaussian_is_its_dimension():
    d = 8
    gen = np.random.default_rng(3)
    tr = _trace(gen.normal(size=(40, 500, d)))
    res = pca_trajectories(tr, k=2)
    # common practice (Gao et al. 2017): isotropic variance in d dimensions gives PR = d;
    # with 20 000 samples the estimate is within a few percent
    assert res.participation_ratio == pytest.approx(d, rel=0.03)
    assert res.n_components_90 >= d - 1


@pytest.mark.parametrize("k", [1, 2, 4])
def test_participation_ratio_on_a_k_dimensional_subspace_is_at_most_k(k):
    gen = np.random.default_rng(k)
    basis = np.linalg.qr(gen.normal(size=(12, k)))[0]  # (S, k) orthonormal
    scales = np.array([3.0, 1.0, 0.5, 0.2])[:k]
    Z = gen.normal(size=(4, 300, k)) * scales
    res = pca_trajectories(_trace(Z @ basis.T), k=k)
    # analytic: only k covariance eigenvalues are non-zero, so (Σλ)²/Σλ² <= k (Cauchy-Schwarz)
    assert res.participation_ratio <= k + 1e-9
    np.testing.assert_allclose(res.spectrum[k:], 0.0, atol=1e-10)
    np.testing.assert_allclose(res.cumulative[k - 1:], 1.0, atol=1e-10)
    lam = scales**2
    assert res.participation_ratio == pytest.approx(lam.sum() ** 2 / (lam**2).sum(), rel=0.1)


def test_wide_states_with_few_samples_use_the_small_gram_matrix():
    gen = np.random.default_rng(0)
    tr = _trace(gen.normal(size=(2, 5, 30)))  # 10 states of 30 units
    res = pca_trajectories(tr, k=4)
    X = tr.states.reshape(10, 30)
    # reference library: numpy.linalg.eigvalsh of numpy.cov
    lam = np.linalg.eigvalsh(np.cov(X, rowvar=False))[::-1]
    np.testing.assert_allclose(res.spectrum, np.clip(lam, 0, None), atol=1e-10)
    assert res.spectrum.shape == (30,)


# ---------------------------------------------------------------------- parts and projecting
def test_parts_and_projection_of_another_trace_into_the_same_basis():
    torch.manual_seed(0)
    module = nn.LSTM(2, 4, batch_first=True)
    gen = np.random.default_rng(0)
    tr = hl.record(module, torch.tensor(gen.normal(size=(3, 30, 2)), dtype=torch.float32))
    other = hl.record(module, torch.tensor(gen.normal(size=(2, 12, 2)), dtype=torch.float32))
    res = pca_trajectories(tr, k=2, parts="layer0.h")
    np.testing.assert_array_equal(res.columns, np.arange(4))
    assert res.parts == ("layer0.h",)
    np.testing.assert_allclose(res.project(tr), res.projected, atol=1e-10)
    # reference library: the fitted scikit-learn PCA's own transform
    ref = res.pca.transform(other.part("layer0.h").reshape(-1, 4).astype(np.float64))
    np.testing.assert_allclose(res.project(other), ref.reshape(2, 12, 2), atol=1e-10)
    # flat states (e.g. fixed points) project by their full length S
    flat = other.states[0]  # (12, 8)
    np.testing.assert_allclose(res.project(flat), ref[:12], atol=1e-10)
    both = pca_trajectories(tr, k=2, parts=["layer0.h", "layer0.c"])
    np.testing.assert_array_equal(both.columns, np.arange(8))


def test_projecting_a_trace_of_another_layout_fails_clearly(gru_run):
    _, tr = gru_run
    res = pca_trajectories(tr)
    wrong = _trace(np.zeros((1, 3, 8)))  # same size, another part layout
    with pytest.raises(ValueError, match="PCA was fitted on parts"):
        res.project(wrong)
    with pytest.raises(ValueError, match=r"must have shape \(\.\.\., 8\)"):
        res.project(np.zeros((3, 5)))
    assert res.project(wrong.states).shape == (1, 3, 3)


# ---------------------------------------------------------------------- contract
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_result_is_frozen_read_only_and_leaves_the_trace_alone(dtype):
    tr = _correlated(dtype=dtype)
    before = tr.states.copy()
    res = pca_trajectories(tr)
    np.testing.assert_array_equal(tr.states, before)
    assert isinstance(res, PCATrajectories)
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.projected = None
    for arr in (res.projected, res.components, res.mean, res.explained_variance,
                res.explained_variance_ratio, res.spectrum, res.cumulative, res.columns):
        assert not arr.flags.writeable
    assert res.projected.dtype == np.float64 and res.projected.shape == (6, 80, 3)
    again = pca_trajectories(tr, svd_solver="randomized", seed=0)
    np.testing.assert_array_equal(again.projected,
                                  pca_trajectories(tr, svd_solver="randomized").projected)


def test_to_frame():
    res = pca_trajectories(_correlated(B=2, T=5), k=2)
    df = res.to_frame()
    assert list(df.columns) == ["PC1", "PC2"] and df.shape == (10, 2)
    assert df.index.names == ["sample", "step"]
    np.testing.assert_allclose(df.loc[(1, 3)].to_numpy(), res.projected[1, 3])
    assert "PCATrajectories(" in repr(res)


@pytest.mark.parametrize(
    ("kwargs", "match", "exc"),
    [
        ({"k": 0}, r"The 'k' option of pca_trajectories must be an int >= 1; got 0\.",
         ValueError),
        ({"k": 8}, r"k \(the number of components\) must be an integer from 1 to 7", ValueError),
        ({"k": 2.0}, "The 'k' option of pca_trajectories must be an int >= 1; got 2.0", TypeError),
        ({"parts": "layer9"}, "no part named 'layer9'", ValueError),  # as elsewhere
        ({"parts": []}, "parts is empty", ValueError),
    ],
)
def test_bad_options_fail_clearly(kwargs, match, exc):
    with pytest.raises(exc, match=match):
        pca_trajectories(_correlated(), **kwargs)


def test_bad_data_fails_clearly():
    with pytest.raises(TypeError, match="must be a hiddenlens Trace"):
        pca_trajectories(np.zeros((2, 3, 4)))
    states = np.ones((2, 6, 3))
    with pytest.raises(ValueError, match="do not vary"):
        pca_trajectories(_trace(states))
    states[1, 4, 0] = np.nan
    with pytest.raises(ValueError, match="NaN or Inf"):
        pca_trajectories(_trace(states))
    with pytest.raises(ValueError, match="at least two states"):
        pca_trajectories(_trace(np.ones((1, 1, 3))), k=1)


# ---------------------------------------------------------------------- plots
@pytest.mark.parametrize("color_by", ["time", "sample", "labels"])
def test_plot_2d(agg, gru_run, color_by):
    module, tr = gru_run
    res = pca_trajectories(tr)
    colours = np.array(["red", "green", "red", "blue", "green"]) if color_by == "labels" \
        else color_by
    fig, ax = agg.subplots()
    assert res.plot(ax, color_by=colours) is ax
    assert ax.get_xlabel().startswith("PC1 (") and ax.get_ylabel().startswith("PC2 (")
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "start" in labels and "end" in labels
    if color_by == "labels":
        assert {"red", "green", "blue"} <= set(labels)


def test_plot_3d_with_other_traces_and_a_selection(agg, gru_run):
    module, tr = gru_run
    res = pca_trajectories(tr)
    other = hl.record(module, torch.zeros(1, 20, 3))
    ax = res.plot(dims=3, others={"silent input": other}, samples=[0, 2], steps=slice(5, 30))
    assert ax.name == "3d"
    assert "silent input" in [t.get_text() for t in ax.get_legend().get_texts()]
    ax2 = res.plot(others=[other, other], samples=1)
    assert "other 2" in [t.get_text() for t in ax2.get_legend().get_texts()]
    assert res.plot_variance().get_ylabel() == "fraction of variance"


def test_plot_options_fail_clearly(agg, gru_run):
    _, tr = gru_run
    res = pca_trajectories(tr, k=2)
    with pytest.raises(ValueError, match="refit with k=3"):
        res.plot(dims=3)
    with pytest.raises(ValueError, match="dims must be 2 or 3"):
        res.plot(dims=1)
    with pytest.raises(ValueError, match="color_by must be 'time', 'sample'"):
        res.plot(color_by="colour")
    with pytest.raises(ValueError, match=r"labels must have shape \(5,\)"):
        res.plot(color_by=[1, 2])
    with pytest.raises(ValueError, match="samples must index the 5 samples"):
        res.plot(samples=[7])
    with pytest.raises(TypeError, match="others must hold Traces"):
        res.plot(others=[np.zeros(3)])
    with pytest.raises(ValueError, match="a 3-D plot needs 3-D axes"):
        pca_trajectories(tr).plot(agg.subplots()[1], dims=3)


def test_public_name():
    assert hl.pca_trajectories is pca_trajectories


# ---------------------------------------------------------------------- call forms
def test_call_forms_agree_and_the_old_ones_warn():
    tr = _correlated()
    new = pca_trajectories(tr, k=2)
    np.testing.assert_array_equal(pca_trajectories(None, tr, k=2).projected, new.projected)
    with pytest.warns(DeprecationWarning, match="'n_components' option of pca_trajectories is "
                                                "now called 'k'"):
        old = pca_trajectories(tr, n_components=2)
    with pytest.warns(DeprecationWarning, match="pass them by keyword"):
        positional = pca_trajectories(tr, 2)
    np.testing.assert_array_equal(old.projected, new.projected)
    np.testing.assert_array_equal(positional.projected, new.projected)
    with pytest.raises(TypeError, match="both 'n_components'"):
        pca_trajectories(tr, k=2, n_components=2)
def test_lstm_default_fits_h_only():
    # h and c have different scales; the default keeps to h (common practice: analyse one
    # kind of state at a time)
    lstm = torch.nn.LSTM(3, 6, batch_first=True)
    x = np.random.default_rng(0).standard_normal((4, 30, 3)).astype(np.float32)
    tr = hl.record(lstm, x)
    res = pca_trajectories(tr, k=2)
    assert res.parts == ("layer0.h",)
    np.testing.assert_array_equal(res.columns, tr.columns("layer0.h"))
