"""Drawing of memory results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any

import numpy as np


def draw_memory(result, ax: Any = None, *, log: bool | None = None, **kw: Any):
    """Draw a MemoryCurve on ``ax``; the options are those of ``MemoryCurve.plot``."""
    from .style import OKABE_ITO, get_axes

    ax = get_axes(ax)
    log = result.method != "decoding" if log is None else log
    line, = ax.plot(result.lags, result.scores, marker=".", label=result.method, **kw)
    lo, hi = result.scores - result.spread, result.scores + result.spread
    if log:
        lo = np.where(lo > 0, lo, np.nan)
    ax.fill_between(result.lags, lo, hi, color=line.get_color(), alpha=0.2, lw=0)
    if result.baseline is not None:
        ax.plot(result.lags, result.baseline, ls="--", color="0.4",
                label="baseline (inputs' own history)")
    level = result.threshold
    if result.chance is not None:
        ax.axhline(result.chance, ls=":", color="0.5", label=f"chance {result.chance:.2f}")
        level = result.chance + result.threshold * (1.0 - result.chance)
    ax.axhline(level, ls="--", color=OKABE_ITO["vermillion"], lw=0.8,
               label=f"threshold {level:.2f}")
    if result.time_constant is not None and 0 < result.time_constant < np.inf:
        ax.plot(result.lags, np.exp(-result.lags / result.time_constant), ls=":", color="0.3",
                label=f"exp(-k/{result.time_constant:.3g})")
    if 0 <= result.span:
        ax.axvline(result.span, color="0.6", lw=0.8)
    if log:
        ax.set_yscale("log")
    ax.set_xlabel("lag k (steps)")
    ax.set_ylabel(result.score_name)
    span = int(result.span)
    said = "nothing decodable" if span < 0 else f"span {span} step{'s' if span != 1 else ''}"
    ax.set_title(f"memory ({result.method}, {result.mode}): capacity {result.capacity:.3g}, "
                 f"{said}")
    ax.legend(fontsize="small")
    return ax
