"""Monitor inside a plain training loop: figures over steps, the model untouched."""

import importlib.util

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl
from example_models import sorting_line as sl


def _train(monitor=None, steps=11):
    torch.manual_seed(0)  # the user's own global RNG; the monitor must not consume from it
    model = sl.make_tanh_rnn(gain=1.5, seed=3)
    opt = torch.optim.Adam(model.parameters(), lr=3e-3)
    model.train()
    for k in range(steps):
        data = sl.make_dataset(8, 40, seed=100 + k)
        x, y = torch.from_numpy(data.inputs), torch.from_numpy(data.targets)
        out = model(x) + 1e-3 * torch.randn(1)  # consumes the global RNG each step
        loss = nn.functional.cross_entropy(out.reshape(-1, out.shape[-1]), y.reshape(-1),
                                           ignore_index=sl.IGNORE)
        opt.zero_grad()
        loss.backward()
        opt.step()
        if monitor is not None:
            monitor.step(model, k)
    return model


def test_monitor_records_timeline_and_leaves_training_alone(tmp_path):
    probe = sl.make_inputs(4, 40, seed=7)
    mon = hl.Monitor(probe, every=5, n_boot=30)
    monitored = _train(mon)
    plain = _train(None)
    # identical weights: the monitor changed neither the model nor the user's RNG stream
    for (n, a), (_, b) in zip(monitored.state_dict().items(), plain.state_dict().items()):
        torch.testing.assert_close(a, b, rtol=0, atol=0, msg=n)
    assert monitored.training
    t = mon.timeline
    assert list(t.columns) == ["step", "figure", "value", "low", "high"]
    assert sorted(set(t.step)) == [0, 5, 10]
    assert set(t.figure) == set(hl._training.monitor.DEFAULT_FIGURES)
    lam = t[t.figure == "lyapunov_max"]
    assert np.all(lam.low <= lam.value) and np.all(lam.value <= lam.high)
    # the last check equals a direct analysis of the trained weights (library oracle)
    direct = hl.lyapunov_spectrum(monitored, hl.record(monitored, probe), k=1, warmup=10, seed=0)
    np.testing.assert_allclose(lam.value.iloc[-1], direct.exponents[0], rtol=1e-5)
    for ext in ("csv", "json"):
        path = tmp_path / f"timeline.{ext}"
        mon.save(path)
        back = hl.Monitor.load(path)
        np.testing.assert_allclose(back.timeline.value, t.value)
        np.testing.assert_array_equal(back.timeline.step, t.step)
    import matplotlib.pyplot as plt

    axes = mon.plot()
    assert len(axes) == 4
    plt.close("all")


def test_budget_schedule_and_bad_options():
    probe = sl.make_inputs(4, 40, seed=1)
    mon = hl.Monitor(probe, figures=["participation_ratio"], budget=0.5, n_boot=20)
    model = sl.make_gru(seed=0)
    assert mon.step(model, 0) is True  # the first step is always checked
    checked = sum(mon.step(model, k) for k in range(1, 5))
    assert checked <= 2  # no training time in between: the budget allows few checks
    with pytest.raises(ValueError, match="not both"):
        hl.Monitor(probe, every=5, budget=0.1)
    with pytest.raises(ValueError, match="unknown figures"):
        hl.Monitor(probe, figures=["loss"])
    with pytest.raises(ValueError, match="budget"):
        hl.Monitor(probe, budget=5)
    with pytest.raises(ValueError, match="shape"):
        hl.Monitor(probe[0])


@pytest.mark.skipif(importlib.util.find_spec("lightning") is None
                    and importlib.util.find_spec("pytorch_lightning") is None,
                    reason="PyTorch Lightning is not installed (optional extra 'lightning')")
def test_lightning_callback_is_a_callback():
    try:
        from lightning.pytorch import Callback
    except ImportError:
        from pytorch_lightning import Callback
    mon = hl.Monitor(sl.make_inputs(4, 40, seed=1), every=1)
    assert isinstance(mon.lightning_callback(), Callback)
