"""Padded steps of variable-length batches (record(lengths=...)) are left out of every analysis.

Reference: the same analysis on the trimmed batch, recorded from the inputs cut to their real
length (each sequence alone for per-sequence results; the whole batch cut to a common length for
pooled ones), and numpy's quantile and least-squares fit for pooled summaries. Padding is filled
with large noise, so any padded step that leaked in would change the figures.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl

F64 = torch.float64
N_REAL = [40, 23, 31, 17, 40, 28]
T = 40


@pytest.fixture
def system():
    torch_gen = torch.Generator().manual_seed(3)
    gru = nn.GRU(2, 4, batch_first=True, dtype=F64, device="meta").to_empty(device="cpu")
    with torch.no_grad():
        for p in gru.parameters():
            p.copy_(torch.randn(p.shape, generator=torch_gen, dtype=F64) * 0.9)
    return hl.wrap(gru, dtype=F64)


def padded_inputs(seed=0, lengths=N_REAL, noise=50.0):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((len(lengths), T, 2))
    pad = rng.standard_normal(x.shape) * noise
    real = np.arange(T)[None, :, None] < np.array(lengths)[:, None, None]
    return np.where(real, x, pad)


def alone(system, x, b, n):
    """The trimmed reference of sequence b: recorded from its real steps only."""
    return hl.record(system, x[b:b + 1, :n])


def test_spectra_leave_padding_out(system):
    x = padded_inputs()
    tr = hl.record(system, x, lengths=N_REAL)
    res = hl.jacobian_spectra(system, tr, method="svd", radius=True)
    refs = []
    for b, n in enumerate(N_REAL):
        ref = hl.jacobian_spectra(system, alone(system, x, b, n), method="svd", radius=True)
        assert np.abs(res.singular_values[b, :n] - ref.singular_values[0]).max() <= 1e-12
        assert np.abs(res.spectral_radius[b, :n] - ref.spectral_radius[0]).max() <= 1e-12
        assert np.isnan(res.singular_values[b, n:]).all()
        refs.append(ref.singular_values[0])
    pooled = np.concatenate(refs)  # (sum n_b, k): numpy's quantiles of the real steps
    assert np.allclose(res.quantiles, np.quantile(pooled, res.quantile_levels, axis=0),
                       rtol=0, atol=1e-12)
    assert len(res.excluded) == 0 and res.metadata["padded_steps"] == T * 6 - sum(N_REAL)


def test_gradient_flow_ends_each_sequence_at_its_length(system):
    x = padded_inputs()
    tr = hl.record(system, x, lengths=N_REAL)
    res = hl.gradient_flow(system, tr)
    assert res.metadata["ends"] == [n - 1 for n in N_REAL]
    for b, n in enumerate(N_REAL):
        ref = hl.gradient_flow(system, alone(system, x, b, n))
        L = ref.log_norms.shape[1]  # lags 1 .. n - 1
        assert np.abs(res.log_norms[b, :L] - ref.log_norms[0]).max() <= 1e-10
        assert np.abs(res.log_frobenius[b, :L] - ref.log_frobenius[0]).max() <= 1e-10
        assert abs(res.rates[b] - ref.rates[0]) <= 1e-8 or L + 1 < res.lags.size
        assert np.isnan(res.log_norms[b, n:]).all()  # lag n would reach before the initial state
    # the pooled rate: numpy's least-squares line through the mean over the sequences that
    # reach each lag
    mean = np.nanmean(res.log_norms, axis=0)
    slope = np.polyfit(res.lags.astype(float), mean, 1)[0]
    assert abs(res.rate - slope) <= 1e-10


def test_lyapunov_counts_real_steps_only(system):
    x = padded_inputs()
    tr = hl.record(system, x, lengths=N_REAL)
    res = hl.lyapunov_spectrum(system, tr, warmup=5)
    assert res.metadata["counted_steps"] == [n - 5 for n in N_REAL]
    for b, n in enumerate(N_REAL):
        ref = hl.lyapunov_spectrum(system, alone(system, x, b, n), warmup=5)
        # the sum of all S exponents is the mean log |det J_t| whatever the random frame
        # (det of an orthonormal frame is +-1: Benettin et al. 1980)
        assert abs(res.per_sample[b].sum() - ref.per_sample[0].sum()) <= 1e-10
        # (single exponents depend on the random start frame at these lengths: sample b of a
        # batch draws another frame than a batch of one, hence the common-length check below)
    # a common length: the trimmed batch itself, with the same random frames (exact)
    n = 25
    x = padded_inputs(lengths=[n] * 6)
    common = hl.lyapunov_spectrum(system, hl.record(system, x, lengths=[n] * 6), warmup=5)
    trimmed = hl.lyapunov_spectrum(system, hl.record(system, x[:, :n]), warmup=5)
    assert np.abs(common.per_sample - trimmed.per_sample).max() <= 1e-12
    assert np.abs(common.running - trimmed.running).max() <= 1e-12


def common_and_trimmed(system, n=30, seed=1):
    x = padded_inputs(seed, lengths=[n] * 6)
    return hl.record(system, x, lengths=[n] * 6), hl.record(system, x[:, :n]), x


def test_memory_data_mode_leaves_padding_out(system):
    for method in ("decoding", "perturbation", "sensitivity"):
        padded, trimmed, _ = common_and_trimmed(system)
        opts = dict(method=method, mode="data", max_lag=6, washout=6, n_folds=3)
        a = hl.memory_curve(system, padded, **opts)
        b = hl.memory_curve(system, trimmed, **opts)
        assert np.abs(a.scores - b.scores).max() <= 1e-10, method
        # unequal lengths: what the padding holds does not matter
        x1, x2 = padded_inputs(2, noise=50.0), padded_inputs(2, noise=0.0)
        c = hl.memory_curve(system, hl.record(system, x1, lengths=N_REAL), **opts)
        d = hl.memory_curve(system, hl.record(system, x2, lengths=N_REAL), **opts)
        assert np.abs(c.scores - d.scores).max() <= 1e-10, method


def test_task_memory_leaves_padding_out(system):
    padded, trimmed, _ = common_and_trimmed(system)
    y = np.array([0, 1, 0, 1, 1, 0])
    opts = dict(max_lag=10, n_folds=2, n_permutations=3, level=0.25)
    a = hl.task_memory(padded, y, **opts)
    b = hl.task_memory(trimmed, y, **opts)
    assert np.allclose(a.scores, b.scores, rtol=0, atol=1e-8, equal_nan=True)
    ys = np.random.default_rng(0).standard_normal((6, T))  # per-step targets
    a = hl.task_memory(padded, ys, max_lag=4, n_folds=2, n_permutations=3, level=0.25)
    b = hl.task_memory(trimmed, ys[:, :30], max_lag=4, n_folds=2, n_permutations=3,
                       level=0.25)
    assert np.allclose(a.scores, b.scores, rtol=0, atol=1e-10)
    lens = [30, 12, 25, 30, 20, 18]
    x1, x2 = padded_inputs(4, lengths=lens, noise=50.0), padded_inputs(4, lengths=lens, noise=0)
    c = hl.task_memory(hl.record(system, x1, lengths=lens), y, **opts)
    d = hl.task_memory(hl.record(system, x2, lengths=lens), y, **opts)
    assert np.allclose(c.scores, d.scores, rtol=0, atol=1e-10, equal_nan=True)
    assert (c.n_rows[15:] < 6).all()  # lags past the short sequences' ends have no row there


def test_fixed_points_start_from_real_steps(system):
    padded, trimmed, _ = common_and_trimmed(system)
    opts = dict(n_starts=20, seed=0, x="mean")
    a = hl.find_fixed_points(system, padded, **opts)
    b = hl.find_fixed_points(system, trimmed, **opts)
    assert np.abs(a.points - b.points).max() <= 1e-10
    assert np.abs(a.distance_to_states - b.distance_to_states).max() <= 1e-10


def test_run_analyses_with_lengths_equals_the_trimmed_batch(system):
    # every registered analysis (the context-free ones) on a common length
    padded, trimmed, x = common_and_trimmed(system)
    which = [a for a in hl.analyses() if a != "task_memory"]
    opts = {"memory": {"mode": "data", "max_lag": 6, "washout": 6, "n_folds": 3}}
    a = hl.run_analyses(system, x, which=which, options=opts, lengths=[30] * 6)
    b = hl.run_analyses(system, x[:, :30], which=which, options=opts)
    from hiddenlens._analyses.figures import key_figures

    fa, fb = key_figures(a), key_figures(b)
    assert set(a) == set(which) and fa.keys() == fb.keys()
    for key, va in fa.items():
        if isinstance(va, float):
            assert va == pytest.approx(fb[key], rel=1e-8, abs=1e-10, nan_ok=True), key
        else:
            assert va == fb[key], key
