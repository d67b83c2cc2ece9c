"""Jacobian spectra: singular values against numpy/torch on the materialised Jacobians."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._analyses.spectra import top_singular_values


@pytest.fixture
def gru_trace(make, gen):
    model = make(nn.GRU, 4, 24, num_layers=2, gen=gen, scale=0.5)
    inputs = np.random.default_rng(0).normal(size=(3, 9, 4)).astype(np.float32)
    return model, hl.record(model, inputs)


def _rel_err(got, ref):
    return np.max(np.abs(got - ref) / ref)


def test_full_spectrum_equals_numpy_svd(gru_trace):
    model, trace = gru_trace
    J = hl.jacobians(model, trace, dtype="float64")  # (B, T, S, S)
    ref = np.linalg.svd(J, compute_uv=False)
    rho = np.abs(np.linalg.eigvals(J)).max(-1)
    # reference: numpy.linalg.svd and numpy.linalg.eigvals on the materialised Jacobians
    res = hl.jacobian_spectra(model, trace)  # defaults: all S values at tol 1e-3, bounds only
    assert res.method == "gram" and res.k == 48 and res.tol == 1e-3
    assert _rel_err(res.singular_values, ref) <= 1e-3
    assert res.spectral_radius is None
    low, high = res.radius_bounds[..., 0], res.radius_bounds[..., 1]
    # |det J|^(1/S) <= rho <= sigma_1 (common practice: Weyl's inequalities)
    assert np.all(low <= rho * (1 + 1e-3)) and np.all(rho <= high * (1 + 1e-3))
    exact = hl.jacobian_spectra(model, trace, method="svd", radius=True)
    np.testing.assert_allclose(exact.singular_values, ref, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(exact.spectral_radius, rho, rtol=1e-10)
    assert exact.radius_bounds is None
    assert np.all(np.diff(res.singular_values, axis=-1) <= 0)


def _relu_rnn(*args, **kw):
    return nn.RNN(*args, nonlinearity="relu", **kw)


CELLS = {"gru": (nn.GRU, {}), "lstm": (nn.LSTM, {}), "rnn_tanh": (nn.RNN, {}),
         "rnn_relu": (_relu_rnn, {}), "gru_2layers": (nn.GRU, {"num_layers": 2})}


@pytest.mark.parametrize("method", ["auto", "gram", "svd", "krylov"])
@pytest.mark.parametrize("cell", list(CELLS))
@pytest.mark.parametrize("k", [4, None])
def test_every_method_meets_the_default_tolerance(cell, method, k, make, gen):
    cls, kw = CELLS[cell]
    model = make(cls, 3, 24, gen=gen, scale=0.4, **kw)
    trace = hl.record(model, np.random.default_rng(1).normal(size=(2, 6, 3)).astype(np.float32))
    res = hl.jacobian_spectra(model, trace, k=k, method=method)
    J = hl.jacobians(model, trace, dtype="float64")
    S = J.shape[-1]
    ref = np.linalg.svd(J, compute_uv=False)[..., :k or S]  # reference: numpy.linalg.svd
    floor = 1e-3 * ref[..., :1] if method == "krylov" else 0.0  # krylov's stated scale
    assert np.all(np.abs(res.singular_values - ref) <= 1e-3 * np.maximum(ref, floor)
                  + 1e-12 * ref[..., :1])
    assert res.method == ("gram" if method == "auto" else method)


@pytest.mark.parametrize("cls", [nn.GRU, nn.LSTM, nn.RNN])
def test_smaller_tol_gives_more_digits(cls, make, gen):
    model = make(cls, 3, 32, gen=gen, scale=0.3)
    trace = hl.record(model, np.random.default_rng(1).normal(size=(2, 4, 3)).astype(np.float32))
    J = torch.from_numpy(hl.jacobians(model, trace, dtype="float64"))
    ref = torch.linalg.svdvals(J).numpy()  # reference: torch.linalg.svdvals
    for method in ("gram", "krylov"):
        res = hl.jacobian_spectra(model, trace, k=4, method=method, tol=1e-8)
        np.testing.assert_allclose(res.singular_values, ref[..., :4], rtol=1e-7)
        assert res.spectral_radius is None
    res = hl.jacobian_spectra(model, trace, method="gram", tol=1e-10)
    np.testing.assert_allclose(res.singular_values, ref, rtol=1e-9, atol=1e-14)


def test_auto_picks_gram_for_top_k(gru_trace):
    model, trace = gru_trace
    assert hl.jacobian_spectra(model, trace, k=3).method == "gram"
    assert hl.jacobian_spectra(model, trace, k=3).radius_bounds[..., 0].size == 27
    assert np.isnan(hl.jacobian_spectra(model, trace, k=3).radius_bounds[..., 0]).all()
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


@pytest.mark.parametrize("method", ["gram", "svd", "krylov"])
def test_streaming_in_chunks_equals_one_batch(gru_trace, method):
    model, trace = gru_trace
    whole = hl.jacobian_spectra(model, trace, k=5, method=method, radius=True, chunk=10**6)
    for chunk in (1, 4):
        part = hl.jacobian_spectra(model, trace, k=5, method=method, radius=True, chunk=chunk)
        np.testing.assert_allclose(part.singular_values, whole.singular_values,
                                   rtol=1e-3 if method == "krylov" else 1e-9)
        np.testing.assert_allclose(part.spectral_radius, whole.spectral_radius, rtol=1e-9)


def test_non_finite_steps_are_excluded_and_named(gru_trace):
    model, trace = gru_trace
    states = np.array(trace.states)
    states[1, 4:] = np.nan
    broken = hl.Trace(states, trace.initial, trace.inputs, trace.parts, trace.metadata)
    with pytest.warns(RuntimeWarning, match=r"4 of 27 steps .*sample 1, step 5"):
        res = hl.jacobian_spectra(model, broken, k=3)
    assert np.isnan(res.singular_values[1, 5:]).all()
    assert np.isfinite(res.singular_values[0]).all() and np.isfinite(res.median).all()
    assert res.excluded.tolist() == [[1, 5], [1, 6], [1, 7], [1, 8]]
    finite = res.singular_values.reshape(-1, 3)
    finite = finite[np.isfinite(finite).all(1)]
    np.testing.assert_allclose(res.median, np.median(finite, axis=0))  # reference: numpy
    assert "4 of 27 steps excluded" in repr(res) and "sample 1, step 5" in repr(res)
    clean = hl.jacobian_spectra(model, trace, k=3)
    assert clean.excluded.shape == (0, 2) and "excluded" not in repr(clean)


def test_all_steps_non_finite(gru_trace):
    model, trace = gru_trace
    broken = hl.Trace(np.full_like(trace.states, np.inf), trace.initial * np.nan, trace.inputs,
                      trace.parts, trace.metadata)
    with pytest.warns(RuntimeWarning, match="27 of 27 steps"):
        res = hl.jacobian_spectra(model, broken, k=2, radius=True)
    assert np.isnan(res.median).all() and np.isnan(res.spectral_radius).all()
    assert len(res.excluded) == 27


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


def test_thread_count_is_given_back(gru_trace):
    model, trace = gru_trace
    before = torch.get_num_threads()
    hl.jacobian_spectra(model, trace, k=3, radius=True)
    assert torch.get_num_threads() == before


def test_worker_threads_give_the_same_values(gru_trace):
    # chunks on two worker threads (one torch thread each) against one worker, and both
    # against numpy.linalg.svd of the materialised Jacobians (reference)
    model, trace = gru_trace
    ref = np.linalg.svd(hl.jacobians(model, trace, dtype="float64"), compute_uv=False)
    before = torch.get_num_threads()
    one = hl.jacobian_spectra(model, trace, k=6, chunk=2, threads=1)
    two = hl.jacobian_spectra(model, trace, k=6, chunk=2, threads=2)
    assert torch.get_num_threads() == before
    np.testing.assert_allclose(two.singular_values, one.singular_values, rtol=1e-6)
    assert _rel_err(two.singular_values, ref[..., :6]) <= 1e-3
    seen = []
    hl.jacobian_spectra(model, trace, k=2, chunk=3, threads=2,
                        progress=lambda done, total, label: seen.append((done, total)))
    assert seen == [(1, 3), (2, 3), (3, 3)]  # reported from the calling thread, in order


def test_float32_first_pass_hands_small_values_to_float64(gen):
    # J = diag(d) W with d spanning 1e-4..1: the float32 Gram cannot vouch for the smallest
    # values, which must still match numpy.linalg.svd (reference) at tol
    W = torch.linalg.qr(torch.randn(40, 40, generator=gen, dtype=torch.float64))[0]
    d = torch.logspace(0, -4, 40, dtype=torch.float64)

    def step(s, x):
        return (d * (s @ W.T)) + x

    system = hl.wrap(step, state_size=40, input_size=40, dtype=torch.float64)
    trace = hl.record(system, np.random.default_rng(4).normal(size=(1, 3, 40)))
    res = hl.jacobian_spectra(system, trace)
    ref = np.linalg.svd((d[:, None] * W).numpy(), compute_uv=False)
    assert _rel_err(res.singular_values[0], np.tile(ref, (3, 1))) <= 1e-3


def test_spectra_inside_a_worker_thread_runs_there(gru_trace):
    # a call made from one of the library's own worker threads must not wait on that pool
    from hiddenlens._core.threads import parallel_map

    model, trace = gru_trace
    out = parallel_map(lambda c: hl.jacobian_spectra(model, trace, k=2, chunk=c, threads=2)
                       .singular_values, [1, 2, 3], 2)
    np.testing.assert_allclose(out[0], out[2], rtol=1e-6)
