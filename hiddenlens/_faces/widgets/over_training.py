"""The "Over training" tab of the boards: key figures against training step, with their bands.

The tab computes nothing: it draws timelines already recorded (a Timeline, a Monitor or a
timeline table) with ``Timeline.plot``, one panel per figure, one line per run.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import ipywidgets as widgets

from ..._training.timeline import timelines_by_run
from ..summary import FIGURES
from . import render as _render

__all__ = ["OverTraining", "TAB_TITLE", "check_timelines"]

TAB_TITLE = "Over training"
_ALL_FIGURES = "__all__"


def check_timelines(timelines: Any, runs: list[str]) -> dict[str, Any]:
    """Run name -> Timeline; one Timeline, Monitor or table belongs to the first run."""
    if timelines is None:
        return {}
    out = timelines_by_run(timelines, runs, name="timelines", where="shown")
    if not out:
        raise ValueError("timelines holds no timeline; pass a Timeline, a Monitor or a "
                         "timeline table per run")
    return out


class OverTraining:
    """The widgets of the tab: a figure chooser, a bands switch, the image and a note."""

    def __init__(self, timelines: Mapping[str, Any], colors: Mapping[str, str] | None = None
                 ) -> None:
        self.timelines = dict(timelines)
        self.colors = dict(colors or {})
        figures = list(dict.fromkeys(f for tl in self.timelines.values() for f in tl.figures))
        self.figures = figures
        self.figure = widgets.Dropdown(
            options=[("all figures", _ALL_FIGURES)]
            + [(FIGURES.get(f, (f,))[0], f) for f in figures],
            value=_ALL_FIGURES, description="figure", style={"description_width": "initial"},
            layout=widgets.Layout(width="max-content"))
        self.bands = widgets.Checkbox(value=True, description="interval bands", indent=False,
                                      layout=widgets.Layout(width="max-content"))
        self.image = widgets.Image(format="png", layout=widgets.Layout(max_width="100%",
                                                                       height="auto"))
        self.message = widgets.HTML()
        level = {tl.level for tl in self.timelines.values()}
        caution = widgets.HTML(_render.note_box(
            "Figures on one fixed probe batch at each check; bands are "
            + (f"{next(iter(level)):.0%} " if len(level) == 1 else "")
            + "bootstrap intervals over its sequences and do not cover a change of input "
            "distribution. Exponents here are finite-time estimates."))
        controls = widgets.HBox([self.figure, self.bands],
                                layout=widgets.Layout(flex_flow="row wrap",
                                                      align_items="center"))
        for w in (self.figure, self.bands):
            w.layout.margin = "2px 16px 2px 0"
        self.box = widgets.VBox([controls, self.message, self.image, caution])
        self.box.add_class("hiddenlens-panel-over-training")
        self.draws = 0
        self.png = b""
        self._drawn: dict[tuple[str, bool], bytes] = {}

    def chosen(self) -> list[str]:
        """The figures drawn now."""
        return self.figures if self.figure.value == _ALL_FIGURES else [self.figure.value]

    def draw(self):
        """A Figure: one panel per chosen figure, every run's timeline on it."""
        names = self.chosen()
        fig, axes = _render.new_figure(len(names), ncols=1, height=2.0 if len(names) > 1
                                       else _render.HEIGHT_IN)
        multi = len(self.timelines) > 1
        for run, tl in self.timelines.items():
            have = [f for f in names if f in tl.figures]
            if not have:
                continue
            tl.plot([axes[names.index(f)] for f in have], figures=have,
                    label=run if multi else None, color=self.colors.get(run),
                    bands=self.bands.value)
        for f, ax in zip(names, axes, strict=True):
            ax.set_ylabel(FIGURES.get(f, (f,))[0], fontsize=8)
        axes[-1].set_xlabel("training step")
        if multi:
            axes[0].legend(fontsize=8)
        return fig

    def show(self) -> None:
        """Draw into the tab's image (once per choice of controls); failures are shown."""
        key = (self.figure.value, bool(self.bands.value))
        png = self._drawn.get(key)
        if png is None:
            try:
                png = _render.png_bytes(self.draw())
            except Exception as exc:  # shown, never lost
                self.message.value = _render.error_box(exc, what="the timeline")
                self.image.layout.display = "none"
                return
            self.draws += 1
            self._drawn[key] = png
        self.png = png
        self.image.value = self.png
        self.image.layout.display = None
        self.message.value = ""

    def observe(self, callback) -> None:
        for w in (self.figure, self.bands):
            w.observe(lambda _: callback(), names="value")

    def static_html(self) -> list[str]:
        if not self.png:
            self.show()
        if not self.png:
            return [self.message.value]
        return [f"<h4 style='margin:10px 0 2px'>{TAB_TITLE}</h4>",
                f"<img style='max-width:100%' src='{_render.png_data_uri(self.png)}'>"]
