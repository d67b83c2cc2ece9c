"""Jacobian spectra: singular values against numpy/torch on the materialised Jacobians."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._spectra import top_singular_values


@pytest.fixture
def gru_trace(make, gen):
    model = make(nn.GRU, 4, 24, num_layers=2, gen=gen, scale=0.5)
    inputs = np.random.default_rng(0).normal(size=(3, 9, 4)).astype(np.float32)
    return model, hl.record(model, inputs)


def test_full_spectrum_equals_numpy_svd(gru_trace):
    model, trace = gru_trace
    res = hl.jacobian_spectra(model, trace)
    J = hl.jacobians(model, trace, dtype="float64")  # (B, T, S, S)
    # reference: numpy.linalg.svd and numpy.linalg.eigvals on the materialised Jacobians
    np.testing.assert_allclose(res.singular_values, np.linalg.svd(J, compute_uv=False),
                               rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(res.spectral_radius, np.abs(np.linalg.eigvals(J)).max(-1),
                               rtol=1e-10)
    assert res.method == "svd" and res.k == 48
    assert np.all(np.diff(res.singular_values, axis=-1) <= 0)


@pytest.mark.parametrize("method", ["gram", "krylov"])
@pytest.mark.parametrize("cls", [nn.GRU, nn.LSTM, nn.RNN])
def test_top_k_equals_svdvals(cls, method, make, gen):
    model = make(cls, 3, 32, gen=gen, scale=0.3)
    trace = hl.record(model, np.random.default_rng(1).normal(size=(2, 4, 3)).astype(np.float32))
    res = hl.jacobian_spectra(model, trace, k=4, method=method, tol=1e-6)
    J = torch.from_numpy(hl.jacobians(model, trace, dtype="float64"))
    ref = torch.linalg.svdvals(J)[..., :4].numpy()
    # reference: torch.linalg.svdvals, 1e-4 relative on the top k
    np.testing.assert_allclose(res.singular_values, ref, rtol=1e-4)
    assert res.method == method and res.spectral_radius is None


def test_auto_picks_gram_for_top_k(gru_trace):
    model, trace = gru_trace
    assert hl.jacobian_spectra(model, trace, k=3).method == "gram"
    assert hl.jacobian_spectra(model, trace, k=3, radius=True).spectral_radius.shape == (3, 9)


def test_rank_deficient_jacobians(gen):
    # J = diag(mask) W with 3 live units: rank 3, so the 4th and 5th singular values are 0
    W = torch.randn(32, 32, generator=gen, dtype=torch.float64) / 32**0.5
    mask = torch.zeros(32, dtype=torch.float64)
    mask[:3] = 1.0

    def step(s, x):
        return mask * (s @ W.T) + x

    system = hl.wrap(step, state_size=32, input_size=32, dtype=torch.float64)
    inputs = np.random.default_rng(2).normal(size=(1, 2, 32))
    trace = hl.record(system, inputs)
    ref = np.linalg.svd((mask[:, None] * W).numpy(), compute_uv=False)[:5]  # numpy reference
    for method in ("gram", "krylov", "svd"):
        res = hl.jacobian_spectra(system, trace, k=5, method=method)
        # zero singular values come out at rounding level (squared: ~1e-8 of the largest)
        np.testing.assert_allclose(res.singular_values[0], np.tile(ref, (2, 1)),
                                   rtol=1e-6, atol=1e-6 * ref[0])


def test_krylov_on_dense_and_callable(gen):
    A = torch.randn(6, 50, 50, generator=gen, dtype=torch.float64)
    ref = torch.linalg.svdvals(A)[:, :3]
    # reference: torch.linalg.svdvals
    torch.testing.assert_close(top_singular_values(A, 3, tol=1e-8, generator=gen), ref,
                               rtol=1e-6, atol=0)
    W = torch.randn(30, 30, generator=gen, dtype=torch.float64) / 30**0.5
    system = hl.wrap(lambda s, x: torch.tanh(s @ W.T + x), state_size=30, input_size=30,
                     dtype=torch.float64)
    trace = hl.record(system, np.random.default_rng(3).normal(size=(2, 5, 30)))
    res = hl.jacobian_spectra(system, trace, k=2, method="krylov")
    J = torch.from_numpy(hl.jacobians(system, trace))
    np.testing.assert_allclose(res.singular_values, torch.linalg.svdvals(J)[..., :2].numpy(),
                               rtol=1e-4)


def test_summaries_and_chunks(gru_trace):
    model, trace = gru_trace
    res = hl.jacobian_spectra(model, trace, k=5, quantiles=(0.1, 0.5, 0.9))
    flat = res.singular_values.reshape(-1, 5)
    # reference: numpy.quantile / numpy.median over samples and steps
    np.testing.assert_allclose(res.quantiles, np.quantile(flat, [0.1, 0.5, 0.9], axis=0))
    np.testing.assert_allclose(res.median, np.median(flat, axis=0))
    again = hl.jacobian_spectra(model, trace, k=5, chunk=1)
    np.testing.assert_allclose(again.singular_values, res.singular_values, rtol=1e-9)


def test_non_finite_steps_give_nan(gru_trace):
    model, trace = gru_trace
    states = np.array(trace.states)
    states[1, 4:] = np.nan
    broken = hl.Trace(states, trace.initial, trace.inputs, trace.parts, trace.metadata)
    res = hl.jacobian_spectra(model, broken, k=3)
    assert np.isnan(res.singular_values[1, 5:]).all()
    assert np.isfinite(res.singular_values[0]).all() and np.isfinite(res.median).all()


def test_result_is_frozen_and_draws(gru_trace):
    import matplotlib.pyplot as plt

    model, trace = gru_trace
    res = hl.jacobian_spectra(model, trace, k=4, radius=True)
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.method = "x"
    with pytest.raises(ValueError):
        res.singular_values[0, 0, 0] = 1.0
    fig, ax = plt.subplots()
    assert res.plot(ax=ax) is ax
    assert res.plot(ax=ax, sample=1) is ax
    df = res.to_frame()
    assert df.shape == (27, 5) and list(df.columns)[-1] == "spectral_radius"
    plt.close(fig)


def test_model_left_unchanged(make, gen, snapshot):
    model = make(nn.LSTM, 2, 5, gen=gen)
    snap = snapshot(model)
    trace = hl.record(model, np.ones((1, 3, 2), dtype=np.float32))
    hl.jacobian_spectra(model, trace, k=2)
    snap.assert_unchanged()


def test_bad_options(gru_trace):
    model, trace = gru_trace
    with pytest.raises(ValueError, match=r"The 'k' option of jacobian_spectra must be None or an "
                                         r"int >= 1; got 0\."):
        hl.jacobian_spectra(model, trace, k=0)
    with pytest.raises(ValueError, match=r"k must be an integer in \[1, 48\]"):
        hl.jacobian_spectra(model, trace, k=49)
    with pytest.raises(ValueError, match="'method' option of jacobian_spectra must be one of"):
        hl.jacobian_spectra(model, trace, method="lanczos")
    with pytest.raises(ValueError, match=r"quantiles must be levels in \[0, 1\]"):
        hl.jacobian_spectra(model, trace, quantiles=[1.5])
    with pytest.raises(ValueError, match=r"'tol' option of jacobian_spectra must be a float in"):
        hl.jacobian_spectra(model, trace, k=2, tol=0)
    with pytest.raises(ValueError, match="sample must be in"):
        hl.jacobian_spectra(model, trace, k=2).plot(sample=7)
