"""The notebook widgets in plain pytest: no kernel, no browser.

Controls are moved by setting ``.value``, as a front end would; the rendered PNG bytes and the
number of calls into the analysis functions tell whether a change redrew or recomputed.
"""

from __future__ import annotations

import functools
import io
import threading
import time

import numpy as np
import pytest
import torch

pytest.importorskip("ipywidgets")

from hiddenlens.examples.sorting_line import SortingLineNet, make_inputs  # noqa: E402

import hiddenlens  # noqa: E402
import hiddenlens._faces.summary  # noqa: E402
from hiddenlens._faces.summary import analysis_function, key_figures, summary_sentence  # noqa: E402
from hiddenlens._faces.widgets.jobs import Cache, Runner, Step  # noqa: E402
from hiddenlens.widgets import Comparison, Explorer, StaticView, compare, explore  # noqa: E402

pytestmark = pytest.mark.usefixtures("one_blas_thread")

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
_COUNTED = ("pca", "lyapunov", "fixed_points", "memory", "spectra", "gradient_flow")


@pytest.fixture
def one_blas_thread():
    """Tiny matrices: numpy's BLAS threads only add hand-off costs on a busy machine."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):
        yield


@pytest.fixture(scope="module")
def model():
    return SortingLineNet("gru", 8, seed=0).eval()


@pytest.fixture(scope="module")
def inputs():
    return make_inputs(3, 40, seed=0)  # (B, T, I) = (3, 40, 5)


@pytest.fixture
def calls(monkeypatch):
    """Count the calls into each analysis function (patched where run_analyses finds it)."""
    import importlib

    from hiddenlens._core.registry import analysis_spec

    counts: dict[str, int] = {}
    for name in _COUNTED:
        # the registry names where each function lives ("module:function")
        module_name, attr = analysis_spec(name).function.split(":")
        module = importlib.import_module(module_name)
        fn = getattr(module, attr)

        @functools.wraps(fn)  # keeps the signature the widget reads its options from
        def counted(*args, __fn=fn, __name=name, **kw):
            counts[__name] = counts.get(__name, 0) + 1
            return __fn(*args, **kw)

        monkeypatch.setattr(module, attr, counted)
    return counts


def _png_shape(png: bytes) -> tuple[int, ...]:
    # decode with matplotlib's PNG reader (reference library), not with our own code
    import matplotlib.image

    return matplotlib.image.imread(io.BytesIO(png), format="png").shape


# ---------------------------------------------------------------------- explore
def test_explore_is_public_and_lazy(model, inputs, calls):
    view = hiddenlens.explore(model, inputs, analyses=["pca", "lyapunov"], background=False)
    assert isinstance(view, Explorer) and hiddenlens.explore is explore
    assert calls == {"pca": 1}  # only the visible tab was computed
    png = view.images["pca"]
    assert png.startswith(PNG_MAGIC)
    h, w, _ = _png_shape(png)
    assert w == 900 and h > 200
    assert view.images["lyapunov"] == b""


def test_view_controls_redraw_without_recomputing(model, inputs, calls):
    view = explore(model, inputs, analyses=["pca"], background=False)
    seen = [view.images["pca"]]
    panel = view._panels["pca"]
    for control, value in ((view._sample, 1), (view._window, (5, 30)),
                           (panel.views["color_by"], "sample"), (panel.views["dims"], 3),
                           (view._sample, "all")):
        control.value = value
        png = view.images["pca"]
        assert png.startswith(PNG_MAGIC)
        assert png != seen[-1], f"changing {control.description} did not redraw"
        seen.append(png)
    assert calls == {"pca": 1}
    assert view.computed == {"pca": 1}
    # back to a view shown before: the kept figure, without drawing again
    draws = panel.draws
    panel.views["dims"].value = 2
    view._sample.value = 1
    assert panel.draws == draws + 1  # only the 2-D change met a combination not shown yet
    view._window.value = (0, 40)
    view._sample.value = "all"
    panel.views["color_by"].value = "time"
    assert view.images["pca"] == seen[0]


def test_spectra_sample_and_window_only_redraw(model, inputs, calls):
    if "spectra" not in hiddenlens._faces.summary.available_analyses():
        pytest.skip("jacobian_spectra is not part of this installation")
    view = explore(model, inputs, analyses=["spectra"], background=False)
    seen = [view.images["spectra"]]
    for control, value in ((view._sample, 2), (view._window, (10, 25)), (view._sample, "all")):
        control.value = value
        assert view.images["spectra"] not in seen
        seen.append(view.images["spectra"])
    assert calls == {"spectra": 1}
    view._panels["spectra"].options["k"].value = 2
    assert calls == {"spectra": 2}


def test_compute_option_recomputes_once_then_caches(model, inputs, calls):
    view = explore(model, inputs, analyses=["lyapunov"], background=False)
    k = view._panels["lyapunov"].options["k"]
    first = view.images["lyapunov"]
    k.value = 3
    assert calls == {"lyapunov": 2}
    assert view.images["lyapunov"] != first
    k.value = 8  # back to the first options: from the cache
    assert calls == {"lyapunov": 2}
    assert view.images["lyapunov"] == first  # same result, same view: same pixels


def test_tabs_compute_when_opened_and_only_once(model, inputs, calls):
    view = explore(model, inputs, analyses=["pca", "fixed_points", "lyapunov"],
                   background=False)
    view.select("fixed_points")  # draws on the PCA axes: reuses the cached PCA
    assert calls == {"pca": 1, "fixed_points": 1}
    view.select("pca")
    view.select("fixed_points")
    assert calls == {"pca": 1, "fixed_points": 1}
    view._panels["fixed_points"].views["dims"].value = 3
    assert calls == {"pca": 1, "fixed_points": 1}
    assert _png_shape(view.images["fixed_points"])[1] == 900


def test_part_control_recomputes_only_what_depends_on_it(inputs, calls):
    lstm = SortingLineNet("lstm", 6, seed=1).eval()
    view = explore(lstm, inputs, analyses=["pca", "lyapunov"], background=False)
    assert [v for _, v in view._part.options][1:] == ["layer0.h", "layer0.c"]
    before = view.images["pca"]
    view._part.value = "layer0.c"
    assert calls == {"pca": 2}
    assert view.images["pca"] != before
    view.select("lyapunov")
    assert view._part.disabled  # the Lyapunov spectrum is of the whole state
    assert calls == {"pca": 2, "lyapunov": 1}


def test_summary_strip_uses_the_shared_key_figures(model, inputs):
    view = explore(model, inputs, analyses=["pca", "lyapunov"], background=False)
    view.compute_all()
    results = {n: view._results(n, view.run) for n in ("pca", "lyapunov")}
    sentence = summary_sentence(key_figures(results))
    assert "Lyapunov" in sentence
    text = view._summary.value
    assert sentence[1:] in text and "not opened yet" not in text


def test_errors_are_shown_in_the_widget(model, inputs, monkeypatch):
    import hiddenlens._analyses.lyapunov as lyap

    @functools.wraps(lyap.lyapunov_spectrum)
    def broken(*args, **kw):
        raise ValueError("the frame collapsed; try fewer exponents")

    monkeypatch.setattr(lyap, "lyapunov_spectrum", broken)
    view = explore(model, inputs, analyses=["pca", "lyapunov"], background=False)
    view.select("lyapunov")
    message = view._panels["lyapunov"].message.value
    assert "ValueError" in message and "the frame collapsed; try fewer exponents" in message
    assert view._panels["lyapunov"].image.layout.display == "none"
    view.select("pca")  # the other tabs keep working
    assert view.images["pca"].startswith(PNG_MAGIC)


def test_drawing_errors_are_shown_too(model, inputs, monkeypatch):
    from hiddenlens._faces.widgets import panels as _panels
    def bad_draw(*args):
        raise RuntimeError("no room for the legend")

    entry = _panels.REGISTRY["pca"]
    monkeypatch.setitem(_panels.REGISTRY, "pca", _panels.Analysis(
        "pca", entry.label, bad_draw, views=entry.views, uses=entry.uses,
        part_option=entry.part_option, n_axes=entry.n_axes))
    view = explore(model, inputs, analyses=["pca"], background=False)
    assert "no room for the legend" in view._panels["pca"].message.value


def test_bad_arguments_fail_clearly(model, inputs):
    with pytest.raises(ValueError, match="expects 5"):
        explore(model, inputs[..., :3], background=False)
    with pytest.raises(ValueError, match="unknown analyses"):
        explore(model, inputs, analyses=["pca", "tea_leaves"], background=False)
    with pytest.raises(ValueError, match="one label per sequence"):
        explore(model, inputs, labels=[0, 1], background=False)
    with pytest.raises(TypeError, match="non-empty mapping"):
        compare([model], inputs, background=False)


def test_labels_colour_the_trajectories(model, inputs):
    view = explore(model, inputs, analyses=["pca"], labels=["red", "green", "red"],
                   background=False)
    colour = view._panels["pca"].views["color_by"]
    assert "label" in [v for _, v in colour.options]
    before = view.images["pca"]
    colour.value = "label"
    assert view.images["pca"] != before


def test_the_model_is_left_untouched(inputs, snapshot):
    net = SortingLineNet("gru", 8, seed=3).train()
    before = snapshot(net)
    view = explore(net, inputs, analyses=["pca", "fixed_points", "lyapunov"], background=False)
    view.select("fixed_points")
    view.select("lyapunov")
    before.assert_unchanged()


# ---------------------------------------------------------------------- static fallback
def test_static_fallback_holds_every_figure(model, inputs):
    view = explore(model, inputs, analyses=["pca", "lyapunov"], background=False)
    bundle = view._repr_mimebundle_()
    assert "application/vnd.jupyter.widget-view+json" in bundle
    assert bundle["text/html"].count("data:image/png;base64,") == 1  # drawn so far: one tab
    static = view.show_static()
    assert isinstance(static, StaticView)
    assert static._repr_html_().count("data:image/png;base64,") == 2
    assert "Lyapunov" in static.html


# ---------------------------------------------------------------------- threads
def test_background_computation_draws_from_the_worker(model, inputs):
    view = explore(model, inputs, analyses=["pca", "lyapunov"])
    try:
        assert view.wait(60)
        assert view.images["pca"].startswith(PNG_MAGIC)
        view.select("lyapunov")
        assert view.wait(60)
        assert view.images["lyapunov"].startswith(PNG_MAGIC)
        assert view._bar.layout.visibility == "hidden" and view._cancel.disabled
    finally:
        view.close()


def test_cancel_stops_a_running_step():
    # a slow pure-Python step stands in for a long analysis; it notes how it ended
    ended = {}
    started = threading.Event()

    def slow():
        started.set()
        try:
            t0 = time.monotonic()
            while time.monotonic() - t0 < 30:
                sum(range(1000))
            ended["how"] = "finished"
        except KeyboardInterrupt:
            ended["how"] = "stopped"
            raise

    cache = Cache()
    runner = Runner(cache)
    done = []
    runner.submit([Step("k", "slow", "slow step", slow)], lambda job: done.append(job),
                  lambda job, exc: done.append(exc))
    assert started.wait(10)
    t0 = time.monotonic()
    assert runner.cancel_all() == 1
    assert runner.wait(10)
    assert time.monotonic() - t0 < 5
    deadline = time.monotonic() + 5
    while "how" not in ended and time.monotonic() < deadline:
        time.sleep(0.01)
    assert ended == {"how": "stopped"}
    assert done == [] and "k" not in cache
    # the worker survives a stop and runs the next job
    runner.submit([Step("j", "quick", "quick step", lambda: 42)], done.append, done.append)
    assert runner.wait(10) and cache.get("j") == 42
    runner.shutdown()


def test_cancel_button_frees_the_widget(model, inputs, monkeypatch):
    import hiddenlens._analyses.lyapunov as lyap

    started = threading.Event()

    @functools.wraps(lyap.lyapunov_spectrum)
    def slow(*args, **kw):
        started.set()
        while True:
            time.sleep(0.001)

    monkeypatch.setattr(lyap, "lyapunov_spectrum", slow)
    view = explore(model, inputs, analyses=["pca", "lyapunov"])
    try:
        assert view.wait(60)
        view.select("lyapunov")
        assert started.wait(10)
        assert not view._cancel.disabled
        view._cancel.click()
        assert view.wait(10)
        assert "Stopped" in view._panels["lyapunov"].message.value
        view.select("pca")  # still responsive
        assert view.images["pca"].startswith(PNG_MAGIC)
    finally:
        view.close()


# ---------------------------------------------------------------------- compare
@pytest.fixture(scope="module")
def runs():
    return {"small gain": SortingLineNet("rnn", 8, gain=0.5, seed=0).eval(),
            "large gain": SortingLineNet("rnn", 8, gain=2.0, seed=0).eval(),
            "gated": SortingLineNet("gru", 8, seed=0).eval()}


def test_compare_overlays_runs_and_toggles_without_recomputing(runs, inputs, calls):
    view = hiddenlens.compare(runs, inputs, analyses=["lyapunov", "pca"], background=False)
    assert isinstance(view, Comparison)
    assert calls == {"lyapunov": 3}
    first = view.images["lyapunov"]
    view._shown["gated"].value = False
    assert view.images["lyapunov"] != first and calls == {"lyapunov": 3}
    view.select("pca")  # computes only the runs shown
    assert calls == {"lyapunov": 3, "pca": 2}
    view._shown["gated"].value = True
    assert calls == {"lyapunov": 3, "pca": 3}
    view._sample.value = 2
    assert calls == {"lyapunov": 3, "pca": 3}
    assert _png_shape(view.images["pca"])[1] == 900


def test_compare_table_lists_figures_and_differences(runs, inputs):
    view = compare(runs, inputs, analyses=["lyapunov", "pca"], background=False)
    view.select("Key figures")
    table = view.comparison.table
    lam = {n: key_figures({"lyapunov": view._results("lyapunov", r)})["lyapunov_max"]
           for n, r in view._runs.items()}
    np.testing.assert_allclose(table["lyapunov_max"].to_numpy(), list(lam.values()))
    np.testing.assert_allclose(table["\u0394 lyapunov_max"].to_numpy(),
                               np.array(list(lam.values())) - lam["small gain"])
    html = view._table.value
    assert all(n in html for n in runs) and "largest Lyapunov exponent" in html
    assert "(Δ" in html
    cka = view.comparison.cka
    assert cka.shape == (3, 3) and np.allclose(np.diag(cka), 1.0)
    assert bytes(view._cka.value).startswith(PNG_MAGIC)
    assert "Key figures" in view.show_static(compute=False).html


def test_compare_rejects_runs_with_other_input_sizes(inputs):
    other = hiddenlens.wrap(lambda s, x: torch.tanh(s), state_size=8, input_size=3)
    with pytest.raises(ValueError, match="different input sizes"):
        compare({"a": SortingLineNet("gru", 8, seed=0), "b": other}, inputs,
                background=False)


def test_every_available_analysis_draws(model, inputs):
    view = explore(model, inputs, background=False)
    for name in view._panels:
        view.select(name)
        assert view.images[name].startswith(PNG_MAGIC), view._panels[name].message.value
    assert set(view.computed) == set(view._panels)
    assert all(callable(analysis_function(n)) for n in view._panels)


# ---------------------------------------------------------------------- export, diagnosis, style
def _download(html_value):
    """(mime, bytes, filename) of a download link's data: URI (RFC 2397)."""
    import base64
    import re

    m = re.search(r'download="([^"]+)" href="data:([^;]+);base64,([^"]+)"', html_value)
    assert m, html_value[:200]
    return m.group(2), base64.b64decode(m.group(3)), m.group(1)


def test_export_row_gives_png_svg_and_csv_bytes(model, inputs):
    import csv
    import xml.etree.ElementTree as ET

    view = explore(model, inputs, analyses=["lyapunov"], background=False)
    panel = view._panels["lyapunov"]
    label, png_link, holder, words = panel.export.children
    mime, data, filename = _download(png_link.value)
    assert mime == "image/png" and filename.endswith(".png")
    assert data == view.images["lyapunov"] and data.startswith(PNG_MAGIC)
    holder.children[0].click()  # the SVG is drawn on demand
    mime, data, filename = _download(holder.children[0].value)
    assert mime == "image/svg+xml" and filename.endswith(".svg")
    # an SVG document: root element <svg> in the SVG namespace (W3C SVG 1.1, section 5.1),
    # parsed with the standard library's XML parser
    assert ET.fromstring(data).tag == "{http://www.w3.org/2000/svg}svg"
    mime, data, filename = _download(view._table_export.children[0].value)
    assert mime == "text/csv" and filename.endswith(".csv")
    rows = list(csv.DictReader(io.StringIO(data.decode("utf-8"))))
    lam = key_figures({"lyapunov": view._results("lyapunov", view.run)})["lyapunov_max"]
    value = next(r["value"] for r in rows if r["figure"] == "lyapunov_max")
    assert float(value) == lam  # full precision in the file
    # the figure's words: on the image (its title attribute) and in a fold below it
    assert "Lyapunov" in panel.image.tooltip and "Lyapunov" in words.value


def test_diagnosis_line_shown_only_when_task_given(runs, inputs):
    view = explore(runs["gated"], inputs, analyses=["gradient_flow"], background=False)
    assert view._diagnosis.value == ""
    # status and progress sit above the tabs
    status_row = next(c for c in view.children if view._bar in getattr(c, "children", ()))
    assert view.children.index(status_row) < view.children.index(view._tabs)
    task = {"gated": {"accuracy": 0.99, "chance": 1 / 3, "n_eval": 500, "horizon": 40},
            "large gain": {"accuracy": 0.40, "chance": 1 / 3, "n_eval": 500}}
    view = compare(runs, inputs, analyses=["gradient_flow"], background=False, task=task)
    text = view._diagnosis.value
    assert "Diagnosis" in text and "99.0%" in text and "40.0%" in text
    assert "gated" in text and "small gain" in text  # a run without metrics is read too
    view._shown["small gain"].value = False
    view._update_summary()
    assert "small gain" not in view._diagnosis.value  # unticked runs leave the line
    with pytest.raises(ValueError, match="not compared"):
        compare(runs, inputs, analyses=["pca"], background=False, task={"other": {}})


def test_compare_overlay_uses_the_colour_blind_safe_palette(runs, inputs):
    from hiddenlens._plotting.style import RUN_COLORS

    view = compare(runs, inputs, analyses=["lyapunov"], background=False)
    panel = view._panels["lyapunov"]
    fig = view._draw_panel(panel, view._view(panel))
    lines = [ln for ln in fig.axes[0].get_lines() if ln.get_label() in runs]
    assert len(lines) == 3
    # Okabe & Ito (2008) colours, and a line style and marker per run besides colour
    assert [ln.get_color() for ln in lines] == list(RUN_COLORS[:3])
    assert len({ln.get_linestyle() for ln in lines}) == 3
    assert len({ln.get_marker() for ln in lines}) == 3


def test_spectra_first_pass_on_fewer_sequences_then_all(model, inputs, calls, monkeypatch):
    import hiddenlens._faces.widgets.board as board
    import hiddenlens._faces.widgets.panels as panels

    monkeypatch.setattr(panels, "_PREVIEW_WORK", 1.0)  # any run gets a first pass
    notes = []
    original = board.Board._preview_done

    def seen(self, panel, key, first, small):
        original(self, panel, key, first, small)
        notes.append((panel.message.value, bytes(panel.image.value)))

    monkeypatch.setattr(board.Board, "_preview_done", seen)
    view = explore(model, inputs, analyses=["spectra"], background=False)
    assert calls == {"spectra": 2}  # the first pass, then all sequences
    assert view.computed == {"spectra (first pass)": 1, "spectra": 1}
    (note, png), = notes
    assert "First pass on 1 of 3 sequences" in note and png.startswith(PNG_MAGIC)
    assert view._panels["spectra"].message.value == ""  # the whole figure replaced it
    assert view.images["spectra"] != png
    # the first pass is the first sequence of the same trace (reference: the trace itself)
    small = panels.fewer_sequences(view.run, work=1.0)
    np.testing.assert_array_equal(small.trace.states, view.trace.states[:1])
    assert panels.fewer_sequences(view.run, work=1.2e9) is None  # small run: no first pass


# ---------------------------------------------------------------------- interactive figures
def test_interactive_falls_back_to_png_without_ipympl(model, inputs, monkeypatch):
    from hiddenlens._faces.widgets import render

    monkeypatch.setattr(render, "interactive_available", lambda: False)
    view = explore(model, inputs, analyses=["pca"], background=False, interactive=True)
    panel = view._panels["pca"]
    assert not view.interactive
    assert "hiddenlens[interactive]" in panel.message.value  # says why, not silently
    assert view.images["pca"].startswith(PNG_MAGIC) and panel.image.layout.display is None
    assert not any("hiddenlens-live" in w._dom_classes for w in panel.box.children)
    quiet = explore(model, inputs, analyses=["pca"], background=False)  # default: no note
    assert not quiet.interactive and quiet._panels["pca"].message.value == ""
    with pytest.raises(TypeError, match="interactive must be"):
        explore(model, inputs, analyses=["pca"], background=False, interactive="yes")


def test_interactive_canvas_where_ipympl_is_installed(model, inputs):
    pytest.importorskip("ipympl", reason="ipympl (the 'interactive' extra) is not installed")
    view = explore(model, inputs, analyses=["pca"], background=False)
    panel = view._panels["pca"]
    live = [w for w in panel.box.children if "hiddenlens-live" in w._dom_classes]
    assert view.interactive and len(live) == 1
    assert panel.image.layout.display == "none"
    assert view.images["pca"].startswith(PNG_MAGIC)  # the PNG stays for export
    view._sample.value = 1  # a redraw replaces the canvas, never adds one
    live2 = [w for w in panel.box.children if "hiddenlens-live" in w._dom_classes]
    assert len(live2) == 1 and live2[0] is not live[0]
    # the canvas holds the same figure: its Axes carry the PCA axis labels
    assert live2[0].figure.axes[0].get_xlabel().startswith("PC1")


def test_pca_fit_window_control_refits_on_the_chosen_steps(model, inputs, calls):
    T = inputs.shape[1]
    onsets = np.array([4, 6, 5])
    view = explore(model, inputs, analyses=["pca"], targets=np.array([0, 1, 0]),
                   onsets=onsets, background=False)
    fit = view._panels["pca"].options["fit_steps"]
    labels = [label for label, _ in fit.options]
    assert labels[0] == "all steps"
    assert f"from the first onset (4-{T - 1})" in labels
    before = view.images["pca"]
    fit.value = range(T // 2, T)
    assert calls == {"pca": 2}  # a compute option: fitted again
    assert view.images["pca"] != before
    fit.value = None  # back to all steps: from the cache
    assert calls == {"pca": 2}
    assert view.images["pca"] == before
