"""Drawing of task memory results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any

import numpy as np


def draw_task_memory(result, ax: Any = None, *, kind: str = "curve", **kw: Any):
    """Draw the score curve with its chance band (``kind="curve"``) or the cross-temporal
    matrix (``kind="cross_temporal"``).

    Returns
    -------
    matplotlib Axes
    """
    from .style import get_axes

    if kind not in ("curve", "cross_temporal"):
        raise ValueError(f"kind must be 'curve' or 'cross_temporal', got {kind!r}")
    ax = get_axes(ax)
    if kind == "cross_temporal":
        if result.cross_temporal is None:
            raise ValueError("no cross-temporal matrix was computed; rerun task_memory "
                             "with cross_temporal=True")
        lo, hi = result.lags[0] - 0.5, result.lags[-1] + 0.5
        image = ax.imshow(result.cross_temporal, origin="lower", extent=(lo, hi, lo, hi),
                          cmap=kw.pop("cmap", "viridis"), aspect="auto", **kw)
        ax.figure.colorbar(image, ax=ax, label=result.score_name)
        ax.set_xlabel("test lag (steps after onset)")
        ax.set_ylabel("train lag (steps after onset)")
        ax.set_title("cross-temporal generalisation")
        return ax
    line, = ax.plot(result.lags, result.scores, marker=".", label=result.score_name, **kw)
    ax.fill_between(result.lags, result.scores - result.spread, result.scores + result.spread,
                    color=line.get_color(), alpha=0.2, lw=0)
    ax.plot(result.lags, result.chance, ls=":", color="0.4", label="permutation mean")
    ax.fill_between(result.lags, np.nanmin(result.null_scores, axis=0), result.band,
                    color="0.6", alpha=0.3, lw=0,
                    label=f"chance band ({100 * (1 - result.level):.0f}%)")
    if result.span >= 0:
        ax.axvline(result.span, color="tab:red", lw=0.8, label=f"span {result.span}")
    ax.set_xlabel("lag (steps after onset)")
    ax.set_ylabel(result.score_name)
    ax.set_title(f"task memory: span {result.span}")
    ax.legend(fontsize="small")
    return ax
