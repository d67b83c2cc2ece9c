"""Lazy matplotlib access for the ``.plot`` methods; the core never imports matplotlib at import."""

from __future__ import annotations

from typing import Any

__all__ = ["get_axes", "plain_text", "time_colors"]


def get_axes(ax: Any = None, *, projection: str | None = None,
             figsize: tuple[float, float] = (6, 4)):
    """Return ``ax`` or a new Axes (3-D when ``projection="3d"``) on a new pyplot figure."""
    if ax is not None:
        if projection == "3d" and getattr(ax, "name", "") != "3d":
            raise ValueError(
                "a 3-D plot needs 3-D axes; create them with "
                "fig.add_subplot(projection='3d') or pass ax=None"
            )
        return ax
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=figsize)
    return fig.add_subplot(projection=projection)


def time_colors(n: int, cmap: str = "viridis"):
    """``n`` colours running along a sequential colormap (used to colour by time or sample)."""
    import matplotlib

    return matplotlib.colormaps[cmap](_linspace(n))


def _linspace(n: int):
    import numpy as np

    return np.linspace(0.0, 1.0, max(n, 1))


def plain_text(ax_or_fig: Any):
    """Draw every text of a figure as plain text (no mathtext), and return the argument.

    Run and model names come from users: ``"$\\foo$"`` would otherwise be parsed as
    mathtext and fail when the figure is drawn.
    """
    from matplotlib.text import Text

    fig = getattr(ax_or_fig, "figure", None) or ax_or_fig
    for t in fig.findobj(Text):
        t.set_parse_math(False)
    return ax_or_fig
