"""``explore``: one model's hidden-state dynamics in a notebook widget, one tab per analysis."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from concurrent.futures import Executor
from typing import Any

import ipywidgets as widgets
import numpy as np
import torch

from ..._analyses.runner import ModelLike, Sequences
from ..._core.record import as_system, record
from ..._core.validation import as_sequences
from ..._plotting.style import legend_outside, name_titles, wrap_titles
from ..summary import key_figures, summary_sentence
from . import render as _render
from .board import _ALL, Board, Panel, check_analyses, sample_and_window, task_context
from .over_training import TAB_TITLE, OverTraining, check_timelines
from .panels import Run, View, tab

__all__ = ["Explorer", "explore"]


def _labels(labels: Any, batch: int) -> np.ndarray | None:
    if labels is None:
        return None
    arr = np.asarray(labels)
    if arr.ndim != 1 or arr.shape[0] != batch:
        raise ValueError(f"labels must hold one label per sequence, shape ({batch},), got shape "
                         f"{arr.shape}; pass e.g. the class of each input sequence")
    return arr


class Explorer(Board):
    """The widget returned by :func:`explore` (an ``ipywidgets.VBox``).

    Attributes
    ----------
    trace : Trace
        The states recorded on the inputs, shared by every tab.
    computed : dict
        How many times each analysis was computed so far.
    images : dict
        Analysis name -> the PNG bytes its tab shows.
    """

    def __init__(self, model_or_system: Any, inputs: Any, *, h0: Any = None, labels: Any = None,
                 analyses: Sequence[str] | None = None, background: bool = True,
                 executor: Executor | None = None, seed: int = 0, name: str | None = None,
                 task: Mapping[str, Any] | None = None, timeline: Any = None,
                 interactive: bool | None = None, targets: Any = None, onsets: Any = None,
                 **wrap_options: Any) -> None:
        names = check_analyses(analyses, ("targets", "onsets") if targets is not None else ())
        if task is not None and not isinstance(task, Mapping):
            raise TypeError("task must be a mapping of the model's task metrics (e.g. "
                            f"{{'accuracy': 0.97, 'chance': 0.5}}), got {type(task).__name__}")
        system = as_system(model_or_system, **wrap_options)
        if system.front is None:
            x = as_sequences(inputs, system.input_size, system.dtype,
                             what=f"the {system.source} system")  # (B, T, I)
            trace = record(system, x, h0)
        else:
            # raw inputs (token ids, features) go through the front end once; the tabs work
            # on the recurrent part and the inputs it received, in the module's time order
            trace = record(system, inputs, h0)
            x = torch.from_numpy(np.array(trace.inputs))  # (B, T, I)
            if system.time_reversed:
                x = x.flip(1)
            system = system.without_front()
        context = task_context(targets, onsets, x.shape[0], x.shape[1])
        run = Run(name or system.source, system, trace, x, _labels(labels, trace.batch_size),
                  seed, context)
        timelines = check_timelines(timeline, [run.name])
        super().__init__()  # only once the arguments are known to be good
        self._runs = {run.name: run}
        self._task = {run.name: dict(task)} if task else {}
        self.trace = trace
        B, T, S = trace.states.shape

        self._sample, self._window = sample_and_window(B, T, "340px")
        parts = [("whole state", _ALL)] + [(p, p) for p in trace.parts] if len(trace.parts) > 1 \
            else [("whole state", _ALL)]
        self._part = widgets.Dropdown(options=parts, value=_ALL, description="part",
                                      tooltip="the part of the state analysed",
                                      style={"description_width": "initial"},
                                      layout=widgets.Layout(width="max-content"),
                                      disabled=len(parts) == 1)
        meta = trace.metadata
        size = f"{S} states" if meta.get("hidden_size") in (None, S) else \
            f"{S} states ({meta['num_layers']} layer(s) of {meta['hidden_size']})"
        title = (f"<div style='font-size:15px'><b>{_render.esc(run.name)}</b> "
                 f"<span style='color:#4a5568'>· {system.kind} · {size} · {B} sequence"
                 f"{'s' if B != 1 else ''} × {T} steps</span></div>")
        #: the "Over training" tab (None without a timeline)
        self.over_training = OverTraining(timelines) if timelines else None
        extra = [(TAB_TITLE, self.over_training.box)] if self.over_training else []
        self._build(names, title=title, background=background, executor=executor,
                    extra_tabs=extra, shared=[self._sample, self._window, self._part],
                    interactive=interactive)
        if self.over_training is not None:
            self.over_training.observe(lambda: self._guard(self.over_training.show))

    # ------------------------------------------------------------------ hooks
    @property
    def run(self) -> Run:
        return next(iter(self._runs.values()))

    def _part_value(self, run: Run) -> Any:
        return None if self._part.value == _ALL else self._part.value

    def _view(self, panel: Panel) -> View:
        return self._sample_window_view(panel, self.trace.n_steps)

    def _update_shared_state(self) -> None:
        name = self.current
        analysis = tab(name) if name else None
        uses = analysis.uses if analysis else frozenset()
        self._sample.disabled = "sample" not in uses
        self._window.disabled = "window" not in uses
        takes_part = analysis is not None and (analysis.part_option is not None or any(
            tab(d).part_option for d in analysis.needs))
        self._part.disabled = len(self._part.options) == 1 or not takes_part

    def _draw_panel(self, panel: Panel, view: View, layout: str | None = "constrained"):
        analysis, run = panel.analysis, self.run
        n, projection = analysis.n_axes(view)
        fig, axes = _render.new_figure(n, projection=projection, layout=layout,
                                       height=4.6 if projection == "3d" else _render.HEIGHT_IN,
                                       width=self._width_in)
        deps = {d: self._results(d, run) for d in analysis.needs}
        analysis.draw(self._results(analysis.name, run), axes, view, run, deps)
        if len(fig.axes) == len(axes) and projection is None:  # no colour bar beside them
            for ax in axes:
                legend_outside(ax)  # legends never over the data
        name_titles(fig, run.trace.metadata.get("model_class"), run.name)
        return wrap_titles(fig, self.figure_px)

    def _show_extra(self, index: int) -> None:
        if self.over_training is not None and index == 0:
            self.over_training.show()

    def _static_extra(self) -> list[str]:
        return self.over_training.static_html() if self.over_training is not None else []

    def _summary_html(self) -> str:
        results = {n: self._results(n, self.run) for n in self._panels}
        present = {n: r for n, r in results.items() if r is not None}
        text = summary_sentence(key_figures(present)) if present else ""
        missing = [self._panels[n].analysis.label.lower() for n in results if n not in present]
        body = _render.esc(text[:1].upper() + text[1:]) + "." if text else \
            "Key figures appear here as the analyses finish."
        rest = ""
        if missing:
            names = _render.esc(", ".join(missing))
            rest = (f"<span style='color:#718096'> Tabs not opened yet: {names} (open them "
                    "or press 'Run all').</span>")
        return ("<div class='hiddenlens-summary' style='background:#f3f6fa;border-left:4px solid "
                f"#3b6ea5;padding:6px 10px;font-size:13.5px'>{body}{rest}</div>")


def explore(model_or_system: ModelLike, inputs: Sequences, *, h0: Any = None, labels: Any = None,
            analyses: Sequence[str] | None = None, background: bool = True,
            executor: Executor | None = None, seed: int = 0, name: str | None = None,
            task: Mapping[str, Any] | None = None, timeline: Any = None,
            interactive: bool | None = None, targets: Any = None, onsets: Any = None,
            **wrap_options: Any) -> Explorer:
    """An interactive notebook view of one model's hidden-state dynamics.

    The model is recorded once on ``inputs``; each tab shows one analysis and is computed only
    when opened, in a background thread (a progress bar and a Cancel button sit at the bottom).
    A strip at the top states the key figures in plain words as they become known.

    Parameters
    ----------
    model_or_system : RecurrentSystem, nn.Module or callable
        Anything :func:`hiddenlens.wrap` accepts (wrapped with ``wrap_options``), or a system.
    inputs : Tensor or ndarray of shape (B, T, I)
        Input sequences, batch first.
    h0 : Tensor or ndarray, optional
        Initial states as in :func:`hiddenlens.record` (zeros by default).
    labels : array_like of shape (B,), optional
        A label per sequence: the trajectories tab draws the mean trajectory of each label
        by default (or the trials coloured by label).
    analyses : sequence of str, optional
        Which tabs to show, in order (default: every available analysis, trajectories first).
        Names: those of :func:`hiddenlens.analyses` ("pca", "spectra", "gradient_flow",
        "lyapunov", "fixed_points", "memory", "task_memory" (needs ``targets``) and any
        registered analysis).
    background : bool, default True
        Compute in a worker thread. False computes inline, in the calling thread (scripts,
        tests); the widget then behaves the same but blocks while computing.
    executor : concurrent.futures.Executor, optional
        Run computations on this executor instead of a private one-thread pool.
    seed : int, default 0
        Seed of the analyses that draw random numbers, so the figures repeat.
    name : str, optional
        Title of the widget (default: the model's class name).
    task : Mapping, optional
        Task metrics measured for the model (``accuracy``, ``chance``, ``loss``, ``r2``,
        ``n_eval``, ``horizon``; see :func:`hiddenlens.diagnose`): a diagnosis line
        at the top reads the key figures against them.
    timeline : Timeline, Monitor or DataFrame, optional
        The model's key figures over training (from :func:`hiddenlens.timeline`, a
        :class:`hiddenlens.Monitor` or its ``.timeline`` table): adds an "Over training" tab
        drawing each figure against step with its interval band (a figure chooser and a
        bands switch; nothing is computed).
    interactive : bool, optional
        Show figures as ipympl canvases (zoom, pan, a read-out of the coordinates under the
        cursor). Default None: where the optional extra is installed (``pip install
        'hiddenlens[interactive]'``); True without it shows PNG figures with a note; False:
        PNG figures always (fastest redraws).
    targets : array_like of shape (B,) or (B, T), optional
        A task variable of the input sequences (a cue's identity per sequence, a value per
        step): adds the task-memory tab, which decodes it from the state at each lag after its
        onset (:func:`hiddenlens.task_memory`). Without targets that tab is left out.
    onsets : array_like of int, shape (B,), optional
        With ``targets``: the event step of each sequence that the lags count from (default:
        the first step).

    Returns
    -------
    Explorer
        An ``ipywidgets.VBox``; display it (or end a cell with it). ``.show_static()`` gives
        every figure as plain HTML for front ends without widgets, ``.wait()`` blocks until
        the background work is done.

    Notes
    -----
    Results are cached by the options that change the computation, so the sample, step window,
    colouring and 2-D/3-D controls only redraw. The user's model is not modified.
    """
    return Explorer(model_or_system, inputs, h0=h0, labels=labels, analyses=analyses,
                    background=background, executor=executor, seed=seed, name=name,
                    task=task, timeline=timeline, interactive=interactive, targets=targets,
                    onsets=onsets, **wrap_options)
