"""The widgets' "Over training" tab and interval marks, in plain pytest (controls by ``.value``)."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("ipywidgets")

from hiddenlens.examples.sorting_line import SortingLineNet, make_inputs  # noqa: E402

import hiddenlens  # noqa: E402
from hiddenlens._training.timeline import as_timeline  # noqa: E402

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
FIGS = ["lyapunov_max", "participation_ratio"]


def _table(shift=0.0):
    steps = np.array([0, 50, 100, 150])
    rows = []
    for s in steps:
        for j, f in enumerate(FIGS):
            v = (j + 1) * np.log1p(s) + shift
            rows.append({"step": int(s), "figure": f, "value": v, "low": v - 0.2,
                         "high": v + 0.2})
    return pd.DataFrame(rows)


def _png_size(png):
    # width and height of the IHDR chunk (PNG specification, section 11.2.2)
    return int.from_bytes(png[16:20], "big"), int.from_bytes(png[20:24], "big")


@pytest.fixture(scope="module")
def inputs():
    return make_inputs(2, 30, seed=0)


@pytest.fixture(scope="module")
def model():
    return SortingLineNet("gru", 6, seed=0).eval()


def test_table_monitor_and_timeline_give_the_same_timeline(tmp_path):
    t = _table()
    tl = as_timeline(t)
    assert tl.figures == tuple(FIGS)
    np.testing.assert_array_equal(tl.steps, [0, 50, 100, 150])
    np.testing.assert_allclose(tl.values[:, 1], 2 * np.log1p(tl.steps))
    back = tl.table
    np.testing.assert_allclose(back.sort_values(["step", "figure"]).value,
                               t.sort_values(["step", "figure"]).value)
    assert as_timeline(tl) is tl
    m = hiddenlens.Monitor(np.zeros((1, 2, 1)), figures=FIGS)
    m._rows = t.to_dict(orient="records")
    m.save(tmp_path / "t.json")
    np.testing.assert_allclose(as_timeline(hiddenlens.Monitor.load(tmp_path / "t.json")).high,
                               tl.high)
    with pytest.raises(ValueError, match="lacks the columns"):
        as_timeline(t.drop(columns="low"))
    with pytest.raises(TypeError, match="timeline table"):
        as_timeline([1, 2, 3])


def test_explore_over_training_tab_draws_figures_against_step(model, inputs):
    view = hiddenlens.explore(model, inputs, analyses=["pca"], background=False,
                              timeline=_table())
    tab = view.over_training
    assert tab is not None and tab.draws == 0  # nothing drawn until the tab is opened
    view.select("Over training")
    first = bytes(tab.image.value)
    assert first.startswith(PNG_MAGIC) and tab.draws == 1
    w, h_all = _png_size(first)
    assert w == 900
    tab.figure.value = "participation_ratio"  # one figure: one panel
    one = bytes(tab.image.value)
    assert one != first and tab.draws == 2
    tab.bands.value = False
    assert bytes(tab.image.value) != one and tab.draws == 3
    tab.bands.value = True  # back to (one figure, bands): drawn before
    assert tab.draws == 3
    tab.figure.value = "__all__"
    assert bytes(tab.image.value) == first and tab.draws == 3  # drawn before: reused
    # what is drawn: the values against step, with the bands as filled areas
    fig = tab.draw()
    ax = fig.axes[1]
    np.testing.assert_allclose(ax.lines[0].get_ydata(), 2 * np.log1p([0, 50, 100, 150]))
    assert len(ax.collections) == 1
    assert "Over training" in view.show_static(compute=False).html
    assert "pca" in view.computed or view.computed == {"pca": 1}


def test_compare_over_training_overlays_runs_in_their_colours(model, inputs):
    runs = {"gru": model, "rnn": SortingLineNet("rnn", 6, seed=1).eval()}
    mon = hiddenlens.Monitor(np.zeros((1, 2, 1)), figures=FIGS)
    mon._rows = _table(1.0).to_dict(orient="records")
    view = hiddenlens.compare(runs, inputs, analyses=["pca"], background=False,
                              timelines={"gru": _table(), "rnn": mon})
    view.select("Over training")
    tab = view.over_training
    assert bytes(tab.image.value).startswith(PNG_MAGIC)
    fig = tab.draw()
    ax = fig.axes[0]
    assert [line.get_label() for line in ax.lines] == ["gru", "rnn"]
    from matplotlib.colors import to_hex

    assert [to_hex(line.get_color()) for line in ax.lines] == \
        [to_hex(view._colors["gru"]), to_hex(view._colors["rnn"])]
    np.testing.assert_allclose(ax.lines[1].get_ydata() - ax.lines[0].get_ydata(), 1.0)
    view.select("Key figures")  # the other extra tab still fills its table
    assert "Over training" not in view._table.value and view.comparison is not None


def test_bad_timelines_fail_clearly(model, inputs):
    with pytest.raises(TypeError, match="timeline table"):
        hiddenlens.explore(model, inputs, analyses=["pca"], background=False, timeline=3)
    with pytest.raises(ValueError, match="not shown"):
        hiddenlens.compare({"a": model}, inputs, analyses=["pca"], background=False,
                           timelines={"b": _table()})


def test_a_monitored_training_run_shows_its_timeline(inputs):
    import torch

    net = SortingLineNet("gru", 6, seed=0)
    opt = torch.optim.Adam(net.parameters(), lr=1e-2)
    mon = hiddenlens.Monitor(inputs, figures=["top_singular_value_median"], every=2, n_boot=20)
    x = torch.as_tensor(make_inputs(4, 30, seed=1))
    for step in range(5):
        loss = net(x).pow(2).mean()
        opt.zero_grad()
        loss.backward()
        opt.step()
        mon.step(net, step)
    view = hiddenlens.explore(net.eval(), inputs, analyses=["pca"], background=False,
                              timeline=mon)
    view.select("Over training")
    fig = view.over_training.draw()
    np.testing.assert_array_equal(fig.axes[0].lines[0].get_xdata(), [0, 2, 4])
    buf = io.BytesIO(bytes(view.over_training.image.value))
    assert buf.read(8) == PNG_MAGIC


def test_compare_key_figures_show_intervals_and_noise_in_words(model, inputs):
    x = make_inputs(12, 30, seed=3)
    runs = {"gru": model, "copy": SortingLineNet("gru", 6, seed=0).eval(),
            "rnn": SortingLineNet("rnn", 6, gain=2.0, seed=1).eval()}
    view = hiddenlens.compare(runs, x, analyses=["lyapunov"], background=False)
    view.select("Key figures")
    t = view.comparison.table
    html = view._table.value
    lo, hi = t.loc["gru", "lyapunov_max low"], t.loc["gru", "lyapunov_max high"]
    from hiddenlens._analyses.figures import format_figure

    assert f"[{format_figure('lyapunov_max', lo)}, {format_figure('lyapunov_max', hi)}]" in html
    # the same weights: the paired difference is exactly 0, within noise by construction
    assert t.loc["copy", "\u0394 lyapunov_max within noise"] is True
    assert "within noise" in html
    assert ("beyond noise" in html) == (t["\u0394 lyapunov_max within noise"] == False).any()  # noqa: E712
    assert "bootstrap intervals" in view._table_message.value
