"""Sweeps over runs: the gain transition of random tanh networks, engines that agree."""

import numpy as np
import pytest
import torch

import hiddenlens as hl

N, B, T = 64, 4, 200
GAINS = np.linspace(0.5, 2.0, 16)


def _runs():
    # h_t = tanh(g W h_{t-1} + w x_t), W Gaussian with variance 1/N: the largest Lyapunov
    # exponent rises with g and crosses zero near g = 1 (Sompolinsky, Crisanti & Sommers 1988,
    # Phys. Rev. Lett. 61, 259, for the continuous-time network; the same mean-field
    # transition at g = 1 holds for the discrete map with weak input - Molgedey, Schuchhardt
    # & Schuster 1992, Phys. Rev. Lett. 69, 3717). Shipped as factory name + state_dict.
    gen = torch.Generator().manual_seed(0)
    W = torch.randn(N, N, generator=gen) / N**0.5
    w = torch.randn(N, 1, generator=gen)
    kwargs = {"input_size": 1, "hidden_size": N, "batch_first": True, "bias": False}
    return [{"name": f"g={g:.2f}", "factory": "torch.nn:RNN", "kwargs": kwargs,
             "weights": {"weight_ih_l0": w.clone(), "weight_hh_l0": float(g) * W}}
            for g in GAINS]


INPUTS = 0.01 * np.random.default_rng(1).standard_normal((B, T, 1)).astype(np.float32)


def test_gain_sweep_on_dask_crosses_zero_near_one_and_matches_local():
    pytest.importorskip("dask.distributed")
    params = {"gain": GAINS}
    # the dask engine starts its own in-process LocalCluster (two single-thread workers)
    res = hl.sweep(_runs(), INPUTS, params=params, engine="dask", figures=["lyapunov_max"],
                   n_boot=20, progress=False)
    t = res.table
    assert t.error.isna().all(), t.error
    lam = t.lyapunov_max.to_numpy()
    from scipy.stats import spearmanr

    assert spearmanr(GAINS, lam).statistic > 0.9, lam  # increasing trend (rank correlation)
    assert lam[GAINS < 0.8].max() < 0 < lam[GAINS > 1.3].min()
    crossing = GAINS[np.argmax(lam > 0)]
    assert 0.8 <= crossing <= 1.3, crossing
    local = hl.sweep(_runs(), INPUTS, params=params, engine="local", n_jobs=2,
                     figures=["lyapunov_max"], n_boot=20, progress=False)
    # the same seeds give the same table from every engine
    np.testing.assert_allclose(local.values, res.values, rtol=1e-6)
    np.testing.assert_allclose(local.low, res.low, rtol=1e-6)
    assert list(local.table.columns) == ["name", "gain", "lyapunov_max", "lyapunov_max_low",
                                         "lyapunov_max_high", "error"]
    import matplotlib.pyplot as plt

    ax = res.plot("lyapunov_max", "gain")
    assert ax.get_xlabel() == "gain"
    plt.close("all")


def test_dask_engine_starts_beside_a_busy_default_port():
    pytest.importorskip("dask.distributed")
    import socket
    import warnings

    # another program holding 8787, dask's default HTTP port: the sweep must neither fail nor
    # warn (warnings are errors here)
    with socket.socket() as sock:
        try:
            sock.bind(("0.0.0.0", 8787))
            sock.listen()
        except OSError:
            pass  # already held by someone else: the same situation
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            res = hl.sweep(_runs()[:2], INPUTS[:, :40], engine="dask",
                           figures=["lyapunov_max"], n_boot=10, progress=False)
    assert res.table.error.isna().all()


def test_failing_run_is_reported_in_its_row():
    runs = _runs()[:2]
    runs.append({"name": "broken", "factory": "torch.nn:RNN", "kwargs": runs[0]["kwargs"],
                 "weights": {"weight_hh_l0": torch.zeros(3, 3)}})
    res = hl.sweep(runs, INPUTS[:, :50], engine="local", n_jobs=1, figures=["lyapunov_max"],
                   n_boot=10, progress=False)
    t = res.table
    assert t.error.iloc[:2].isna().all()
    assert "RuntimeError" in t.error.iloc[2] or "Error" in t.error.iloc[2]
    assert np.isnan(t.lyapunov_max.iloc[2])


def test_bad_arguments_fail_clearly():
    with pytest.raises(ValueError, match="engine"):
        hl.sweep(_runs()[:1], INPUTS, engine="spark")
    with pytest.raises(TypeError, match="importable"):
        hl.sweep([{"factory": lambda: None}], INPUTS)
    with pytest.raises(ValueError, match="one per run"):
        hl.sweep(_runs()[:2], INPUTS, params={"gain": [1.0]})
    with pytest.raises(ValueError, match="address"):
        hl.sweep(_runs()[:1], INPUTS, address="tcp://x:1")
