"""``compare``: several runs on the same inputs, analyses overlaid, key figures side by side."""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from concurrent.futures import Executor
from typing import Any

import ipywidgets as widgets
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from .._compare import RunComparison, check_runs, comparison_of, plot_cka, plot_overlay
from .._figures import figure_rows, format_delta, format_figure, key_figures, summary_sentence
from .._plotting import RUN_COLORS
from .._record import record
from .._runner import AnalysisResults, ModelLike, Sequences
from .._validation import as_sequences
from . import _render
from ._board import _ALL, Board, Panel, check_analyses, row, task_context
from ._jobs import Step
from ._panels import Run, View, tab

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
                 task: Mapping[str, Mapping[str, Any]] | None = None, targets: Any = None,
                 onsets: Any = None, **wrap_options: Any) -> None:
        systems = check_runs(runs, **wrap_options)
        names = list(systems)
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
        self._sample = widgets.Dropdown(
            options=[("all", "all")] + [(str(b), b) for b in range(B)], value="all",
            description="sample", layout=widgets.Layout(width="140px"),
            style={"description_width": "initial"})
        self._window = widgets.IntRangeSlider(
            value=(0, T), min=0, max=T, description="steps", continuous_update=False,
            style={"description_width": "initial"}, layout=widgets.Layout(width="300px"))
        common = set.intersection(*(set(r.trace.parts) for r in self._runs.values()))
        parts = [("whole state", _ALL), ("top-layer h", _OUTPUT)] + [
            (p, p) for p in first.parts if p in common and len(common) > 1]
        self._part = widgets.Dropdown(options=parts, value=_ALL, description="part",
                                      style={"description_width": "initial"},
                                      layout=widgets.Layout(width="max-content"))

        self._table = widgets.HTML()
        self._table_message = widgets.HTML()
        self._cka = widgets.Image(format="png", layout=widgets.Layout(max_width="100%",
                                                                      display="none"))
        table_box = widgets.VBox([self._table_message, self._table, self._cka])
        table_box.add_class("hiddenlens-panel-table")

        title = (f"<div style='font-size:15px'><b>Comparing {len(names)} runs</b> "
                 f"<span style='color:#4a5568'>· {_render.esc(', '.join(names))} · {B} "
                 f"sequence{'s' if B != 1 else ''} × {T} steps</span></div>")
        self._build(tabs, title=title, background=background, executor=executor,
                    extra_tabs=[(_TABLE_TAB, table_box)],
                    shared=[shown_box, self._sample, self._window, self._part])
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
            fig, axes = _render.new_figure(1, layout=layout)
            plot_overlay(name, {r.name: self._results(name, r) for r in runs}, ax=axes[0],
                         colors=colors)
            return fig
        # e.g. trajectories in each run's own PCA axes: one panel per run
        _, projection = analysis.n_axes(view)
        ncols = min(len(runs), 4)
        nrows = -(-len(runs) // ncols)
        row_height = 3.4 if projection == "3d" or ncols <= 2 else 2.9
        extra = int(analysis.overlay_row)  # what is comparable across runs, below
        fig = Figure(figsize=(_render.WIDTH_IN, row_height * nrows + 2.4 * extra),
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
            if ax.get_legend() is not None and len(runs) > 1:
                ax.get_legend().remove()
        if extra:
            plot_overlay(name, {r.name: self._results(name, r) for r in runs},
                         ax=fig.add_subplot(grid[nrows, :]), colors=colors)
        return fig

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
        return ("<div class='hiddenlens-summary' style='background:#f3f6fa;border-left:4px solid "
                "#3b6ea5;padding:6px 10px;font-size:13.5px;line-height:1.5'>"
                + "<br>".join(lines) + hint + "</div>")

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
        self.comparison = comparison_of(results, {r.name: r.system for r in runs})
        names = list(self.comparison.names)
        self._table.value = _table_html(self.comparison, self._colors)
        size = min(1.6 + 0.7 * len(runs), 6.0)
        fig, axes = _render.new_figure(1, height=size - 0.4, width=size + 1.8)
        plot_cka(self.comparison.cka, names, ax=axes[0])
        self._cka.value = _render.png_bytes(fig)
        self._cka.layout.display = None
        self._table_message.value = _render.note_box(
            f"Differences (Δ) are against the first run shown, {names[0]}. CKA compares the "
            "top-layer states on these inputs only.")

    def _static_extra(self) -> list[str]:
        if self.comparison is None:
            return []
        return [f"<h4 style='margin:10px 0 2px'>{_TABLE_TAB}</h4>",
                _table_html(self.comparison, self._colors)]


def _table_html(comparison: RunComparison, colors: Mapping[str, str]) -> str:
    """Runs as columns, key figures as rows, each difference beside its value."""
    names = list(comparison.names)
    head = "".join(f"<th style='text-align:right;padding:2px 10px;color:{colors[n]}'>"
                   f"{_render.esc(n)}</th>" for n in names)
    rows = []
    for fr in figure_rows({n: comparison.figures[n] for n in names}):
        cells = []
        for n in names:
            text = _render.esc(format_figure(fr.key, fr.values[n]))
            delta = fr.deltas[n]
            if delta is not None and fr.numeric:
                text += (f" <span style='color:#718096;font-size:11.5px'>(Δ "
                         f"{_render.esc(format_delta(fr.key, delta))})</span>")
            cells.append(f"<td style='text-align:right;padding:2px 10px'>{text}</td>")
        rows.append(f"<tr><td style='padding:2px 10px'>{_render.esc(fr.text)}</td>"
                    f"{''.join(cells)}</tr>")
    return ("<table class='hiddenlens-table' style='border-collapse:collapse;font-size:13px'>"
            f"<thead><tr><th></th>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>")


def compare(runs: Mapping[str, ModelLike], inputs: Sequences, *, h0: Any = None,
            analyses: Sequence[str] | None = None, background: bool = True,
            executor: Executor | None = None, seed: int = 0,
            task: Mapping[str, Mapping[str, Any]] | None = None, targets: Any = None,
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
    h0, analyses, background, executor, seed, targets, onsets, **wrap_options
        As in :func:`hiddenlens.explore`; ``targets`` (a task variable of the shared inputs)
        adds the task-memory tab, each run decoded on its own states.
    task : Mapping[str, Mapping], optional
        Run name -> task metrics measured for that run (see :func:`hiddenlens.explore`): a
        diagnosis line per run at the top.

    Returns
    -------
    Comparison
        An ``ipywidgets.VBox``. Checkboxes choose the runs shown (computing only those);
        ``.comparison`` holds the :class:`~hiddenlens.RunComparison` once the table is shown.
    """
    return Comparison(runs, inputs, h0=h0, analyses=analyses, background=background,
                      executor=executor, seed=seed, task=task, targets=targets,
                      onsets=onsets, **wrap_options)
