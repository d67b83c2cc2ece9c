"""Responsiveness of the notebook widgets on a GRU with H=128, T=500, B=8.

Prints, for torch's default thread count and for one thread:

* first panel: seconds from calling ``explore`` (model recorded, widget built) until the first
  tab's figure is set on its Image (target: <= 2 s);
* redraw: median milliseconds for a view-only control change (sample, step window, colouring,
  2-D/3-D; results cached), wall time and the drawing thread's CPU time (target: <= 150 ms);
* that no view change recomputed anything.

The CPU time is printed beside the wall time because on a shared machine the wall time of a
single-threaded redraw mostly measures the other processes. Run: ``python
benchmarks/bench_widgets.py`` (add ``--quick`` for fewer repetitions, ``--boards`` for the two
headline redraw medians only: explore, and compare with 4 runs, targets 150 and 300 ms).
"""

from __future__ import annotations

import os
import statistics
import sys
import time

import torch

sys.path.insert(0, os.path.join(os.path.dirname(__file__), os.pardir))

from hiddenlens.examples.sorting_line import SortingLineNet, make_inputs  # noqa: E402

H, T, B = 128, 500, 8
TARGET_REDRAW_MS = 150.0
TARGET_COMPARE_MS = 300.0  # compare with 4 runs, trajectories tab
TARGET_FIRST_S = 2.0


def first_panel(model, x) -> tuple[float, float, object]:
    from hiddenlens.widgets import explore

    t0 = time.perf_counter()
    view = explore(model, x, name="GRU H=128")
    built = time.perf_counter() - t0
    assert view.wait(120), "the first panel did not finish within 120 s"
    shown = time.perf_counter() - t0
    assert view.images[view.current], view._panels[view.current].message.value
    return built, shown, view


def redraws(view, control, values, repeats: int, *, fresh: bool = True) -> tuple[float, float]:
    """Median wall and CPU seconds of setting ``control.value`` (cycling through values).

    ``fresh``: forget the recently drawn figures first, so every change draws anew (the
    widget keeps recent figures, which makes going back to a view nearly free).
    """
    walls, cpus = [], []
    control.value = values[-1]  # first drawing of this arrangement measures its layout
    if not fresh:
        for value in values:  # show every view once, so that the figures are kept
            control.value = value
    for i in range(repeats):
        value = values[i % len(values)]
        if control.value == value:
            continue
        if fresh:
            view._pngs.clear()
        before = view._panels[view.current].draws
        w0, c0 = time.perf_counter(), time.thread_time()
        control.value = value
        walls.append(time.perf_counter() - w0)
        cpus.append(time.thread_time() - c0)
        assert view._panels[view.current].draws == before + fresh, "no redraw"
    return statistics.median(walls), statistics.median(cpus)


def report_first(what: str, built: float, shown: float, view) -> None:
    verdict = "ok" if shown <= TARGET_FIRST_S else "SLOWER than target"
    print(f"first panel ({view.current}), {what}: explore returned after {built:.2f} s, figure "
          f"shown after {shown:.2f} s (target {TARGET_FIRST_S:.0f} s: {verdict}; ratio "
          f"{shown / TARGET_FIRST_S:.2f})")


def run(threads: int | None, repeats: int) -> None:
    from threadpoolctl import threadpool_limits

    default = torch.get_num_threads()
    if threads is not None:
        torch.set_num_threads(threads)
    # numpy/scipy's BLAS (used by the PCA fit) gets the same number of threads as torch
    limits = threadpool_limits(threads) if threads is not None else None
    try:
        print(f"\n-- torch threads: {torch.get_num_threads()}, BLAS threads: "
              f"{'default' if threads is None else threads}")
        model = SortingLineNet("gru", hidden_size=H, seed=0).eval()
        x = make_inputs(B, T, seed=0)
        built, shown, view = first_panel(model, x)
        report_first("new widget, warm process", built, shown, view)
        computed = dict(view.computed)
        pca = view._panels["pca"]
        cases = [
            ("sample", view._sample, [1, 2, 3, "all"]),
            ("step window", view._window, [(0, 250), (100, 400), (250, 500), (0, 500)]),
            ("colour by", pca.views["color_by"], ["sample", "time"]),
            ("2-D / 3-D", pca.views["dims"], [3, 2]),
        ]
        for label, control, values in cases:
            wall, cpu = redraws(view, control, values, repeats)
            verdict = "ok" if wall * 1e3 <= TARGET_REDRAW_MS else "SLOWER than target (wall)"
            print(f"redraw on '{label}' (pca tab): median {wall * 1e3:6.1f} ms wall, "
                  f"{cpu * 1e3:6.1f} ms CPU; ratio to {TARGET_REDRAW_MS:.0f} ms: "
                  f"{wall * 1e3 / TARGET_REDRAW_MS:.2f} ({verdict})")
        wall, cpu = redraws(view, view._sample, [1, 2, 3, "all"], repeats, fresh=False)
        print(f"back to a view drawn before ('sample', figures kept): median "
              f"{wall * 1e3:6.1f} ms wall, {cpu * 1e3:6.1f} ms CPU")
        if "spectra" in view._panels:
            view.select("spectra")
            t0 = time.perf_counter()
            assert view.wait(600)
            print(f"spectra tab computed and drawn in {time.perf_counter() - t0:.2f} s")
            wall, cpu = redraws(view, view._sample, [1, 2, "all"], repeats)
            print(f"redraw on 'sample' (spectra tab): median {wall * 1e3:6.1f} ms wall, "
                  f"{cpu * 1e3:6.1f} ms CPU")
            computed = dict(view.computed)
            wall, cpu = redraws(view, view._window, [(0, 250), (200, 500), (0, 500)], repeats)
            print(f"redraw on 'step window' (spectra tab): median {wall * 1e3:6.1f} ms wall, "
                  f"{cpu * 1e3:6.1f} ms CPU")
        assert view.computed == computed, "a view-only change recomputed an analysis"
        print(f"no recomputation on view changes: computed = {view.computed}")
        print(f"PNG size of the trajectories figure: {len(view.images['pca']) / 1024:.0f} KiB")
        view.close()
    finally:
        torch.set_num_threads(default)
        if limits is not None:
            limits.unregister()


def _load() -> str:
    return ", ".join(f"{v:.1f}" for v in os.getloadavg())


def boards(repeats: int) -> None:
    """The two headline figures: median view-only redraw of explore (GRU H=128) and of
    compare with the 4 shipped sorting-line runs, trajectories tab, load printed beside."""
    from hiddenlens.examples import load_run, sorting_line
    from hiddenlens.widgets import compare, explore

    x = make_inputs(B, T, seed=0)
    ex = explore(SortingLineNet("gru", hidden_size=H, seed=0).eval(), x, analyses=["pca"],
                 background=False)
    names = ["gru", "rnn-gain0.5", "rnn-gain1.0", "rnn-gain2.0"]
    cmp = compare({n: load_run(n) for n in names}, sorting_line.make_inputs(B, T, seed=0),
                  analyses=["pca"], background=False)
    for label, view, target in (("explore", ex, TARGET_REDRAW_MS),
                                ("compare, 4 runs", cmp, TARGET_COMPARE_MS)):
        load_before = _load()
        walls, cpus = [], []
        for control, values in ((view._sample, [1, 2, 3, "all"]),
                                (view._window, [(0, 250), (100, 400), (250, 500), (0, 500)])):
            w, c = redraws(view, control, values, repeats)
            walls.append(w)
            cpus.append(c)
        wall, cpu = statistics.median(walls), statistics.median(cpus)
        verdict = "ok" if wall * 1e3 <= target else "SLOWER than target (wall)"
        print(f"{label:16s} trajectories tab, view-only redraw: median {wall * 1e3:6.0f} ms "
              f"wall, {cpu * 1e3:6.0f} ms CPU; target {target:.0f} ms, ratio "
              f"{wall * 1e3 / target:.2f} ({verdict}); load {load_before} -> {_load()}")
        view.close()


def main() -> None:
    repeats = 6 if "--quick" in sys.argv else 16
    t0 = time.perf_counter()
    import hiddenlens.widgets  # noqa: F401  (imports ipywidgets, matplotlib, sklearn, ...)

    print(f"import hiddenlens.widgets: {time.perf_counter() - t0:.2f} s (not counted below)")
    print(f"GRU H={H}, T={T}, B={B}; CPU cores: {os.cpu_count()}; "
          f"load average: {', '.join(f'{v:.1f}' for v in os.getloadavg())}")
    print(f"torch.get_num_threads() = {torch.get_num_threads()}")
    boards(repeats)
    if "--boards" in sys.argv:
        return
    # the very first widget of a process also pays for importing what the analyses use
    model = SortingLineNet("gru", hidden_size=H, seed=1).eval()
    built, shown, view = first_panel(model, make_inputs(B, T, seed=1))
    report_first("first in this process (includes lazy imports)", built, shown, view)
    view.close()
    run(None, repeats)
    run(1, repeats)


if __name__ == "__main__":
    main()
