"""The machinery shared by the explore and compare widgets: tabs, controls, jobs, drawing.

Only the tab on screen is computed. Its compute options form the cache key; view controls
redraw from the cache. Computing runs in a worker thread (see :mod:`._jobs`); drawing renders a
pyplot-free Agg figure to PNG bytes set on an ``ipywidgets.Image``, which is safe from any
thread and testable without a kernel.
"""

from __future__ import annotations

import threading
import time
from collections import OrderedDict
from collections.abc import Hashable, Mapping, Sequence
from concurrent.futures import Executor
from dataclasses import dataclass, field
from typing import Any

import ipywidgets as widgets
import numpy as np

from ..._core.registry import analyses as registered_analyses
from ..._core.registry import analysis_spec
from . import render as _render
from .jobs import Cache, Job, Runner, Step
from .panels import Analysis, Option, Run, View, tab

__all__ = ["Board", "Panel", "StaticView", "DEFAULT_ORDER", "check_analyses", "task_context"]

#: Tab order of the built-in analyses: the cheap overview first, so the first figure shows up
#: quickly; other registered analyses follow in registry order.
DEFAULT_ORDER = ("pca", "spectra", "gradient_flow", "lyapunov", "fixed_points", "memory",
                 "task_memory")

_ALL = "__all__"  # value of the "whole state" choice of the part control
MIN_PX, MAX_PX = 360, 1400  # figures are drawn between these widths (pixels)

# NOTE: [Drawing at the container's width]
# A PNG drawn 900 px wide and shown in a 450 px cell halves every text (5 px labels). Widgets
# cannot ask the page for a size, so the board carries a small HTML block whose image error
# handler (handlers in widget HTML run; <script> does not) watches the tab area with a
# ResizeObserver and types its inner width into a hidden Text widget, which syncs to the
# kernel like any typed value. Figures are then drawn at that width (the layout memo and the
# figure cache are keyed by it). Without a front end the default 900 px is kept. The same
# block holds the board's style sheet: tab titles at their full length, wrapping onto a
# second row in a narrow cell.
_PAGE_JS = (
    "var img=this,tries=0;function go(){var b=img.closest('.hiddenlens-board');"
    "var inp=b&&b.querySelector('.hiddenlens-width input');"
    "var c=b&&b.querySelector('.widget-tab-contents');"
    "if(!inp||!c){if(tries++<50)setTimeout(go,200);return;}"
    "function send(){var s=getComputedStyle(c);var w=Math.floor(c.clientWidth"
    "-parseFloat(s.paddingLeft)-parseFloat(s.paddingRight))-4;"
    "if(w>50&&String(w)!==inp.value){inp.value=String(w);"
    "inp.dispatchEvent(new Event('input',{bubbles:true}));}}"
    "new ResizeObserver(function(){clearTimeout(img._t);img._t=setTimeout(send,150);})"
    ".observe(c);send();}go();"
)
_PAGE_CSS = (
    ".hiddenlens-board .widget-tab>.lm-TabBar .lm-TabBar-content{flex-wrap:wrap}"
    ".hiddenlens-board .widget-tab>.lm-TabBar{height:auto;min-height:fit-content}"
    ".hiddenlens-board .widget-tab>.lm-TabBar .lm-TabBar-tab{flex:0 0 auto;min-width:"
    "max-content;max-width:none}"
    ".hiddenlens-board .widget-tab>.lm-TabBar .lm-TabBar-tabLabel{overflow:visible;"
    "text-overflow:clip}"
    ".hiddenlens-board .hiddenlens-scroll{overflow-x:auto;max-width:100%}"
    ".hiddenlens-board .widget-html,.hiddenlens-board .widget-html-content{max-width:100%;"
    "min-width:0}"
)
_PAGE_HTML = (f"<style>{_PAGE_CSS}</style><img alt='' src='data:,' style='display:none' "
              f'onerror="{_PAGE_JS}">')
_KEEP_PNGS = 48  # recent figures kept, so going back to a view needs no drawing


def check_analyses(analyses: Sequence[str] | None, context: Sequence[str] = ()) -> list[str]:
    """Validate the ``analyses`` argument; None means every available analysis.

    ``context`` names the data the board was given besides the inputs (e.g. ``"targets"``):
    by default an analysis that needs data the board lacks is left out; naming it is an error.
    """
    known = registered_analyses()
    given = set(context)
    if analyses is None:
        order = [n for n in DEFAULT_ORDER if n in known] + [
            n for n in known if n not in DEFAULT_ORDER]
        return [n for n in order
                if analysis_spec(n).available() and set(analysis_spec(n).needs) <= given]
    if isinstance(analyses, str):
        analyses = [analyses]
    names = list(analyses)
    unknown = [n for n in names if n not in known]
    if unknown or not names:
        raise ValueError(f"unknown analyses {unknown}; choose one or more of "
                         f"{', '.join(known)} (or pass analyses=None for all)")
    missing = [n for n in names if not analysis_spec(n).available()]
    if missing:
        raise ValueError(f"analyses {missing} are not available in this installation; "
                         "leave them out of analyses=")
    for n in names:
        absent = [k for k in analysis_spec(n).needs if k not in given]
        if absent:
            raise ValueError(f"the {n!r} analysis needs {', '.join(absent)}; pass "
                             f"{absent[0]}=... (e.g. targets=labels of shape (B,) or (B, T)) "
                             f"or leave {n!r} out of analyses=")
    return names


def task_context(targets: Any, onsets: Any, batch: int, n_steps: int) -> dict[str, Any]:
    """``targets`` and ``onsets`` of a board as the analyses' context, shapes checked here so a
    wrong one fails at once rather than inside a tab."""
    if targets is None:
        if onsets is not None:
            raise ValueError("onsets were given without targets; pass targets= (the task "
                             "variable whose lags count from the onsets) or drop onsets")
        return {}
    y = np.asarray(targets.detach().cpu().numpy() if hasattr(targets, "detach") else targets)
    if y.shape not in ((batch,), (batch, 1), (batch, n_steps)):
        raise ValueError(f"targets has shape {y.shape} but the inputs hold {batch} sequences "
                         f"of {n_steps} steps; pass one value per sequence (shape ({batch},)) "
                         f"or per step (shape ({batch}, {n_steps}))")
    context = {"targets": y}
    if onsets is not None:
        on = np.asarray(onsets.detach().cpu().numpy() if hasattr(onsets, "detach") else onsets)
        if on.shape != (batch,) or on.dtype.kind not in "iu":
            raise ValueError(f"onsets must be integer steps of shape ({batch},), got "
                             f"{on.dtype} of shape {on.shape}; pass the event step of each "
                             "sequence")
        if on.size and (on.min() < 0 or on.max() >= n_steps):
            raise ValueError(f"onsets must lie in 0..{n_steps - 1} (the steps of the inputs), "
                             f"got {int(on.min())}..{int(on.max())}")
        context["onsets"] = on
    return context


@dataclass(eq=False)
class Panel:
    """The widgets of one tab and what it last showed."""

    analysis: Analysis
    options: dict[str, widgets.Widget]
    views: dict[str, widgets.Widget]
    image: widgets.Image
    message: widgets.HTML
    box: widgets.VBox
    png: bytes = b""
    errors: dict[Hashable, BaseException] = field(default_factory=dict)
    draws: int = 0
    export: widgets.Box | None = None  # downloads (PNG, SVG) and the figure's description
    export_parts: dict[str, Any] | None = None


@dataclass(frozen=True)
class StaticView:
    """Figures and key figures as one self-contained HTML page (no widget front end needed).

    Shown by any notebook front end through ``_repr_html_``; ``save(path)`` writes the page.
    """

    html: str

    def _repr_html_(self) -> str:
        return self.html

    def save(self, path: Any) -> None:
        with open(path, "w", encoding="utf-8") as fh:
            fh.write("<!DOCTYPE html><meta charset='utf-8'><title>hiddenlens</title>"
                     f"<body style='font-family:sans-serif'>{self.html}</body>")


def _int_box(option: Option, run: Run) -> widgets.Widget:
    value = int(option.default(run))
    high = int(option.high(run)) if option.high is not None else 10**9
    return widgets.BoundedIntText(
        value=min(max(value, option.low), high), min=option.low, max=high,
        description=option.label, tooltip=option.tip, continuous_update=False,
        style={"description_width": "initial"}, layout=widgets.Layout(width="90px"))


def _dropdown(option: Option, run: Run) -> widgets.Widget:
    choices = list(option.choices(run))
    value = option.default(run)
    if value not in [v for _, v in choices]:
        value = choices[0][1]
    return widgets.Dropdown(options=choices, value=value, description=option.label,
                            tooltip=option.tip, style={"description_width": "initial"},
                            layout=widgets.Layout(width="max-content"))


def labelled(w: widgets.Widget) -> widgets.Widget:
    """``w`` with its description moved into a Label beside it, both carrying the tooltip.

    ipywidgets 8 puts a control's ``tooltip`` on the page only when its description is empty
    (the description label otherwise gets no title either), so a described control with a
    tooltip becomes a Label and the bare control, each with the tooltip as its title.
    """
    tip = getattr(w, "tooltip", None)
    desc = getattr(w, "description", "")
    if not tip or not desc or isinstance(w, (widgets.Checkbox, widgets.Button)):
        return w
    w.description = ""
    # an HTML label: a Label widget's view does not carry the tooltip as a title either
    label = widgets.HTML(f"<span class='hiddenlens-label' title='{_render.esc(tip)}' "
                         f"style='font-size:var(--jp-widgets-font-size)'>{_render.esc(desc)}"
                         "</span>", layout=widgets.Layout(margin="0 4px 0 0"))
    box = widgets.HBox([label, w], layout=widgets.Layout(align_items="center"))
    box.add_class("hiddenlens-control")
    return box


def row(children: Sequence[widgets.Widget], space: str = "16px") -> widgets.HBox:
    """Controls in a wrapping row, ``space`` apart (described controls get their tooltip
    onto the page, see :func:`labelled`)."""
    items = [labelled(w) for w in children]
    for w in items:
        w.layout.margin = f"2px {space} 2px 0"
    return widgets.HBox(items, layout=widgets.Layout(flex_flow="row wrap",
                                                     align_items="center"))


def sample_and_window(B: int, T: int, width: str) -> tuple[widgets.Dropdown,
                                                            widgets.IntRangeSlider]:
    """The redraw-only controls of a trajectory view: one sequence of B (or all of them) and
    the steps [first, last) of T drawn, the slider ``width`` wide."""
    sample = widgets.Dropdown(
        options=[("all", "all")] + [(str(b), b) for b in range(B)], value="all",
        description="sample", layout=widgets.Layout(width="90px"),
        tooltip="one sequence, or all of them (redraws only)",
        style={"description_width": "initial"})
    window = widgets.IntRangeSlider(
        value=(0, T), min=0, max=T, step=1, description="steps", continuous_update=False,
        tooltip="the steps drawn, [first, last) (redraws only)",
        style={"description_width": "initial"}, layout=widgets.Layout(width=width))
    return sample, window


def make_control(option: Option, run: Run) -> widgets.Widget:
    return _dropdown(option, run) if option.choices is not None else _int_box(option, run)


class Board(widgets.VBox):
    """Base widget: a title, a summary strip, shared controls, one tab per analysis, a status row.

    Subclasses set ``self._runs`` (name -> :class:`Run`) before calling :meth:`_build`, and
    implement :meth:`_layout`, :meth:`_draw_panel` and :meth:`_summary_html`.
    """

    _runs: dict[str, Run]

    def _build(self, analyses: Sequence[str], *, title: str, background: bool,
               executor: Executor | None, extra_tabs: Sequence[tuple[str, widgets.Widget]] = (),
               shared: Sequence[widgets.Widget] = (),
               interactive: bool | None = None) -> None:
        for w, what in ((self._sample, "sample"), (self._window, "window"), (self._part, "part")):
            w.add_class(f"hiddenlens-{what}")  # stable hooks for styling and browser tests
        if interactive not in (None, True, False):
            raise TypeError(f"interactive must be True, False or None, got {interactive!r}")
        has_ipympl = _render.interactive_available()
        #: figures as ipympl canvases (zoom, pan, a read-out of the point under the cursor)
        #: instead of PNG images; PNG where ipympl is not installed
        self.interactive = bool(has_ipympl and interactive is not False)
        self._interactive_note = "" if has_ipympl or not interactive else (
            "Interactive figures need the optional extra ipympl (pip install "
            "'hiddenlens[interactive]'); showing PNG figures instead.")
        self._cache = Cache()
        self._runner = Runner(self._cache, background=background, executor=executor,
                              on_progress=self._on_progress)
        self._draw_lock = threading.RLock()
        self._layouts = _render.LayoutMemo()
        self._pngs: OrderedDict[Hashable, bytes] = OrderedDict()  # recent figures by view
        self._drawing_preview = threading.local()  # first-pass results seen by one drawing
        self.last_draw_seconds = float("nan")
        first = next(iter(self._runs.values()))

        self._title = widgets.HTML(title)
        self._summary = widgets.HTML(layout=widgets.Layout(margin="0 0 4px 0"))
        self._task: dict[str, Mapping[str, Any]] = dict(getattr(self, "_task", {}) or {})
        self._diagnosis = widgets.HTML(layout=widgets.Layout(margin="0 0 4px 0"))
        self._diagnosis.add_class("hiddenlens-diagnosis")
        self._table_export = widgets.HBox(layout=widgets.Layout(flex_flow="row wrap"))
        self._table_export.add_class("hiddenlens-table-export")
        self._panels: dict[str, Panel] = {}
        for name in analyses:
            self._panels[name] = self._make_panel(tab(name), first)

        self._shared = list(shared)
        self._extra = list(extra_tabs)
        tab_boxes = [p.box for p in self._panels.values()] + [w for _, w in self._extra]
        titles = [p.analysis.label for p in self._panels.values()] + [t for t, _ in self._extra]
        self._tabs = widgets.Tab(children=tab_boxes, titles=titles)
        self._tabs.selected_index = 0

        self._bar = widgets.IntProgress(value=0, min=0, max=1, bar_style="info",
                                        layout=widgets.Layout(width="160px", visibility="hidden"))
        self._status = widgets.HTML("", layout=widgets.Layout(flex="1 1 auto"))
        self._cancel = widgets.Button(description="Cancel", icon="stop", disabled=True,
                                      tooltip="stop the running computation",
                                      layout=widgets.Layout(width="100px"))
        self._run_all = widgets.Button(description="Run all", icon="play",
                                       tooltip="compute every tab now (fills the summary)",
                                       layout=widgets.Layout(width="100px"))
        self._cancel.on_click(lambda _: self._on_cancel())
        self._run_all.on_click(lambda _: self._guard(self.compute_all))
        status_row = widgets.HBox([self._bar, self._status, self._run_all, self._cancel],
                                  layout=widgets.Layout(align_items="center", width="100%"))
        controls = row(self._shared)

        # the width the figures are drawn at: the page reports the tabs' inner width into a
        # hidden text box (NOTE: [Drawing at the container's width])
        self.figure_px = int(_render.WIDTH_IN * _render.DPI)
        self._width = widgets.Text("", layout=widgets.Layout(display="none"))
        self._width.add_class("hiddenlens-width")
        self._probe = widgets.HTML(_PAGE_HTML, layout=widgets.Layout(height="0px",
                                                                      margin="0"))
        self._width.observe(lambda ch: self._guard(self._on_width, ch["new"]), names="value")
        # status above the tabs, so it stays in view under tall figures
        self.children = [self._probe, self._width, self._title, self._diagnosis,
                         self._summary, self._table_export, controls, status_row, self._tabs]
        self.layout = widgets.Layout(width="100%", max_width="980px", padding="2px 6px")
        self.add_class("hiddenlens-board")

        self._tabs.observe(lambda _: self._guard(self._on_tab), names="selected_index")
        for w in self._shared:
            w.observe(lambda _: self._guard(self._on_shared), names="value")
        self._update_summary()
        self._on_tab()

    # ------------------------------------------------------------------ width
    def _on_width(self, value: str) -> None:
        """Draw at the width the page reports (a few pixels either way are not redrawn)."""
        try:
            px = int(float(value))
        except ValueError:
            return
        px = max(MIN_PX, min(MAX_PX, px))
        if abs(px - self.figure_px) < 8:
            return
        self.figure_px = px
        self._on_shared()  # the current tab; others draw at this width when opened

    @property
    def _width_in(self) -> float:
        return self.figure_px / _render.DPI

    # ------------------------------------------------------------------ panels
    def _make_panel(self, analysis: Analysis, run: Run) -> Panel:
        accepted = analysis.accepted()
        options = {o.name: make_control(o, run) for o in analysis.options if o.name in accepted}
        views = {o.name: make_control(o, run) for o in analysis.views}
        image = widgets.Image(format="png", layout=widgets.Layout(max_width="100%",
                                                                   height="auto"))
        message = widgets.HTML()
        caution = widgets.HTML(_render.note_box(analysis.caution) if analysis.caution else "")
        controls = row([*options.values(), *views.values()])
        export = widgets.HBox(layout=widgets.Layout(flex_flow="row wrap",
                                                    align_items="center"))
        export.add_class("hiddenlens-export")
        box = widgets.VBox([controls, message, image, export, caution])
        box.add_class(f"hiddenlens-panel-{analysis.name}")
        panel = Panel(analysis, options, views, image, message, box, export=export)
        for w in options.values():
            w.observe(lambda _, p=panel: self._guard(self._show, p), names="value")
        for w in views.values():
            w.observe(lambda _, p=panel: self._guard(self._redraw, p), names="value")
        return panel

    @property
    def current(self) -> str:
        """Name of the analysis on the visible tab ("" for an extra tab)."""
        i = self._tabs.selected_index or 0
        names = list(self._panels)
        return names[i] if i < len(names) else ""

    def select(self, name: str) -> None:
        """Show the tab of analysis ``name`` (or the title of an extra tab)."""
        names = list(self._panels) + [t for t, _ in self._extra]
        if name not in names:
            raise ValueError(f"no tab {name!r}; tabs: {', '.join(names)}")
        self._tabs.selected_index = names.index(name)

    # ------------------------------------------------------------------ keys and steps
    def _part_value(self, run: Run) -> Any:
        return None

    def _options(self, panel: Panel, run: Run) -> dict[str, Any]:
        opts = {k: w.value for k, w in panel.options.items()}
        if panel.analysis.part_option is not None:
            opts[panel.analysis.part_option] = self._part_value(run)
        return opts

    def _key(self, name: str, run: Run) -> Hashable:
        panel = self._panels.get(name)
        if panel is None:  # a dependency without its own tab: default options
            analysis = tab(name)
            opts = {}
            if analysis.part_option is not None:
                opts[analysis.part_option] = self._part_value(run)
        else:
            opts = self._options(panel, run)
        return (run.name, name, tuple(sorted(opts.items(), key=lambda kv: kv[0])))

    def _runs_for(self, panel: Panel) -> list[Run]:
        return list(self._runs.values())

    def _steps(self, name: str, runs: Sequence[Run]) -> list[Step]:
        steps = []
        analysis = tab(name)
        for dep in (*analysis.needs, name):
            for run in runs:
                key = self._key(dep, run)
                opts = dict(key[2])
                entry = tab(dep)
                label = entry.label + (f" of {run.name}" if len(self._runs) > 1 else "")
                steps.append(Step(key, dep, label,
                                  lambda a=entry, r=run, o=opts: a.compute(r, o)))
        return steps

    # ------------------------------------------------------------------ show / draw
    def _on_tab(self) -> None:
        self._on_shared()
        self._update_shared_state()

    def _show_extra(self, index: int) -> None:
        """Subclasses with extra tabs fill them here."""

    def _on_shared(self) -> None:
        name = self.current
        if name:
            self._show(self._panels[name])
        else:
            self._show_extra(self._tabs.selected_index - len(self._panels))

    def _update_shared_state(self) -> None:
        """Grey out shared controls that do not affect the visible tab."""

    def _show(self, panel: Panel) -> None:
        """Draw ``panel`` from the cache, or start computing what it lacks."""
        if panel.analysis.name != self.current:
            return
        steps = self._steps(panel.analysis.name, self._runs_for(panel))
        failed = [panel.errors[s.key] for s in steps
                  if s.key in panel.errors and s.key not in self._cache]
        if failed:
            self._show_error(panel, failed[0])
            return
        missing = [s for s in steps if s.key not in self._cache]
        if not missing:
            self._redraw(panel)
            return
        pending = self._runner.pending_keys()
        panel.message.value = _render.note_box(
            f"Computing {panel.analysis.label.lower()} ... (the other tabs wait until opened)")
        if all(s.key in pending for s in missing):
            return  # already queued; its job redraws the visible tab when done
        self._submit_preview(panel, missing)
        self._runner.submit(missing, self._job_done, self._job_failed)

    def _submit_preview(self, panel: Panel, missing: Sequence[Step]) -> None:
        """Queue a first pass on fewer sequences ahead of ``missing`` when the tab has one.

        Only for one run whose dependencies are all computed: the first pass is drawn as the
        tab's figure (with a note) until the whole result replaces it.
        """
        analysis = panel.analysis
        runs = self._runs_for(panel)
        if analysis.preview is None or len(runs) != 1 or len(missing) != 1 \
                or missing[0].name != analysis.name:
            return
        small = analysis.preview(runs[0])
        if small is None:
            return
        key = missing[0].key
        first = (*key, "first pass")
        opts = dict(key[2])
        step = Step(first, f"{analysis.name} (first pass)", f"{analysis.label} (first pass)",
                    lambda: analysis.compute(small, opts))
        self._runner.submit([step], lambda job: self._preview_done(panel, key, first, small),
                            lambda job, exc: None)  # the whole run reports its own errors

    def _preview_done(self, panel: Panel, key: Hashable, first: Hashable, small: Run) -> None:
        """Draw the first pass unless the whole result (or another tab) got there first."""
        if panel.analysis.name != self.current or key in self._cache:
            return
        with self._draw_lock:
            view = self._view(panel)
            if view.sample is not None and view.sample >= small.trace.batch_size:
                return  # the chosen sequence is not in the first pass
            self._drawing_preview.results = {key: self._cache.get(first)}
            try:
                png = self._layouts.render(
                    self._layout_key(panel, view),
                    lambda layout: self._draw_panel(panel, view, layout))
            except Exception:  # the whole run draws (or reports) in a moment
                return
            finally:
                self._drawing_preview.results = None
            if key in self._cache:
                return
            B = next(iter(self._runs_for(panel))).trace.batch_size
            panel.png = png
            panel.image.value = png
            panel.image.layout.display = None
            panel.message.value = _render.note_box(
                f"First pass on {small.trace.batch_size} of {B} sequences; the figure of all "
                "sequences replaces it when ready.")

    def _job_done(self, job: Job) -> None:
        self._update_summary()
        name = self.current
        if name and all(s.key in self._cache for s in self._steps(name, self._runs_for(
                self._panels[name]))):
            self._redraw(self._panels[name])
        elif not name:
            self._show_extra(self._tabs.selected_index - len(self._panels))

    def _job_failed(self, job: Job, exc: BaseException) -> None:
        step = job.steps[min(job.finished, len(job.steps) - 1)]
        for panel in self._panels.values():
            if any(s.key == step.key for s in self._steps(panel.analysis.name,
                                                          self._runs_for(panel))):
                panel.errors[step.key] = exc
                if panel.analysis.name == self.current:
                    self._show_error(panel, exc, what=step.label)
        self._update_summary()

    def _show_error(self, panel: Panel, exc: BaseException, what: str = "") -> None:
        panel.message.value = _render.error_box(exc, what=what or panel.analysis.label)
        panel.image.layout.display = "none"

    def _redraw(self, panel: Panel) -> None:
        """Render ``panel`` from cached results with the current view (any thread)."""
        if panel.analysis.name != self.current:
            return
        with self._draw_lock:
            steps = self._steps(panel.analysis.name, self._runs_for(panel))
            if not all(s.key in self._cache for s in steps):
                self._show(panel)
                return
            t0 = time.perf_counter()
            view = self._view(panel)
            seen = (tuple(s.key for s in steps), self._layout_key(panel, view), view.sample,
                    view.window, self.figure_px)
            png = self._pngs.get(seen)
            if png is None:
                try:
                    png = self._layouts.render(
                        self._layout_key(panel, view),
                        lambda layout: self._draw_panel(panel, view, layout))
                except Exception as exc:  # shown in the tab, never lost
                    self._show_error(panel, exc, what=f"drawing {panel.analysis.label.lower()}")
                    return
                panel.draws += 1
                self._pngs[seen] = png
                while len(self._pngs) > _KEEP_PNGS:
                    self._pngs.popitem(last=False)
            else:
                self._pngs.move_to_end(seen)
            panel.png = png
            panel.image.value = png
            panel.image.layout.display = None
            panel.message.value = _render.note_box(self._interactive_note, tone="warn") \
                if self._interactive_note else ""
            if self.interactive:
                self._show_live(panel, view)
            self._set_export(panel, png, view)
            self.last_draw_seconds = time.perf_counter() - t0

    def _show_live(self, panel: Panel, view: View) -> None:
        """Put an ipympl canvas of the figure in place of the PNG (the PNG stays for export
        and for front ends without the ipympl extension)."""
        canvas = _render.live_canvas(self._draw_panel(panel, view, "constrained"))
        canvas.add_class("hiddenlens-live")
        box = list(panel.box.children)
        old = [w for w in box if "hiddenlens-live" in getattr(w, "_dom_classes", ())]
        if old:
            box[box.index(old[0])] = canvas
            old[0].close()
        else:
            box.insert(box.index(panel.image) + 1, canvas)
        panel.image.layout.display = "none"
        panel.box.children = box

    # ------------------------------------------------------------------ export, alt text
    def _alt(self, panel: Panel) -> str:
        """What the figure of ``panel`` shows, in words (its runs' key figures)."""
        from .export import alt_text

        runs = self._runs_for(panel)
        parts = []
        for r in runs:
            res = self._results(panel.analysis.name, r)
            try:
                parts.append(alt_text(res, name=r.name if len(self._runs) > 1 else None))
            except TypeError:
                parts.append(r.name)
        return f"Figure: {panel.analysis.label}. " + " | ".join(parts)

    def _set_export(self, panel: Panel, png: bytes, view: View) -> None:
        """The PNG download of what is shown, an SVG button (drawn on demand) and the alt text.

        The widgets are made once per tab and updated, so redraws leave no widgets behind."""
        if panel.export is None:
            return
        from .export import download_link, figure_svg, link_html, safe_filename

        stem = panel.analysis.name
        alt = self._alt(panel)
        panel.image.tooltip = alt  # the accessible name of the image (title attribute)
        parts = panel.export_parts
        if parts is None:
            svg = widgets.Button(description="SVG", tooltip="draw this figure as SVG to "
                                 "download", layout=widgets.Layout(width="70px"))
            svg.add_class("hiddenlens-svg")
            holder = widgets.HBox([svg])
            png_link = widgets.HTML()
            words = widgets.HTML()
            words.add_class("hiddenlens-alt")
            parts = {"svg": svg, "holder": holder, "png": png_link, "words": words,
                     "view": view, "link": None}

            def make_svg(_: Any) -> None:
                with self._draw_lock:
                    fig = self._draw_panel(panel, parts["view"], "constrained")
                    data, filename = figure_svg(fig, stem)
                    if parts["link"] is None:
                        parts["link"] = download_link(data, filename, "SVG")
                    else:
                        parts["link"].value = link_html(data, filename, "SVG")
                    holder.children = [parts["link"]]

            svg.on_click(lambda b: self._guard(make_svg, b))
            panel.export_parts = parts
            panel.export.children = [widgets.Label("download:"), png_link, holder, words]
        parts["view"] = view
        parts["holder"].children = [parts["svg"]]
        parts["png"].value = link_html(png, safe_filename(stem, "png"), "PNG")
        parts["words"].value = (
            "<details><summary style='font-size:12px;color:#4a5568'>Figure description"
            f"</summary><div style='font-size:12px'>{_render.esc(alt)}</div></details>")

    def _view(self, panel: Panel) -> View:
        return View(extra={k: w.value for k, w in panel.views.items()})

    def _sample_window_view(self, panel: Panel, T: int) -> View:
        """The view from the shared sample and step-window controls of a board over T steps."""
        t0, t1 = self._window.value
        t0 = min(t0, T - 1)
        window = None if (t0, t1) == (0, T) else (t0, max(t1, t0 + 1))
        sample = None if self._sample.value == "all" else self._sample.value
        return View(sample=sample, window=window,
                    extra={k: w.value for k, w in panel.views.items()})

    def _results(self, name: str, run: Run) -> Any:
        key = self._key(name, run)
        value = self._cache.get(key)
        if value is None:  # a first pass, only inside the drawing of it
            value = (getattr(self._drawing_preview, "results", None) or {}).get(key)
        return value

    def _layout_key(self, panel: Panel, view: View) -> Hashable:
        # what decides the arrangement of Axes, colour bars and legends (not the data shown)
        return (panel.analysis.name, tuple(sorted(view.extra.items())), view.sample is None,
                tuple(r.name for r in self._runs_for(panel)), self.figure_px)

    # ------------------------------------------------------------------ subclass hooks
    def _draw_panel(self, panel: Panel, view: View, layout: str | None = "constrained"):
        """A Figure of ``panel`` drawn with ``view`` (``layout`` as in ``new_figure``)."""
        raise NotImplementedError

    def _summary_html(self) -> str:
        raise NotImplementedError

    def _update_summary(self) -> None:
        try:
            self._summary.value = self._summary_html()
        except Exception as exc:  # a summary failure must be visible, not fatal
            self._summary.value = _render.error_box(exc, what="summary")
        try:
            self._update_diagnosis()
        except Exception as exc:
            self._diagnosis.value = _render.error_box(exc, what="diagnosis")

    def _run_figures(self) -> dict[str, dict[str, Any]]:
        """Run name -> the key figures of the analyses computed so far."""
        from ..summary import key_figures

        out = {}
        for r in self._runs_for(None):  # the runs shown (a comparison's ticked runs)
            n = r.name
            present = {a: res for a in self._panels
                       if (res := self._results(a, r)) is not None}
            out[n] = key_figures(present) if present else {}
        return out

    def _update_diagnosis(self) -> None:
        """The diagnosis line of each run (when task metrics were given) and the CSV export."""
        from ..._analyses.diagnosis import diagnose
        from .export import download_link, table_csv

        figures = self._run_figures()
        if any(figures.values()):
            data = figures if len(figures) > 1 else next(iter(figures.values()))
            self._table_export.children = [download_link(*table_csv(data), "key figures (CSV)")]
        else:
            self._table_export.children = []
        if not self._task:
            self._diagnosis.value = ""
            return
        lines = []
        for n, figs in figures.items():
            d = diagnose(figs, task=self._task.get(n), name=n)
            colour = {"ok": "#0072B2", "marginal": "#E69F00", "failing": "#D55E00"}.get(
                d.level, "#4a5568")
            warn = "".join(f"<div style='color:#8a5a00;font-size:12px'>\u26a0 {_render.esc(w)}"
                           "</div>" for w in d.warnings)
            lines.append(f"<div><span style='color:{colour};font-weight:600'>\u25cf</span> "
                         f"{_render.esc(d.text)}{warn}</div>")
        self._diagnosis.value = (
            "<div class='hiddenlens-diagnosis-lines' style='background:#fbfbf4;border-left:4px "
            f"solid #E69F00;padding:6px 10px;font-size:13.5px'><b>Diagnosis</b>{''.join(lines)}"
            "</div>")

    # ------------------------------------------------------------------ status row
    def _on_progress(self, runner: Runner) -> None:
        done, total, label, seconds = runner.progress()
        if total == 0:
            self._bar.layout.visibility = "hidden"
            self._status.value = ""
            self._cancel.disabled = True
            return
        self._bar.max = max(total, 1)
        self._bar.value = min(done, total)
        self._bar.layout.visibility = "visible"
        self._cancel.disabled = not runner.background
        what = f"computing {label.lower()}" if label else "waiting"
        self._status.value = _render.note_box(f"{what} · {done}/{total} · {seconds:.1f} s")

    def _on_cancel(self) -> None:
        n = self._runner.cancel_all()
        if n:
            name = self.current
            if name:
                self._panels[name].message.value = _render.note_box(
                    "Stopped. Change an option, reopen the tab or press 'Run all' to compute "
                    "again.", tone="warn")

    def _guard(self, fn, *args) -> None:
        # observers run inside the kernel's comm handler: show failures in the widget
        try:
            fn(*args)
        except Exception as exc:
            name = self.current
            target = self._panels[name].message if name else self._summary
            target.value = _render.error_box(exc)

    def __repr__(self) -> str:
        runs = ", ".join(self._runs) if hasattr(self, "_runs") else ""
        tabs = ", ".join(getattr(self, "_panels", {}))
        return f"{type(self).__name__}(runs=[{runs}], tabs=[{tabs}])"

    # ------------------------------------------------------------------ public
    def compute_all(self) -> None:
        """Compute every tab with its current options (in the background unless disabled)."""
        steps: list[Step] = []
        seen: set[Hashable] = set()
        for name, panel in self._panels.items():
            for s in self._steps(name, self._runs_for(panel)):
                if s.key not in seen and s.key not in self._cache:
                    seen.add(s.key)
                    steps.append(s)
        steps += self._extra_steps(seen)
        if steps:
            self._runner.submit(steps, self._job_done, self._job_failed)

    def _extra_steps(self, seen: set[Hashable]) -> list[Step]:
        return []

    def wait(self, timeout: float | None = 120.0) -> bool:
        """Block until queued computations finish; False if ``timeout`` seconds passed first."""
        return self._runner.wait(timeout)

    def cancel(self) -> None:
        """Stop queued and running computations (their tabs compute again when reopened)."""
        self._on_cancel()

    @property
    def computed(self) -> Mapping[str, int]:
        """How many times each analysis was computed (a view change must not add to it)."""
        return dict(self._cache.computed)

    @property
    def images(self) -> dict[str, bytes]:
        """The PNG bytes each tab shows now (empty for tabs not drawn yet)."""
        return {name: bytes(p.image.value) for name, p in self._panels.items()}

    def close(self) -> None:
        """Stop the worker and close the widget."""
        runner = getattr(self, "_runner", None)  # absent when the arguments were refused
        if runner is not None:
            runner.shutdown()
        super().close()

    # ------------------------------------------------------------------ static fallback
    def show_static(self, *, compute: bool = True) -> StaticView:
        """Every tab as PNG figures in one HTML block, for front ends without widgets.

        Parameters
        ----------
        compute : bool, default True
            Compute (in the calling thread) whatever is missing first; False shows only the
            tabs drawn so far.
        """
        if compute:
            for name, panel in self._panels.items():
                for s in self._steps(name, self._runs_for(panel)):
                    if s.key not in self._cache and s.key not in panel.errors:
                        try:
                            self._cache.put(s.key, s.fn(), s.name)
                        except Exception as exc:
                            panel.errors[s.key] = exc
            self._update_summary()
        parts = [self._title.value, self._summary.value]
        for name, panel in self._panels.items():
            parts.append(f"<h4 style='margin:10px 0 2px'>{_render.esc(panel.analysis.label)}"
                         "</h4>")
            steps = self._steps(name, self._runs_for(panel))
            errs = [panel.errors[s.key] for s in steps
                    if s.key in panel.errors and s.key not in self._cache]
            png = b"" if compute else panel.png
            if errs:
                parts.append(_render.error_box(errs[0], what=panel.analysis.label))
            elif (compute or not png) and all(s.key in self._cache for s in steps):
                # computed (by 'Run all', say) but never drawn: draw it now
                try:
                    with self._draw_lock:
                        png = _render.png_bytes(self._draw_panel(panel, self._view(panel)))
                except Exception as exc:
                    parts.append(_render.error_box(exc, what=panel.analysis.label))
            if png:
                parts.append(f"<img style='max-width:100%' src='{_render.png_data_uri(png)}'>")
            elif not errs:
                parts.append(_render.note_box("not computed yet: open the tab or press "
                                              "'Run all'"))
            if panel.analysis.caution:
                parts.append(_render.note_box(panel.analysis.caution))
        parts += self._static_extra()
        return StaticView("\n".join(parts))

    def _static_extra(self) -> list[str]:
        return []

    def _repr_mimebundle_(self, **kwargs: Any) -> dict[str, Any]:
        # widget front ends pick the widget view; others fall back to the figures drawn so far
        data = super()._repr_mimebundle_(**kwargs) or {}
        data["text/html"] = self.show_static(compute=False).html + _render.note_box(
            "Static copy: a notebook with ipywidgets shows the interactive version; "
            "call .show_static() for every figure.")
        return data
