"""Drawing of bootstrap results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any

import numpy as np


def draw_intervals(result, ax: Any = None, **kw: Any):
    """Each figure with its interval as an error bar (one row per figure)."""
    from .style import get_axes

    ax = get_axes(ax)
    y = np.arange(len(result.figures))
    v = result.values
    err = np.vstack([np.where(np.isfinite(result.low), v - result.low, 0.0),
                     np.where(np.isfinite(result.high), result.high - v, 0.0)])
    ax.errorbar(v, y, xerr=np.abs(err), fmt="o", capsize=3, **kw)
    ax.set_yticks(y, list(result.figures))
    ax.set_xlabel(f"value ({result.level:.0%} interval)")
    return ax
