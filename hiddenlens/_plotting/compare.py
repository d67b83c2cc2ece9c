"""Drawing of compare results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import numpy as np

_HATCHES = ("", "//", "..", "xx", "\\\\", "++", "oo", "--")


def _run_of(label: str, names: Sequence[str]) -> int | None:
    """Index of the run a legend label names (the name itself, or the name and a note)."""
    for i, n in enumerate(names):
        if label == n or label.startswith(f"{n} ("):
            return i
    return None


def _style_runs(ax: Any, names: Sequence[str], styles: Sequence[Mapping[str, Any]]) -> None:
    """Give each run's lines its colour, line style and sparse markers, its bars a hatch."""
    for line in ax.get_lines():
        i = _run_of(str(line.get_label()), names)
        if i is None:
            continue
        n_points = len(line.get_xdata())
        st = dict(styles[i])
        if n_points > 12:
            st["markevery"] = max(1, n_points // 10)
        line.set(**st)
    for cont in getattr(ax, "containers", []):
        i = _run_of(str(cont.get_label()), names)
        if i is None:
            continue
        for patch in cont:
            patch.set(facecolor=styles[i]["color"], hatch=_HATCHES[i % len(_HATCHES)],
                      edgecolor="white" if i else styles[i]["color"])


def draw_overlay(results: Mapping[str, Any], ax: Any = None, *, overlay: Any = None,
                 title: str = "", colors: Sequence[str] | None = None):
    """Draw one analysis of several runs on one Axes; ``results`` maps run name -> result.

    ``overlay(runs, ax)`` (the analysis spec's) draws; without one, each run's ``.plot``
    draws on the same Axes. Runs are told apart by colour (the colour-blind-safe Okabe-Ito
    palette, see :func:`run_style`) and by line style, marker and bar hatch, so they stay
    apart in grey print and under colour-vision deficiencies. ``colors`` gives one colour per
    run instead of the palette.
    """
    from .style import get_axes, no_mathtext, run_style

    ax = get_axes(ax)
    runs = [(str(n), r) for n, r in results.items()]
    styles = [run_style(i) for i in range(len(runs))]
    if colors is not None:
        colors = list(colors)
        for i, st in enumerate(styles):
            st["color"] = colors[i % len(colors)] if colors else st["color"]
    if styles:
        ax.set_prop_cycle(color=[st["color"] for st in styles],
                          linestyle=[st["linestyle"] for st in styles])
    if overlay is not None:
        overlay(runs, ax)
    else:
        for _, r in runs:
            r.plot(ax=ax)
    _style_runs(ax, [n for n, _ in runs], styles)
    ax.set_title(title)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize="small")
    no_mathtext(ax)  # run names are the user's: plain text, not mathtext
    return ax


def plot_cka(cka: Any, names: Iterable[str], ax: Any = None, **kw: Any):
    """Draw a runs x runs CKA matrix with its values written in the cells."""
    from .style import get_axes, no_mathtext

    ax = get_axes(ax)
    names = list(names)
    m = np.asarray(cka, dtype=float)
    im = ax.imshow(m, vmin=0.0, vmax=1.0, cmap=kw.pop("cmap", "viridis"), **kw)
    ax.set_xticks(range(len(names)), names, rotation=30, ha="right")
    ax.set_yticks(range(len(names)), names)
    for i in range(m.shape[0]):
        for j in range(m.shape[1]):
            ax.text(j, i, f"{m[i, j]:.2f}", ha="center", va="center",
                    color="black" if m[i, j] > 0.6 else "white", fontsize="small")
    ax.figure.colorbar(im, ax=ax, label="linear CKA")
    ax.set_title("Linear CKA of hidden states")
    return no_mathtext(ax)
