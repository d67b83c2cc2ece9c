"""The analyses the widgets show: one registry entry per analysis (compute, options, drawing).

An entry says which keyword options change the computation (these become controls and form the
cache key), which view controls only change the drawing, and how to draw a result onto Axes.
Computing always goes through :func:`hiddenlens.run_analyses`, so the widgets use the same
default budgets and option checks as the report and :func:`hiddenlens.compare_runs`. Every
analysis of the registry has a tab (:func:`tab`); an entry here adds controls and drawing.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch

from ..._analyses.runner import budget_of, run_analyses
from ..._core.registry import analysis_spec
from ..._core.systems import RecurrentSystem
from ..._core.trace import Trace

__all__ = ["Analysis", "Option", "Run", "View", "REGISTRY", "register", "option_defaults", "tab"]


@dataclass(frozen=True, eq=False)
class Run:
    """One model as the widgets see it: its system, the trace on the inputs, the inputs."""

    name: str
    system: RecurrentSystem
    trace: Trace
    inputs: torch.Tensor  # (B, T, I)
    labels: np.ndarray | None = None  # (B,) one label per sample, for colouring
    seed: int = 0
    context: Mapping[str, Any] = field(default_factory=dict)  # e.g. targets, onsets


@dataclass(frozen=True)
class View:
    """The view-only control values: changing them redraws from the cache, never recomputes."""

    sample: int | None = None  # None: every sample
    window: tuple[int, int] | None = None  # steps [t0, t1)
    extra: Mapping[str, Any] = field(default_factory=dict)  # per-analysis view options

    def steps(self) -> slice | None:
        return None if self.window is None else slice(*self.window)


@dataclass(frozen=True)
class Option:
    """A control of one analysis.

    ``name`` is the keyword passed to the analysis (for a compute option) or a key of
    ``View.extra`` (for a view option). ``default(run)`` gives the starting value; with
    ``choices`` ((label, value) pairs) the control is a drop-down, otherwise an integer box
    bounded by ``low`` and ``high(run)``.
    """

    name: str
    label: str
    default: Callable[[Run], Any]
    choices: Callable[[Run], Sequence[tuple[str, Any]]] | None = None
    low: int = 1
    high: Callable[[Run], int] | None = None
    tip: str = ""


@dataclass(frozen=True, eq=False)
class Analysis:
    """One tab: how to compute, what controls it has, how to draw.

    Attributes
    ----------
    name : str
        The analysis name in the registry (:func:`hiddenlens.analyses`).
    label : str
        Tab title.
    options : tuple of Option
        Compute options (part of the cache key).
    views : tuple of Option
        View-only options (drawing only).
    uses : frozenset of str
        Which shared view controls change the drawing: "sample", "window".
    part_option : str or None
        Keyword that receives the shared "part" control (a compute option), if any.
    needs : tuple of str
        Further analyses whose results the drawing uses (e.g. fixed points on PCA axes).
    draw : callable
        ``draw(result, axes, view, run, deps)`` draws one run's result on ``axes``.
    n_axes : callable
        ``n_axes(view) -> (number of Axes, projection or None)``.
    prepare : callable, optional
        ``prepare(run, options) -> keyword options`` turns control values that are not plain
        keywords (e.g. "hold the input at its mean") into what the analysis takes.
    per_run : bool
        In a comparison, draw each run on its own Axes (e.g. in its own PCA axes) instead of
        the analysis' overlay of all runs on one.
    overlay_row : bool
        With ``per_run``, add the analysis' overlay of all runs below the per-run Axes.
    run_title : callable, optional
        ``run_title(result) -> str`` appended to a run's name above its own Axes.
    preview : callable, optional
        ``preview(run) -> Run or None``: a smaller run (fewer sequences) whose result the
        explorer draws first while the whole run is computed; None when the run is small.
    """

    name: str
    label: str
    draw: Callable[..., None]
    options: tuple[Option, ...] = ()
    views: tuple[Option, ...] = ()
    uses: frozenset[str] = frozenset()
    part_option: str | None = None
    needs: tuple[str, ...] = ()
    n_axes: Callable[[View], tuple[int, str | None]] = lambda view: (1, None)
    prepare: Callable[[Run, dict[str, Any]], dict[str, Any]] | None = None
    per_run: bool = False
    overlay_row: bool = False
    run_title: Callable[[Any], str] | None = None
    preview: Callable[[Run], Run | None] | None = None

    @property
    def caution(self) -> str:
        return analysis_spec(self.name).caution

    def available(self) -> bool:
        return analysis_spec(self.name).available()

    def accepted(self) -> set[str]:
        """Keywords the analysis function accepts (options it lacks are not offered)."""
        names, var_kw = analysis_spec(self.name).accepted()
        return names | ({o.name for o in self.options} if var_kw else set())

    def compute(self, run: Run, options: Mapping[str, Any]) -> Any:
        """Run this analysis on ``run`` with ``options`` (the other options at their defaults)."""
        opts = dict(options)
        if self.prepare is not None:
            opts = self.prepare(run, opts)
        out = run_analyses(run.system, run.inputs, which=[self.name],
                           options={self.name: opts}, seed=run.seed, trace=run.trace,
                           context=run.context)
        if self.name not in out:
            raise ValueError(f"{self.label} was not run: {out.skipped.get(self.name, '')}")
        return out[self.name]


#: Controls and drawing of the built-in analyses' tabs; any other registered analysis gets a
#: plain tab from :func:`tab`.
REGISTRY: dict[str, Analysis] = {}


def register(analysis: Analysis) -> Analysis:
    """Give an analysis of the registry its own controls and drawing in the widgets."""
    REGISTRY[analysis.name] = analysis
    return analysis


def tab(name: str) -> Analysis:
    """The tab of analysis ``name``: its own entry, or one that draws ``result.plot(ax=ax)``
    (on one Axes per run in a comparison when the analysis has no overlay)."""
    entry = REGISTRY.get(name)
    if entry is not None:
        return entry
    spec = analysis_spec(name)
    return Analysis(name, spec.title, _draw_plain, per_run=spec.overlay is None)


def option_defaults(run: Run, name: str) -> dict[str, Any]:
    """The default budget of analysis ``name`` for ``run`` (shared with the report)."""
    return budget_of(analysis_spec(name), run.system, run.trace, run.seed)


def _default(name: str, key: str, fallback: Callable[[Run], Any]) -> Callable[[Run], Any]:
    def get(run: Run) -> Any:
        value = option_defaults(run, name).get(key)
        return fallback(run) if value is None else value

    return get


# B * T * S^3 of a first pass that computes in a few tenths of a second (dense route of the
# spectra, measured in benchmarks/bench_spectra.py): a GRU with H = 128 does 1 sequence of 500
# steps
_PREVIEW_WORK = 1.2e9


def fewer_sequences(run: Run, work: float | None = None) -> Run | None:
    """The first sequences of ``run``, as many as fit ``work`` (B*T*S^3), or None when the
    whole run fits (or has one sequence)."""
    work = _PREVIEW_WORK if work is None else work
    B, T, S = run.trace.states.shape
    per = float(T) * float(S) ** 3
    if B < 2 or B * per <= 2 * work:
        return None
    b = max(1, min(B - 1, int(work // per)))
    tr = run.trace
    part = Trace(np.asarray(tr.states)[:b], np.asarray(tr.initial)[:b],
                 np.asarray(tr.inputs)[:b], tr.parts, tr.metadata)
    labels = None if run.labels is None else run.labels[:b]
    return Run(run.name, run.system, part, run.inputs[:b], labels, run.seed)


def _state_size(run: Run) -> int:
    return run.trace.state_size


def _n_steps(run: Run) -> int:
    return run.trace.n_steps


# ---------------------------------------------------------------------- drawing
def _window(ax: Any, view: View) -> None:
    """Show the steps of the window only, with the y-range fitted to what is visible."""
    if view.window is None:
        return
    t0, t1 = view.window[0], view.window[1] - 1
    ax.set_xlim(t0, max(t1, t0 + 1))
    ys = []
    for line in ax.get_lines():
        x = np.asarray(line.get_xdata(), dtype=float)
        y = np.asarray(line.get_ydata(), dtype=float)
        if x.shape == y.shape and x.size > 1:  # curves over time, not reference lines
            ys.append(y[(x >= t0) & (x <= t1)])
    y = np.concatenate(ys) if ys else np.empty(0)
    log = ax.get_yscale() == "log"
    y = y[np.isfinite(y) & (y > 0)] if log else y[np.isfinite(y)]
    if y.size:
        lo, hi = float(y.min()), float(y.max())
        if log:
            pad = (hi / lo) ** 0.05 if hi > lo else 1.1
            ax.set_ylim(lo / pad, hi * pad)
        else:
            pad = 0.05 * (hi - lo) if hi > lo else 0.5 * (abs(hi) or 1.0)
            ax.set_ylim(lo - pad, hi + pad)


def _draw_plain(result, axes, view, run, deps):
    result.plot(ax=axes[0])


def _draw_spectra(result, axes, view, run, deps):
    ax = axes[0]
    kw = _accepted_kw(result.plot, sample=view.sample, samples=view.sample)
    result.plot(ax=ax, **kw)
    _window(ax, view)


def _draw_gradient_flow(result, axes, view, run, deps):
    kw = _accepted_kw(result.plot, sample=view.sample, samples=view.sample,
                      norm=view.extra.get("norm", "spectral"))
    result.plot(ax=axes[0], **kw)


def _draw_lyapunov(result, axes, view, run, deps):
    result.plot(ax=axes[0], kind="spectrum")
    result.plot(ax=axes[1], kind="convergence")


def _color_by(view: View, run: Run) -> Any:
    how = view.extra.get("color_by", "time")
    if how in ("label", "means"):  # labels the result does not hold (or too many for means)
        return run.labels if run.labels is not None else "sample"
    return how


def _draw_pca(result, axes, view, run, deps):
    how = view.extra.get("color_by", "time")
    kw = {"ax": axes[0], "dims": view.extra.get("dims", 2), "samples": view.sample,
          "steps": view.steps()}
    if how == "means" and result.condition_means is not None:
        result.plot(conditions=True, **kw)  # the chosen sample drawn faintly behind
        return
    if how == "label" and result.labels is not None:
        result.plot(conditions=False, color_by="label", **kw)
        return
    result.plot(conditions=False, color_by=_color_by(view, run), **kw)


def _task_labels(run: Run) -> Any:
    """The run's labels: those given to the widget, else task targets (per sequence or per
    step) of its context that fit its trace."""
    if run.labels is not None:
        return run.labels
    targets = (getattr(run, "context", None) or {}).get("targets")
    B, T = run.trace.batch_size, run.trace.n_steps
    return targets if targets is not None and np.shape(targets) in ((B,), (B, T)) else None


def _pca_labels(run: Run, options: dict[str, Any]) -> dict[str, Any]:
    # labels given to the widget label the PCA (condition means); task targets reach it
    # through the context, as in run_analyses
    if run.labels is not None:
        options.setdefault("labels", run.labels)
    return options


def _draw_fixed_points(result, axes, view, run, deps):
    kw = _accepted_kw(result.plot, dims=view.extra.get("dims", 2))
    result.plot(ax=axes[0], pca=deps["pca"], **kw)


def _draw_memory(result, axes, view, run, deps):
    result.plot(ax=axes[0])


def _held_input(run: Run, options: dict[str, Any]) -> dict[str, Any]:
    held = options.pop("x", "zero")
    if held == "mean":
        options["x"] = run.inputs.mean(dim=(0, 1))  # (I,)
    return options


def _memory_inputs(run: Run, options: dict[str, Any]) -> dict[str, Any]:
    # data mode decodes the run's recorded trace; probe mode checks its states against it
    if options.get("mode") == "probe":
        options["reference"] = run.trace
    return options


def _accepted_kw(fn: Callable[..., Any], **kw: Any) -> dict[str, Any]:
    names = inspect.signature(fn).parameters
    return {k: v for k, v in kw.items() if k in names}


def _dims(view: View) -> tuple[int, str | None]:
    return 1, "3d" if view.extra.get("dims", 2) == 3 else None


_DIMS = Option("dims", "axes", lambda run: 2,
               choices=lambda run: [("2-D", 2), ("3-D", 3)] if run.trace.state_size >= 3
               else [("2-D", 2)], tip="draw the leading 2 or 3 components")
_COLOR = Option("color_by", "draw", lambda run: "means" if _task_labels(run) is not None
                else "time",
                choices=lambda run: ([("condition means", "means"), ("trials by label", "label")]
                                     if _task_labels(run) is not None else [])
                + [("trials by time", "time"), ("trials by sample", "sample")],
                tip="the mean trajectory of each label value, or every trajectory coloured "
                    "by its label, its step or its sample; over means aligned to onsets the "
                    "step window counts from the onset")

register(Analysis(
    "spectra", "Spectra", _draw_spectra,
    options=(Option("k", "top k", _default("spectra", "k", _state_size), high=_state_size,
                    tip="how many of the largest singular values of each step Jacobian"),),
    uses=frozenset({"sample", "window"}), preview=fewer_sequences))
register(Analysis(
    "gradient_flow", "Gradient flow", _draw_gradient_flow,
    options=(Option("max_lag", "max lag", lambda r: r.trace.n_steps - 1,
                    high=lambda r: r.trace.n_steps - 1,
                    tip="the longest lag T - t followed back from the last step"),),
    views=(Option("norm", "norm", lambda r: "spectral",
                  choices=lambda r: [("spectral", "spectral"), ("Frobenius", "frobenius")],
                  tip="operator 2-norm or Frobenius norm of d s_T / d s_t"),),
    uses=frozenset({"sample"}), part_option="parts"))
register(Analysis(
    "lyapunov", "Lyapunov", _draw_lyapunov,
    options=(Option("k", "exponents", _default("lyapunov", "k", _state_size), high=_state_size,
                    tip="how many of the largest exponents"),
             Option("warmup", "warm-up", _default("lyapunov", "warmup", lambda r: 0), low=0,
                    high=lambda r: r.trace.n_steps - 1,
                    tip="leading steps that advance the frame without counting")),
    n_axes=lambda view: (2, None)))
def _fit_windows(run: Run) -> list[tuple[str, Any]]:
    """Windows of steps the PCA axes can be fitted on: all, halves, a task period."""
    T = run.trace.n_steps
    windows: list[tuple[str, Any]] = [("all steps", None)]
    if T >= 4:
        h = T // 2
        windows += [(f"steps 0-{h - 1}", range(0, h)), (f"steps {h}-{T - 1}", range(h, T)),
                    (f"last quarter ({T - T // 4}-{T - 1})", range(T - T // 4, T))]
    onsets = (getattr(run, "context", None) or {}).get("onsets")
    if onsets is not None:
        first = int(np.min(np.asarray(onsets)))
        if 2 <= first < T:
            windows.append((f"before the first onset (0-{first - 1})", range(0, first)))
        if first < T - 1:
            windows.append((f"from the first onset ({first}-{T - 1})", range(first, T)))
    return windows


_FIT = Option("fit_steps", "fit axes on", lambda run: None, choices=_fit_windows,
              tip="the steps whose states the PCA axes are fitted on; every state is "
                  "projected on them (the title names the window)")

register(Analysis(
    "pca", "Trajectories", _draw_pca, options=(_FIT,), views=(_DIMS, _COLOR),
    uses=frozenset({"sample", "window"}), part_option="parts", n_axes=_dims, per_run=True,
    prepare=_pca_labels,
    overlay_row=True, run_title=lambda r: f"participation ratio {r.participation_ratio:.1f}"))
register(Analysis(
    "fixed_points", "Fixed points", _draw_fixed_points, views=(_DIMS,),
    options=(Option("n_starts", "starts", _default("fixed_points", "n_starts", lambda r: 64),
                    high=lambda r: r.trace.batch_size * r.trace.n_steps,
                    tip="starting states drawn from the trace"),
             Option("x", "input held at", lambda r: "zero",
                    choices=lambda r: [("zero", "zero"), ("mean input", "mean")],
                    tip="the constant input under which points are fixed")),
    needs=("pca",), n_axes=_dims, prepare=_held_input, per_run=True))
register(Analysis(
    "memory", "Memory", _draw_memory,
    options=(Option("method", "method", lambda r: "decoding",
                    choices=lambda r: [("decoding", "decoding"),
                                       ("perturbation", "perturbation"),
                                       ("sensitivity", "sensitivity")],
                    tip="read inputs back from the state, follow an impulse, or use gradients"),
             Option("mode", "inputs", lambda r: "data",
                    choices=lambda r: [("these inputs", "data"), ("random probe", "probe")],
                    tip="the sequences given to the widget (default) or i.i.d. probe inputs "
                        "(a warning says when they drive the states outside their range)"),
             Option("max_lag", "max lag", _default("memory", "max_lag", lambda r: 40),
                    high=lambda r: max(1, r.trace.n_steps - 1),
                    tip="the longest lag the memory curve reaches")),
    part_option="parts", prepare=_memory_inputs))


def _draw_task_memory(result, axes, view, run, deps):
    if view.extra.get("show", "curve") == "cross_temporal":
        if result.cross_temporal is not None:
            result.plot(ax=axes[0], kind="cross_temporal")
            return
        axes[0].text(0.5, 0.5, "no cross-temporal matrix: set 'cross-temporal' to 'on'",
                     ha="center", va="center", transform=axes[0].transAxes)
        axes[0].set_axis_off()
        return
    result.plot(ax=axes[0])


def _task_lag_default(run: Run) -> int:
    spec = analysis_spec("task_memory")
    return int(budget_of(spec, run.system, run.trace, run.seed, run.context).get("max_lag", 1))


def _task_lag_high(run: Run) -> int:
    # per sequence, later lags have no rows; per step, onset + max_lag must stay in the steps
    onsets = run.context.get("onsets")
    latest = int(np.max(onsets)) if onsets is not None and len(onsets) else 0
    return max(0, run.trace.n_steps - 1 - latest)


register(Analysis(
    "task_memory", "Task memory", _draw_task_memory,
    options=(Option("max_lag", "max lag",
                    lambda r: min(_task_lag_default(r), _task_lag_high(r)), low=0,
                    high=_task_lag_high, tip="the longest lag after the onset decoded"),
             Option("cross_temporal", "cross-temporal", lambda r: False,
                    choices=lambda r: [("off", False), ("on", True)],
                    tip="also score each lag's decoder at every other lag")),
    views=(Option("show", "show", lambda r: "curve",
                  choices=lambda r: [("score over lag", "curve"),
                                     ("cross-temporal matrix", "cross_temporal")],
                  tip="the decoding curve with its chance band, or the train-lag x test-lag "
                      "matrix"),),
    part_option="parts", per_run=True, run_title=lambda r: f"span {r.span}"))
