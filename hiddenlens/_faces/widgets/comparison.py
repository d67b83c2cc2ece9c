"""``compare``: several runs on the same inputs, analyses overlaid, key figures side by side."""

from __future__ import annotations

import math
from collections.abc import Hashable, Mapping, Sequence
from concurrent.futures import Executor
from typing import Any

import ipywidgets as widgets
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from ..._analyses.compare import RunComparison, check_runs, comparison_of, plot_cka, plot_overlay
from ..._analyses.figures import (
    figure_rows,
    format_delta,
    format_figure,
    key_figures,
    summary_sentence,
)
from ..._analyses.runner import AnalysisResults, ModelLike, Sequences
from ..._core.record import record
from ..._core.validation import as_sequences
from ..._plotting.style import RUN_COLORS, legend_outside, thin_ticks, wrap_titles
from . import render as _render
from .board import _ALL, Board, Panel, check_analyses, row, sample_and_window, task_context
from .jobs import Step
from .over_training import TAB_TITLE, OverTraining, check_timelines
from .panels import Run, View, tab

__all__ = ["Comparison", "compare"]

_OUTPUT = "__output__"  # value of the "top-layer h" choice of the part control
_TABLE_TAB = "Key figures"


class Comparison(Board):
    """The widget returned by :func:`compare` (an ``ipywidgets.VBox``).

    Attributes
    ----------
    traces : dict
        Run name -> the trace recorded on the shared inputs.
    comparison : RunComparison or None
        The key-figure table, CKA matrix and results, once the "Key figures" tab was computed.
    """

    def __init__(self, runs: Mapping[str, Any], inputs: Any, *, h0: Any = None,
                 analyses: Sequence[str] | None = None, background: bool = True,
                 executor: Executor | None = None, seed: int = 0,
                 task: Mapping[str, Mapping[str, Any]] | None = None,
                 timelines: Any = None, interactive: bool | None = None, targets: Any = None,
                 onsets: Any = None, **wrap_options: Any) -> None:
        systems = check_runs(runs, **wrap_options)
        names = list(systems)
        checked_timelines = check_timelines(timelines, names)
        if task is not None:
            if not isinstance(task, Mapping) or not all(
                    v is None or isinstance(v, Mapping) for v in task.values()):
                raise TypeError("task must map run names to task metrics (e.g. {'gru': "
                                "{'accuracy': 0.97}}), got "
                                f"{type(task).__name__}")
            unknown = [str(k) for k in task if k not in systems]
            if unknown:
                raise ValueError(f"task names runs that are not compared: {', '.join(unknown)};"
                                 f" the runs are {', '.join(names)}")
        tabs = check_analyses(analyses, ("targets", "onsets") if targets is not None else ())
        recorded = {}
        context = None
        for n, system in systems.items():
            x = as_sequences(inputs, system.input_size, system.dtype,
                             what=f"run {n!r} ({system.source})")  # (B, T, I)
            if context is None:
                context = task_context(targets, onsets, x.shape[0], x.shape[1])
            recorded[n] = Run(n, system, record(system, x, h0), x, None, seed, context)
        super().__init__()  # only once the arguments are known to be good
        self._runs = recorded
        self._task = {str(k): dict(v) for k, v in (task or {}).items() if v}
        self.traces = {n: r.trace for n, r in self._runs.items()}
        self.comparison: RunComparison | None = None
        # colour-blind-safe (Okabe-Ito); a run keeps its colour when others are unticked
        self._colors = {n: RUN_COLORS[i % len(RUN_COLORS)] for i, n in enumerate(names)}
        first = self._runs[names[0]].trace
        B, T = first.batch_size, first.n_steps

        self._shown = {n: widgets.Checkbox(value=True, description=n, indent=False,
                                           layout=widgets.Layout(width="max-content"))
                       for n in names}
        shown_box = row([widgets.Label("runs:"), *self._shown.values()], space="8px")
        self._sample, self._window = sample_and_window(B, T, "300px")
        common = set.intersection(*(set(r.trace.parts) for r in self._runs.values()))
        parts = [("whole state", _ALL), ("top-layer h", _OUTPUT)] + [
            (p, p) for p in first.parts if p in common and len(common) > 1]
        self._part = widgets.Dropdown(options=parts, value=_ALL, description="part",
                                      tooltip="the part of the state analysed",
                                      style={"description_width": "initial"},
                                      layout=widgets.Layout(width="max-content"))

        self._table = widgets.HTML(layout=widgets.Layout(width="100%"))
        self._table_message = widgets.HTML()
        self._cka = widgets.Image(format="png", layout=widgets.Layout(max_width="100%",
                                                                      display="none"))
        table_box = widgets.VBox([self._table_message, self._table, self._cka])
        table_box.add_class("hiddenlens-panel-table")

        title = (f"<div style='font-size:15px'><b>Comparing {len(names)} runs</b> "
                 f"<span style='color:#4a5568'>· {_render.esc(', '.join(names))} · {B} "
                 f"sequence{'s' if B != 1 else ''} × {T} steps</span></div>")
        #: the "Over training" tab (None without timelines)
        self.over_training = OverTraining(checked_timelines, self._colors) \
            if checked_timelines else None
        extra = [(_TABLE_TAB, table_box)]
        if self.over_training is not None:
            extra.append((TAB_TITLE, self.over_training.box))
        self._build(tabs, title=title, background=background, executor=executor,
                    extra_tabs=extra, shared=[shown_box, self._sample, self._window, self._part],
                    interactive=interactive)
        if self.over_training is not None:
            self.over_training.observe(lambda: self._guard(self.over_training.show))
        for box in self._shown.values():
            box.observe(lambda _: self._guard(self._on_shared), names="value")

    # ------------------------------------------------------------------ hooks
    def _runs_for(self, panel: Panel | None) -> list[Run]:
        shown = [r for n, r in self._runs.items() if self._shown[n].value]
        return shown or list(self._runs.values())[:1]

    def _part_value(self, run: Run) -> Any:
        value = self._part.value
        if value == _ALL:
            return None
        return run.system.output_part if value == _OUTPUT else value

    def _view(self, panel: Panel) -> View:
        return self._sample_window_view(panel, next(iter(self._runs.values())).trace.n_steps)

    def _update_shared_state(self) -> None:
        name = self.current
        analysis = tab(name) if name else None
        self._sample.disabled = self._window.disabled = analysis is None or not analysis.per_run
        self._part.disabled = analysis is None or not (analysis.part_option or any(
            tab(d).part_option for d in analysis.needs))

    def _draw_panel(self, panel: Panel, view: View, layout: str | None = "constrained"):
        analysis = panel.analysis
        runs = self._runs_for(panel)
        name = analysis.name
        colors = [self._colors[r.name] for r in runs]
        if not analysis.per_run:  # one overlay of every run on shared axes
            fig, axes = _render.new_figure(1, layout=layout, width=self._width_in)
            plot_overlay(name, {r.name: self._results(name, r) for r in runs}, ax=axes[0],
                         colors=colors)
            legend_outside(axes[0])  # the runs' key beside the data, not over it
            return wrap_titles(fig, self.figure_px)
        # e.g. trajectories in each run's own PCA axes: one panel per run
        _, projection = analysis.n_axes(view)
        # about 215 px per panel at least, so that ticks and titles do not overprint
        ncols = max(1, min(len(runs), 4, self.figure_px // 215))
        nrows = -(-len(runs) // ncols)
        row_height = 3.4 if projection == "3d" or ncols <= 2 else 2.9
        extra = int(analysis.overlay_row)  # what is comparable across runs, below
        fig = Figure(figsize=(self._width_in, row_height * nrows + 2.4 * extra),
                     dpi=_render.DPI, layout=layout)
        FigureCanvasAgg(fig)
        grid = fig.add_gridspec(nrows + extra, ncols,
                                height_ratios=[row_height] * nrows + [2.4] * extra)
        for i, run in enumerate(runs):
            ax = fig.add_subplot(grid[i // ncols, i % ncols], projection=projection)
            deps = {d: self._results(d, run) for d in analysis.needs}
            result = self._results(name, run)
            analysis.draw(result, [ax], view, run, deps)
            title = run.name
            if analysis.run_title is not None:
                title += f" · {analysis.run_title(result)}"
            ax.set_title(title, color=self._colors[run.name], fontsize="medium")
            last_in_row = i % ncols == ncols - 1 or i == len(runs) - 1
            if ax.get_legend() is not None and len(runs) > 1 and not last_in_row:
                ax.get_legend().remove()  # one key per row, beside its last panel
            if len(runs) > 1 and not last_in_row:
                _drop_colour_bars(ax)  # the same key (e.g. step) is drawn once per row
            if ncols > 1 and projection is None:
                thin_ticks(ax, max_x=3, max_y=4)  # small multiples: no overprinted ticks
        if extra:
            plot_overlay(name, {r.name: self._results(name, r) for r in runs},
                         ax=fig.add_subplot(grid[nrows, :]), colors=colors)
        return wrap_titles(fig, self.figure_px)

    def _summary_html(self) -> str:
        lines = []
        for run in self._runs.values():
            present = {n: r for n in self._panels
                       if (r := self._results(n, run)) is not None}
            text = summary_sentence(key_figures(present)) if present else ""
            dot = f"<span style='color:{self._colors[run.name]}'>●</span>"
            body = _render.esc(text) if text else "<span style='color:#718096'>no key figures " \
                "yet</span>"
            lines.append(f"{dot} <b>{_render.esc(run.name)}</b>: {body}")
        hint = "<div style='color:#718096'>The 'Key figures' tab computes every analysis and " \
               "lists the figures side by side.</div>"
        # folded beyond two runs: the figures stay in view, the words one click away
        fold = "" if len(lines) <= 2 else " open" if not any(
            self._results(n, r) is not None for r in self._runs.values()
            for n in self._panels) else ""
        return ("<div class='hiddenlens-summary' style='background:#f3f6fa;border-left:4px solid "
                "#3b6ea5;padding:6px 10px;font-size:13.5px;line-height:1.5'>"
                f"<details{' open' if len(lines) <= 2 else fold}><summary style='cursor:pointer'>"
                f"Key figures in words ({len(lines)} runs)</summary>"
                + "<br>".join(lines) + hint + "</details></div>")

    # ------------------------------------------------------------------ key-figures tab
    def _table_steps(self) -> list[Step]:
        steps, seen = [], set()
        for name, panel in self._panels.items():
            for s in self._steps(name, self._runs_for(panel)):
                if s.key not in seen:
                    seen.add(s.key)
                    steps.append(s)
        return steps

    def _extra_steps(self, seen: set[Hashable]) -> list[Step]:
        return []  # compute_all already covers every analysis of every shown run

    def _show_extra(self, index: int) -> None:
        if index == 1 and self.over_training is not None:
            self.over_training.show()
            return
        steps = self._table_steps()
        missing = [s for s in steps if s.key not in self._cache]
        if missing:
            self._table_message.value = _render.note_box(
                f"Computing {len(missing)} analyses for the table ...")
            pending = self._runner.pending_keys()
            if not all(s.key in pending for s in missing):
                self._runner.submit(missing, self._job_done, self._table_failed)
            return
        try:
            with self._draw_lock:
                self._fill_table()
        except Exception as exc:
            self._table_message.value = _render.error_box(exc, what="the key-figure table")

    def _table_failed(self, job, exc: BaseException) -> None:
        step = job.steps[min(job.finished, len(job.steps) - 1)]
        self._table_message.value = _render.error_box(exc, what=step.label)
        self._job_failed(job, exc)

    def _fill_table(self) -> None:
        runs = self._runs_for(None)
        results = {}
        for run in runs:
            res = AnalysisResults({n: self._results(n, run) for n in self._panels})
            res.trace = run.trace
            res.options = {n: dict(self._key(n, run)[2]) for n in self._panels}
            results[run.name] = res
        self.comparison = comparison_of(results, {r.name: r.system for r in runs},
                                        seed=runs[0].seed)
        names = list(self.comparison.names)
        self._table.value = ("<div class='hiddenlens-scroll'>"
                             f"{_table_html(self.comparison, self._colors)}</div>")
        # about 0.55 in per run, names beside; never wider than the cell
        longest = max(len(n) for n in names)
        size = min(1.2 + 0.55 * len(runs), 4.5)
        fig, axes = _render.new_figure(1, height=size, width=min(
            size + 1.0 + 0.075 * longest, self._width_in))
        plot_cka(self.comparison.cka, names, ax=axes[0])
        self._cka.value = _render.png_bytes(fig)
        self._cka.layout.display = None
        level = next(iter(self.comparison.intervals.values())).level \
            if self.comparison.intervals else None
        bounds = (f" Brackets: {level:.0%} bootstrap intervals over the input sequences; a "
                  "difference is within noise when the paired interval of the difference "
                  "holds zero (on these inputs only)." if level is not None else "")
        self._table_message.value = _render.note_box(
            f"Differences (Δ) are against the first run shown, {names[0]}.{bounds} CKA "
            "compares the top-layer states on these inputs only.")

    def _static_extra(self) -> list[str]:
        out = []
        if self.comparison is not None:
            out = [f"<h4 style='margin:10px 0 2px'>{_TABLE_TAB}</h4>",
                   _table_html(self.comparison, self._colors)]
        if self.over_training is not None:
            out += self.over_training.static_html()
        return out


def _drop_colour_bars(ax: Any) -> None:
    """Remove the colour bars of what is drawn on ``ax`` (matplotlib's ``Colorbar.remove``
    also gives the Axes back the room the bar took)."""
    for artist in (*ax.collections, *ax.images):
        bar = getattr(artist, "colorbar", None)
        if bar is not None:
            bar.remove()


def _table_html(comparison: RunComparison, colors: Mapping[str, str]) -> str:
    """Runs as columns, key figures as rows, each difference beside its value."""
    names = list(comparison.names)
    head = "".join(f"<th style='text-align:right;padding:2px 10px;white-space:nowrap;"
                   f"color:{colors[n]}'>"
                   f"{_render.esc(n)}</th>" for n in names)
    rows = []
    for fr in figure_rows({n: comparison.figures[n] for n in names}):
        cells = []
        for n in names:
            text = _render.esc(format_figure(fr.key, fr.values[n]))
            fi = (comparison.intervals or {}).get(n)
            if fr.numeric and fi is not None and fr.key in fi:
                _, lo, hi = fi[fr.key]
                if math.isfinite(lo) and math.isfinite(hi):
                    text += (f" <span style='color:#718096;font-size:11.5px'>"
                             f"[{_render.esc(format_figure(fr.key, lo))}, "
                             f"{_render.esc(format_figure(fr.key, hi))}]</span>")
            delta = fr.deltas[n]
            if delta is not None and fr.numeric:
                noise = comparison.noise(fr.key, n)
                said = {True: ", within noise", False: ", beyond noise"}.get(noise, "")
                text += (f" <span style='color:#718096;font-size:11.5px'>(Δ "
                         f"{_render.esc(format_delta(fr.key, delta))}{said})</span>")
            cells.append(f"<td style='text-align:right;padding:2px 10px;white-space:nowrap'>"
                         f"{text}</td>")
        rows.append(f"<tr><td style='padding:2px 10px;min-width:12em'>{_render.esc(fr.text)}</td>"
                    f"{''.join(cells)}</tr>")
    return ("<table class='hiddenlens-table' style='border-collapse:collapse;font-size:13px'>"
            f"<thead><tr><th></th>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>")


def compare(runs: Mapping[str, ModelLike], inputs: Sequences, *, h0: Any = None,
            analyses: Sequence[str] | None = None, background: bool = True,
            executor: Executor | None = None, seed: int = 0,
            task: Mapping[str, Mapping[str, Any]] | None = None,
            timelines: Any = None, interactive: bool | None = None, targets: Any = None,
            onsets: Any = None, **wrap_options: Any) -> Comparison:
    """An interactive notebook view of several runs side by side, on the same inputs.

    Each analysis tab overlays the runs with the analysis' own overlay (spectra, gradient
    flow, Lyapunov exponents, memory curves on shared axes; trajectories and fixed points in
    each run's own PCA axes, the runs' cumulative variance below the trajectories). The "Key
    figures" tab lists the figures of every run with their differences from the first run
    and the linear CKA of the runs' states.

    Parameters
    ----------
    runs : Mapping[str, model or system]
        Run name -> anything :func:`hiddenlens.wrap` accepts (or a system); architectures and
        state sizes may differ, the input size must be the same.
    inputs : Tensor or ndarray of shape (B, T, I)
        The same sequences for every run.
    h0, analyses, background, executor, seed, interactive, targets, onsets, **wrap_options
        As in :func:`hiddenlens.explore`; ``targets`` (a task variable of the shared inputs)
        adds the task-memory tab, each run decoded on its own states.
    task : Mapping[str, Mapping], optional
        Run name -> task metrics measured for that run (see :func:`hiddenlens.explore`): a
        diagnosis line per run at the top.
    timelines : Mapping[str, Timeline | Monitor | DataFrame], optional
        Run name -> its key figures over training (see :func:`hiddenlens.explore`'s
        ``timeline``); one timeline alone belongs to the first run. Adds an "Over training"
        tab with every run's figures against step on shared panels, in the runs' colours.

    Returns
    -------
    Comparison
        An ``ipywidgets.VBox``. Checkboxes choose the runs shown (computing only those);
        ``.comparison`` holds the :class:`~hiddenlens.RunComparison` once the table is shown.
    """
    return Comparison(runs, inputs, h0=h0, analyses=analyses, background=background,
                      executor=executor, seed=seed, task=task, timelines=timelines,
                      interactive=interactive, targets=targets, onsets=onsets,
                      **wrap_options)
