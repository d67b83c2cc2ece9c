"""Drawing of fixed points results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any

import numpy as np


def draw_fixed_points(result, ax: Any = None, *, coords: Any, along: Any, labels: Any,
                      dims: int, background: Any = None, direction_length: float | None = None,
                      show_slow: bool = True):
    """Draw the points at ``coords(points)`` with their unstable directions ``along(D)``.

    ``background`` (b, t, dims) are trajectories drawn faintly behind; ``labels`` name the axes.
    """
    from .pca import set_limits
    from .style import get_axes

    ax = get_axes(ax, projection="3d" if dims == 3 else None)
    if dims == 3:
        ax.computed_zorder = False  # keep the points above the trajectories
    extent = []
    if background is not None:
        _draw_background(ax, background)
        extent.append(background.reshape(-1, dims))
    keep = np.ones(len(result), bool) if show_slow else result.is_fixed
    P = coords(result.points[keep])  # (m, dims)
    extent.append(P)
    pts = np.concatenate(extent) if extent else np.zeros((0, dims))
    span = float(np.max(np.ptp(pts, axis=0))) if pts.shape[0] > 1 else 1.0
    length = direction_length if direction_length is not None else 0.1 * (span or 1.0)
    extent += _draw_directions(ax, result, keep, coords, along, length)
    _draw_points(ax, result, keep, P)
    if len(pts):
        set_limits(ax, extent, dims)
    ax.set_xlabel(labels[0])
    ax.set_ylabel(labels[1])
    if dims == 3:
        ax.set_zlabel(labels[2])
    x_desc = "input held at zero" if not np.any(result.x) else "input held constant"
    ax.set_title(f"fixed points ({x_desc}): {result.n_fixed} fixed, {result.n_slow} slow")
    ax.legend(loc="best", fontsize="small")
    return ax


_MARKERS = {
    "stable": {"marker": "o", "color": "tab:blue"},
    "saddle": {"marker": "X", "color": "tab:orange"},
    "unstable": {"marker": "o", "facecolors": "none", "edgecolors": "tab:red"},
    "marginal": {"marker": "D", "color": "tab:green"},
}


# ---------------------------------------------------------------------- drawing
def _draw_background(ax, P: np.ndarray) -> None:
    b, t, dims = P.shape
    if t < 2:
        return
    segs = np.stack([P[:, :-1], P[:, 1:]], axis=2).reshape(b * (t - 1), 2, dims)
    if dims == 3:
        from mpl_toolkits.mplot3d.art3d import Line3DCollection as Collection
    else:
        from matplotlib.collections import LineCollection as Collection
    ax.add_collection(Collection(segs, colors="0.75", linewidths=0.5, alpha=0.4, zorder=1,
                                 label="trajectories"))


def _draw_directions(ax, fp: Any, keep, coords, along, length) -> list[np.ndarray]:
    drawn = []
    for i in np.nonzero(keep)[0]:
        D = fp.unstable_directions[i]
        if D.shape[0] == 0:
            continue
        p = coords(fp.points[i : i + 1])[0]  # (dims,)
        for d in along(D):  # (dims,)
            seg = np.stack([p - length * d, p + length * d])  # (2, dims)
            ax.plot(*seg.T, color="tab:red", lw=1.2, zorder=3, label=None if drawn else
                    "unstable direction")
            drawn.append(seg)
    return drawn


def _draw_points(ax, fp: Any, keep, P: np.ndarray) -> None:
    stab = fp.stability[keep]
    fixed = fp.is_fixed[keep]
    for cls in _MARKERS:  # the stability classes, in their order
        for is_fixed, alpha, size, tag in ((True, 1.0, 50, ""), (False, 0.4, 20, " (slow)")):
            sel = (stab == cls) & (fixed == is_fixed)
            if not sel.any():
                continue
            ax.scatter(*P[sel].T, s=size, alpha=alpha, zorder=4 if is_fixed else 3,
                       linewidths=1.5, label=f"{cls}{tag} ({int(sel.sum())})", **_MARKERS[cls])
