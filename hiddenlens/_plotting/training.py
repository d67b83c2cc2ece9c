"""Drawing of training results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np


def plot_timeline(table: Any, ax: Any = None, *, figures: Sequence[str] | None = None,
                  label: str | None = None, color: Any = None, bands: bool = True):
    """Draw a (step, figure, value, low, high) table: one panel per figure, against step.

    ``ax`` may hold one Axes per figure (draw several runs on the same panels, each with its
    ``label`` and ``color``); ``bands=False`` leaves out the interval bands.
    """
    import matplotlib.pyplot as plt

    names = list(figures) if figures is not None else list(dict.fromkeys(table["figure"]))
    if ax is None:
        fig, axes = plt.subplots(len(names), 1, figsize=(6, 2.2 * max(len(names), 1)),
                                 sharex=True, squeeze=False)
        axes = list(axes[:, 0])
    else:
        from matplotlib.axes import Axes

        axes = list(np.ravel(np.asarray(ax, dtype=object)))
        if not all(isinstance(a, Axes) for a in axes):
            raise TypeError(f"ax must be matplotlib Axes, one per figure (e.g. from "
                            f"plt.subplots({len(names)})), or None for a new figure, got "
                            f"{type(ax).__name__}")
        if len(axes) != len(names):
            raise ValueError(f"ax must hold one Axes per figure ({len(names)}), got {len(axes)}")
    for a, name in zip(axes, names, strict=True):
        d = table[table["figure"] == name].sort_values("step")
        line = a.plot(d["step"], d["value"], marker="o", ms=3, label=label, color=color)[0]
        if bands:
            a.fill_between(d["step"], d["low"], d["high"], alpha=0.25,
                           color=line.get_color())
        a.set_ylabel(name, fontsize=8)
    axes[-1].set_xlabel("training step")
    return axes if len(axes) > 1 else axes[0]


def draw_sweep(result, figure: str, param: str, ax: Any = None, **kw: Any):
    """``figure`` against hyperparameter ``param``, with interval error bars."""
    from .style import get_axes

    if figure not in result.figures:
        raise ValueError(f"figure {figure!r} is not in this sweep; it has "
                         f"{', '.join(result.figures)}")
    if param not in result.params:
        raise ValueError(f"param {param!r} is not in this sweep; it has "
                         f"{', '.join(result.params) or 'no params (pass params=)'}")
    j = result.figures.index(figure)
    x = np.asarray(result.params[param], dtype=float)
    order = np.argsort(x, kind="stable")
    v, lo, hi = result.values[order, j], result.low[order, j], result.high[order, j]
    ax = get_axes(ax)
    err = np.vstack([np.nan_to_num(v - lo), np.nan_to_num(hi - v)])
    ax.errorbar(x[order], v, yerr=np.abs(err), marker="o", capsize=3, **kw)
    ax.set_xlabel(param)
    ax.set_ylabel(figure)
    return ax
