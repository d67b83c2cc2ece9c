"""Drawing of pca results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any

import numpy as np


def draw_trajectories(result, ax: Any = None, *, dims: int = 2, color_by: Any = "time",
                      samples: Any = None, steps: slice | None = None, others: Any = None):
    """Draw PCATrajectories on ``ax``; the options are those of ``PCATrajectories.plot``,
    except ``others``: a sequence of (name, array of shape (B', T', k)), trajectories already
    projected into this basis."""
    from .style import RUN_COLORS, get_axes

    dims = check_dims(dims, result.n_components)
    B, T, _ = result.projected.shape
    try:
        rows = np.atleast_1d(np.arange(B)[samples if samples is not None else slice(None)])
        cols = np.arange(T)[steps if steps is not None else slice(None)]
    except (IndexError, TypeError) as err:
        raise ValueError(f"samples must index the {B} samples and steps must be a slice of "
                         f"the {T} steps ({err})") from None
    if rows.size == 0 or cols.size == 0:
        raise ValueError("samples/steps select nothing to draw; pass a non-empty selection")
    P = result.projected[rows][:, cols, :dims]  # (b, t, dims)
    colouring = _colouring(color_by, B, rows)
    ax = get_axes(ax, projection="3d" if dims == 3 else None)
    handles = _draw_lines(ax, P, colouring, cols)
    drawn = [P]
    used = len(np.unique(colouring[1])) if colouring[0] == "labels" else 1
    for i, (label, Q) in enumerate(others or ()):
        Q = Q[:, :, :dims]  # (B', T', dims)
        colour = RUN_COLORS[(used + i) % len(RUN_COLORS)]
        handles += _draw_lines(ax, Q, ("single", colour), None, label=label,
                               ls="--")
        drawn.append(Q)
    handles += _mark_ends(ax, drawn)
    set_limits(ax, drawn, dims)
    ax.set_xlabel(result.axis_label(0))
    ax.set_ylabel(result.axis_label(1))
    if dims == 3:
        ax.set_zlabel(result.axis_label(2))
    what = "all states" if result.parts is None else ", ".join(result.parts)
    ax.set_title(f"PCA of {what}: participation ratio {result.participation_ratio:.1f}")
    ax.legend(handles=handles, loc="best", fontsize="small")
    return ax


def draw_variance(result, ax: Any = None, *, max_components: int = 30):
    """Draw the variance share of each component and the cumulative curve (90%/95% marked)."""
    from .style import get_axes

    ax = get_axes(ax)
    n = min(max_components, result.spectrum.size)
    share = result.spectrum[:n] / result.spectrum.sum()
    x = np.arange(1, n + 1)
    ax.bar(x, share, color="C0", alpha=0.6, label="per component")
    ax.plot(x, result.cumulative[:n], "o-", color="C1", ms=3, label="cumulative")
    for level, k in ((0.9, result.n_components_90), (0.95, result.n_components_95)):
        ax.axhline(level, color="grey", lw=0.6, ls=":")
        ax.annotate(f"{level:.0%}: {k}", (x[-1], level), ha="right", va="bottom",
                    fontsize="small", color="grey")
    ax.set_xlabel("component")
    ax.set_ylabel("fraction of variance")
    ax.set_ylim(0, 1.05)
    ax.set_title(f"participation ratio {result.participation_ratio:.2f} of {result.spectrum.size}")
    ax.legend(loc="center right", fontsize="small")
    return ax


# ---------------------------------------------------------------------- drawing
def check_dims(dims: Any, k: int) -> int:
    if dims not in (2, 3):
        raise ValueError(f"dims must be 2 or 3, got {dims!r}")
    if k < dims:
        raise ValueError(f"a {dims}-D plot needs at least {dims} components but only {k} were "
                         f"kept; refit with k={dims}")
    return int(dims)


def _colouring(color_by: Any, B: int, rows: np.ndarray):
    if isinstance(color_by, str):
        if color_by not in ("time", "sample"):
            raise ValueError(f"color_by must be 'time', 'sample' or an array of {B} labels "
                             f"(one per sample), got {color_by!r}")
        return (color_by, None)
    labels = np.asarray(color_by)
    if labels.shape != (B,):
        raise ValueError(f"color_by labels must have shape ({B},), one per sample, got shape "
                         f"{labels.shape}")
    return ("labels", labels[rows])


_TIME_PIECES = 128  # most colour bands drawn along one trajectory coloured by time


def _draw_lines(ax, P: np.ndarray, colouring, steps, *, label: str | None = None,
                ls: str = "-") -> list:
    """Draw trajectories P (b, t, dims) as one line collection; return legend handles."""
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D

    b, t, dims = P.shape
    kind, extra = colouring
    handles = []
    if kind == "single":
        handles.append(Line2D([], [], color=extra, ls=ls, label=label))
    if t < 2:
        return handles
    # One polyline per piece of m steps: a sample's own colour needs one piece, a colour over time
    # at most _TIME_PIECES pieces (finer colour bands are invisible, and each piece is a Path
    # that matplotlib builds and strokes on every redraw).
    m = t - 1 if kind != "time" else -(-(t - 1) // _TIME_PIECES)
    firsts = np.arange(0, t - 1, m)  # first step of each piece
    segs = [P[i, a:min(a + m, t - 1) + 1] for i in range(b) for a in firsts]  # (<= m+1, dims)
    per_sample = firsts.size
    kw: dict[str, Any] = {"linewidths": 1.0, "linestyles": ls}
    if kind == "single":
        kw["colors"] = extra
    elif kind == "sample":
        from .style import time_colors

        kw["colors"] = np.repeat(time_colors(b, "turbo"), per_sample, axis=0)
    elif kind == "labels":
        uniq, code = np.unique(extra, return_inverse=True)
        palette = np.array([f"C{i % 10}" for i in range(uniq.size)])
        kw["colors"] = np.repeat(palette[code], per_sample)
    if dims == 3:
        from mpl_toolkits.mplot3d.art3d import Line3DCollection as Collection
    else:
        Collection = LineCollection
    coll = Collection(segs, **kw)
    if kind == "time":
        coll.set_array(np.tile(steps[firsts], b).astype(float))
        coll.set_cmap("viridis")
    ax.add_collection(coll)
    if kind == "time":
        ax.figure.colorbar(coll, ax=ax, label="step", shrink=0.8, pad=0.12 if dims == 3 else 0.04)
    elif kind == "labels":
        handles += [Line2D([], [], color=palette[i], label=str(u)) for i, u in enumerate(uniq)]
    return handles


def _mark_ends(ax, drawn: list[np.ndarray]) -> list:
    first = np.concatenate([P[:, 0] for P in drawn])  # (n, dims)
    last = np.concatenate([P[:, -1] for P in drawn])
    return [
        ax.scatter(*first.T, marker="o", facecolors="white", edgecolors="black", s=22,
                   zorder=3, label="start"),
        ax.scatter(*last.T, marker="s", color="black", s=18, zorder=3, label="end"),
    ]


def set_limits(ax, drawn: list[np.ndarray], dims: int) -> None:
    pts = np.concatenate([P.reshape(-1, dims) for P in drawn])
    lo, hi = pts.min(axis=0), pts.max(axis=0)
    span = hi - lo
    big = float(span.max()) or 1.0
    pad = np.where(span > 1e-9 * big, 0.05 * span, 0.5 * big)  # a flat axis gets room too
    setters = (ax.set_xlim, ax.set_ylim) + ((ax.set_zlim,) if dims == 3 else ())
    for i, setter in enumerate(setters):
        setter(lo[i] - pad[i], hi[i] + pad[i])
