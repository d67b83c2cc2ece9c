"""Lazy matplotlib access for the ``.plot`` methods, and the house style they share: a
colour-blind-safe palette with line styles and markers per run, plain-text labels, legends or
colour bars for colour by sample, layouts that keep labels inside the figure, thinned ticks.
The core never imports matplotlib at import; every function here imports it when called."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

__all__ = [
    "LINESTYLES",
    "MARKERS",
    "OKABE_ITO",
    "RUN_COLORS",
    "color_by_sample",
    "get_axes",
    "keep_labels_inside",
    "legend_outside",
    "name_titles",
    "no_mathtext",
    "plain_text",
    "run_style",
    "style_axes",
    "thin_ticks",
    "time_colors",
    "wrap_titles",
]

#: The Okabe-Ito palette, distinguishable under the common colour-vision deficiencies
#: (Okabe & Ito 2008, "Color Universal Design (CUD): how to make figures and presentations
#: that are friendly to colorblind people"; hex values as published there).
OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky blue": "#56B4E9",
    "bluish green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish purple": "#CC79A7",
}

#: Order of colours for runs: the strongest contrasts first; yellow (weak on white) last.
RUN_COLORS: tuple[str, ...] = tuple(OKABE_ITO[c] for c in (
    "blue", "orange", "bluish green", "vermillion", "reddish purple", "sky blue", "black",
    "yellow"))
#: A line style and a marker per run, so runs differ without colour too.
LINESTYLES: tuple[Any, ...] = ("-", "--", "-.", ":", (0, (5, 1, 1, 1)), (0, (3, 1, 1, 1, 1, 1)),
                               (0, (1, 2)), (0, (8, 2)))
MARKERS: tuple[str, ...] = ("o", "s", "^", "D", "v", "P", "X", "*")


def run_style(i: int, *, markers: bool = True, n_points: int | None = None) -> dict[str, Any]:
    """Line keywords for run ``i``: colour, line style and (optionally) a sparse marker.

    ``n_points`` sets ``markevery`` so that about ten markers show on a long line.
    """
    if isinstance(i, bool) or not isinstance(i, int) or i < 0:
        raise ValueError(f"run index must be an int >= 0, got {i!r}")
    style: dict[str, Any] = {"color": RUN_COLORS[i % len(RUN_COLORS)],
                             "linestyle": LINESTYLES[i % len(LINESTYLES)]}
    if markers:
        style["marker"] = MARKERS[i % len(MARKERS)]
        style["markersize"] = 4
        if n_points is not None and n_points > 12:
            style["markevery"] = max(1, n_points // 10)
    return style


def plain_text(text: Any) -> str:
    """``text`` as a label matplotlib draws literally: ``$`` escaped, so no mathtext."""
    return str(text).replace("$", r"\$")


def style_axes(ax: Any) -> Any:
    """Give ``ax`` the run palette with line styles as its property cycle; returns ``ax``."""
    from cycler import cycler

    n = len(RUN_COLORS)
    ax.set_prop_cycle(cycler(color=list(RUN_COLORS)) + cycler(linestyle=list(LINESTYLES[:n])))
    return ax


def get_axes(ax: Any = None, *, projection: str | None = None,
             figsize: tuple[float, float] = (6, 4)):
    """Return ``ax`` or new Axes (3-D when ``projection="3d"``) on a new pyplot figure.

    A new figure uses constrained layout (labels stay inside after redraws) and the run
    palette (:func:`style_axes`); axes the caller passes are left as they are.
    """
    if ax is not None:
        from matplotlib.axes import Axes

        if not isinstance(ax, Axes):
            raise TypeError(f"ax must be matplotlib Axes (e.g. from plt.subplots()) or None for "
                            f"a new figure, got {type(ax).__name__}")
        if projection == "3d" and getattr(ax, "name", "") != "3d":
            raise ValueError(
                "a 3-D plot needs 3-D axes; create them with "
                "fig.add_subplot(projection='3d') or pass ax=None"
            )
        return ax
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=figsize, layout="constrained")
    return style_axes(fig.add_subplot(projection=projection))


def keep_labels_inside(fig: Any) -> Any:
    """Switch ``fig`` to constrained layout, recomputed at every draw, so grown tick labels
    are never clipped or overprinted by a layout saved earlier; returns ``fig``."""
    fig.set_layout_engine("constrained")
    return fig


def thin_ticks(axes: Any, *, max_x: int = 4, max_y: int = 4) -> None:
    """At most ``max_x`` / ``max_y`` major ticks on each of ``axes`` (one Axes or many), so
    small multiples do not overprint their tick labels."""
    from matplotlib.ticker import MaxNLocator

    for v, name in ((max_x, "max_x"), (max_y, "max_y")):
        if isinstance(v, bool) or not isinstance(v, int) or v < 1:
            raise ValueError(f"{name} must be an int >= 1, got {v!r}")
    seq = axes.ravel() if hasattr(axes, "ravel") else (
        axes if isinstance(axes, Sequence) else [axes])
    for ax in seq:
        if getattr(ax, "name", "") == "polar":
            continue
        ax.xaxis.set_major_locator(MaxNLocator(nbins=max_x, min_n_ticks=2))
        ax.yaxis.set_major_locator(MaxNLocator(nbins=max_y, min_n_ticks=2))


def color_by_sample(ax: Any, n: int, *, labels: Sequence[Any] | None = None,
                    cmap: str = "viridis", title: str = "sample", max_legend: int = 8):
    """Colours for ``n`` samples, with the key drawn on ``ax``'s figure.

    Up to ``max_legend`` samples get palette colours and a legend entry each (outside the
    data, to the right of the axes); more get a sequential colormap and a colour bar.

    Returns
    -------
    list of colours
        One per sample, in order.
    """
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise ValueError(f"n must be the number of samples (an int >= 1), got {n!r}")
    if labels is not None and len(labels) != n:
        raise ValueError(f"labels has {len(labels)} entries for {n} samples; pass one per sample")
    names = [plain_text(x) for x in (labels if labels is not None else range(n))]
    if n <= max_legend:
        from matplotlib.lines import Line2D

        colors = [RUN_COLORS[i % len(RUN_COLORS)] for i in range(n)]
        handles = [Line2D([], [], color=c, label=s) for c, s in zip(colors, names, strict=True)]
        ax.legend(handles=handles, title=plain_text(title), fontsize="small",
                  loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0)
        return colors
    import matplotlib
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize

    cm = matplotlib.colormaps[cmap]
    colors = [cm(v) for v in _linspace(n)]
    sm = ScalarMappable(norm=Normalize(0, n - 1), cmap=cm)
    bar = ax.figure.colorbar(sm, ax=ax)
    bar.set_label(plain_text(title))
    return colors


def time_colors(n: int, cmap: str = "viridis"):
    """``n`` colours running along a sequential colormap (used to colour by time or sample)."""
    import matplotlib

    return matplotlib.colormaps[cmap](_linspace(n))


def _linspace(n: int):
    return np.linspace(0.0, 1.0, max(n, 1))


def legend_outside(ax: Any) -> Any:
    """Move ``ax``'s legend (if any) outside the data, to the right of the Axes; returns it.

    Only for Axes with nothing drawn beside them (no colour bar), where the room is free."""
    leg = ax.get_legend()
    if leg is None:
        return None
    handles = list(getattr(leg, "legend_handles", None) or leg.legendHandles)
    labels = [t.get_text() for t in leg.get_texts()]
    title = leg.get_title().get_text() or None
    return ax.legend(handles=handles, labels=labels, title=title, fontsize="small",
                     loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)


def wrap_titles(fig: Any, width_px: float) -> Any:
    """Break Axes titles longer than their share of ``width_px`` onto two lines (a narrow
    figure would otherwise clip them); returns ``fig``."""
    import textwrap

    cols = {}
    for ax in fig.axes:
        spec = ax.get_subplotspec() if hasattr(ax, "get_subplotspec") else None
        if spec is None:
            continue
        grid = spec.get_gridspec()
        cols[ax] = max(1, grid.ncols // max(1, spec.colspan.stop - spec.colspan.start))
    for ax, n in cols.items():
        title = ax.get_title()
        size = ax.title.get_fontsize()  # points; at 100 dpi about 0.55 em per character
        room = int(0.75 * width_px / n / (size * 100 / 72 * 0.55))
        if title and "\n" not in title and len(title) > room > 10:
            ax.set_title("\n".join(textwrap.wrap(title, room)[:2]))
    return fig


def name_titles(ax_or_fig: Any, model_class: Any, name: Any):
    """Titles that start with the model's class name (``"GRUNet: gradient flow"``) start
    with the run's name instead, which is what a reader compares; returns the argument."""
    fig = getattr(ax_or_fig, "figure", None) or ax_or_fig
    old = f"{model_class}: "
    if not model_class or not name or str(model_class) == str(name):
        return ax_or_fig
    for ax in fig.axes:
        for loc in ("center", "left", "right"):
            title = ax.get_title(loc)
            if title.startswith(old):
                ax.set_title(f"{name}: {title[len(old):]}", loc=loc)
    return ax_or_fig


def no_mathtext(ax_or_fig: Any):
    """Draw every text of a figure as plain text (no mathtext), and return the argument.

    Run and model names come from users: ``"$\\foo$"`` would otherwise be parsed as
    mathtext and fail when the figure is drawn.
    """
    from matplotlib.text import Text
    from matplotlib.ticker import FixedFormatter, FuncFormatter

    fig = getattr(ax_or_fig, "figure", None) or ax_or_fig
    # tick labels and offsets written by matplotlib's formatters (log axes use mathtext such
    # as 10^{-1}) stay as they are; labels given as text (run names) are plain text
    own = set()
    for ax in fig.axes:
        axes = [getattr(ax, a) for a in ("xaxis", "yaxis", "zaxis") if hasattr(ax, a)]
        for axis in axes:
            own.add(id(axis.offsetText))
            fmt = axis.get_major_formatter()
            if isinstance(fmt, (FixedFormatter, FuncFormatter)) \
                    and not getattr(fmt, "_hiddenlens_plain", False):
                # labels given as text (run names), made again at every draw: escaped
                plain = FuncFormatter(lambda x, pos, f=fmt: plain_text(f(x, pos)))
                plain._hiddenlens_plain = True
                axis.set_major_formatter(plain)
    # the ticks made so far (asking an axis for its ticks would make one per location)
    from matplotlib.axis import Tick

    for tick in fig.findobj(Tick):
        own.update((id(tick.label1), id(tick.label2)))
    for t in fig.findobj(Text):
        if id(t) not in own:
            t.set_parse_math(False)
    return ax_or_fig


def sample_or_median(a: Any, sample: int | None, median: Any = np.median) -> Any:
    """``a[sample]``, or with ``sample=None`` the median over the samples (axis 0) of ``a``."""
    B = a.shape[0]
    if sample is None:
        return median(a, axis=0) if B > 1 else a[0]
    if not -B <= sample < B:
        raise ValueError(f"sample must be in [0, {B}), got {sample}")
    return a[sample]


def finish_step_axes(ax: Any, values: Any, ylabel: str, title: str) -> Any:
    """A log value axis where any drawn value is positive and finite; step axis, labels and
    legend of a curve over the steps t."""
    if np.any(np.isfinite(values) & (values > 0)):
        ax.set_yscale("log")
    ax.set_xlabel("step t")
    ax.set_ylabel(ylabel)
    ax.set_title(title)
    ax.legend(fontsize="small", loc="best")
    return ax
