"""Figures as PNG bytes and small HTML boxes: drawing that works from any thread, no pyplot."""

from __future__ import annotations

import base64
import html
import io
import threading
import traceback
from collections.abc import Callable
from typing import Any

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["LayoutMemo", "new_figure", "png_bytes", "png_data_uri", "error_box", "note_box",
           "esc", "interactive_available", "live_canvas"]

DPI = 100
WIDTH_IN = 9.0  # 900 px: fits a JupyterLab cell at its default width
HEIGHT_IN = 3.6


def new_figure(n_axes: int = 1, *, projection: str | None = None, height: float = HEIGHT_IN,
               ncols: int | None = None, projections: list[str | None] | None = None,
               layout: str | None = "constrained",
               width: float = WIDTH_IN) -> tuple[Figure, list[Any]]:
    """A pyplot-free Agg figure with ``n_axes`` axes in rows of ``ncols`` (default: one row).

    ``projection`` (e.g. "3d") applies to every Axes unless ``projections`` gives one each.
    ``layout=None`` skips matplotlib's layout engine (the caller places the Axes itself, see
    :class:`LayoutMemo`). Figures made this way are owned by the caller alone, so worker
    threads may draw into them while the notebook's main thread draws into others.
    """
    ncols = n_axes if ncols is None else max(1, min(ncols, n_axes))
    nrows = -(-n_axes // ncols)
    fig = Figure(figsize=(width, height * nrows), dpi=DPI, layout=layout)
    FigureCanvasAgg(fig)
    projections = projections or [projection] * n_axes
    axes = [fig.add_subplot(nrows, ncols, i + 1, projection=projections[i])
            for i in range(n_axes)]
    return fig, axes


def png_bytes(fig: Figure) -> bytes:
    """Render ``fig`` with Agg and return the PNG file as bytes.

    Light compression: encoding at zlib level 1 takes a fraction of the default's time for
    files about a third larger, and redrawing fast matters more than a few kilobytes.
    """
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, facecolor="white",
                pil_kwargs={"compress_level": 1})
    return buf.getvalue()


class LayoutMemo:
    """Remember where the layout engine put the Axes of a figure, to reuse it.

    Constrained layout measures every text twice and costs about as much as drawing. A view
    change (another sample, another window) keeps the same arrangement of Axes, so later
    drawings of an arrangement reuse the remembered positions and skip the engine.
    """

    def __init__(self) -> None:
        self._positions: dict[Any, list[Any]] = {}
        self._lock = threading.Lock()

    def render(self, key: Any, draw: Callable[[str | None], Figure]) -> bytes:
        """PNG bytes of ``draw(layout)``, a figure of arrangement ``key``."""
        with self._lock:
            saved = self._positions.get(key)
        fig = draw(None if saved is not None else "constrained")
        if saved is not None:
            if len(saved) == len(fig.axes):
                for ax, pos in zip(fig.axes, saved, strict=True):
                    ax.set_position(pos)
            else:  # the arrangement changed after all: measure it again
                fig = draw("constrained")
                saved = None
        png = png_bytes(fig)
        if saved is None:
            with self._lock:
                self._positions[key] = [ax.get_position(original=True) for ax in fig.axes]
        return png


def interactive_available() -> bool:
    """Whether ipympl (the optional extra ``interactive``) can be imported."""
    import importlib.util

    return importlib.util.find_spec("ipympl") is not None


def live_canvas(fig: Figure):
    """An ipympl canvas widget showing ``fig``: zoom, pan, and the coordinates under the
    cursor in its footer (the hover read-out). Needs ipympl (``interactive_available()``)."""
    import warnings

    from ipympl.backend_nbagg import Canvas, FigureManager

    canvas = Canvas(fig)
    with warnings.catch_warnings():
        # ipympl 0.10's toolbar passes its canvas on to traitlets, which warns that the
        # argument is unrecognised (seen with traitlets 5 and matplotlib 3.11); harmless
        warnings.filterwarnings("ignore", message="Passing unrecognized arguments",
                                category=DeprecationWarning)
        FigureManager(canvas, 0)  # gives the canvas its toolbar and cursor read-out
    canvas.header_visible = False
    canvas.toolbar_position = "right"
    canvas.layout.max_width = "100%"
    return canvas


def png_data_uri(png: bytes) -> str:
    """``data:`` URI of PNG bytes, for self-contained HTML."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def esc(text: Any) -> str:
    """HTML-escape ``str(text)``."""
    return html.escape(str(text), quote=True)


def error_box(exc: BaseException, *, what: str = "") -> str:
    """A red HTML box with the exception's type and message; the traceback folded below it."""
    head = f"{type(exc).__name__}: {exc}"
    where = f"<b>{esc(what)} failed</b><br>" if what else ""
    tb = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
    return (
        '<div class="hiddenlens-error" style="border:1px solid #c62828;background:#fdecea;'
        'color:#611a15;padding:6px 10px;border-radius:4px;margin:4px 0;font-size:13px">'
        f"{where}<span style=\"white-space:pre-wrap\">{esc(head)}</span>"
        "<details><summary style=\"cursor:pointer\">traceback</summary>"
        f"<pre style=\"font-size:11px;max-height:240px;overflow:auto\">{esc(tb)}</pre>"
        "</details></div>"
    )


def note_box(text: str, *, tone: str = "info") -> str:
    """A quiet one-line HTML note (tone "info" or "warn"); ``text`` is escaped."""
    colour = {"info": "#4a5568", "warn": "#8a5300"}[tone]
    return f'<div style="color:{colour};font-size:12.5px;margin:2px 0">{esc(text)}</div>'
