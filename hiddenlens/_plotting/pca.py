"""Drawing of pca results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any

import numpy as np

#: Most steps drawn along one line before the drawing is thinned (``thin=None``).
MAX_DRAWN_STEPS = 400


def draw_trajectories(result, ax: Any = None, *, dims: int = 2, color_by: Any = None,
                      samples: Any = None, steps: slice | None = None, others: Any = None,
                      conditions: bool | None = None, thin: int | None = None):
    """Draw the trajectories, or the condition means, in the plane (or space) of the leading
    components (see :meth:`hiddenlens.PCATrajectories.plot` for the parameters).

    ``others`` holds further trajectories already projected into this basis, as a sequence of
    (name, array of shape (B', T', k)), drawn dashed.
    """
    from .style import RUN_COLORS, get_axes

    dims = check_dims(dims, result.n_components)
    B, T, _ = result.projected.shape
    means = _use_means(result, conditions, color_by)
    try:
        rows = np.atleast_1d(np.arange(B)[samples if samples is not None else slice(None)])
    except (IndexError, TypeError) as err:
        raise ValueError(f"samples must index the {B} samples ({err})") from None
    if rows.size == 0:
        raise ValueError("samples selects nothing to draw; pass a non-empty selection")
    values = result.condition_steps if means else np.arange(T)
    cols, stride = _window(values, steps, thin)  # indices into the time axis drawn
    ax = get_axes(ax, projection="3d" if dims == 3 else None)
    drawn: list[np.ndarray] = []
    handles: list = []
    if means:
        keys = _condition_keys(result)
        if samples is not None:  # the chosen trials, faint, behind the means
            trial_cols, _ = _window(np.arange(T), None if result.onsets is not None else steps,
                                    thin)
            P = result.projected[rows][:, trial_cols, :dims]  # (b, t, dims)
            _draw_trials(ax, P, _trial_colouring(result, "label", rows, trial_cols, keys),
                         trial_cols, alpha=0.3, key=False)
            drawn.append(P)
        M = result.condition_means[:, cols, :dims]  # (C, t, dims)
        handles += _draw_means(ax, M, keys, values[cols])
        drawn.append(M)
        what = f"means of {M.shape[0]} conditions"
    else:
        P = result.projected[rows][:, cols, :dims]  # (b, t, dims)
        colouring = _trial_colouring(result, color_by, rows, cols, None)
        handles += _draw_trials(ax, P, colouring, cols)
        handles += _mark_ends(ax, [P])
        drawn.append(P)
        what = f"{rows.size} trajector{'y' if rows.size == 1 else 'ies'}"
    used = len(result.conditions) if means else 1
    for i, (label, Q) in enumerate(others or ()):
        Q = Q[:, :, :dims]  # (B', T', dims)
        colour = RUN_COLORS[(used + i) % len(RUN_COLORS)]
        handles += _draw_trials(ax, Q, ("single", colour), None, label=label, ls="--")
        _mark_ends(ax, [Q])  # its start and end, under the legend entries above
        drawn.append(Q)
    set_limits(ax, drawn, dims)
    ax.set_xlabel(result.axis_label(0))
    ax.set_ylabel(result.axis_label(1))
    if dims == 3:
        ax.set_zlabel(result.axis_label(2))
    ax.set_title(_title(result, what, values[cols], stride, aligned=means
                        and result.onsets is not None), fontsize="medium")
    if handles:
        if ax.figure.get_layout_engine() is not None:  # room is made for a key outside
            ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1.0),
                      borderaxespad=0.0, fontsize="small")
        else:  # fixed margins (a report page): keep the key inside the axes
            ax.legend(handles=handles, loc="best", fontsize="small", framealpha=0.8)
    return ax


def _use_means(result, conditions: Any, color_by: Any) -> bool:
    if conditions is None:
        return result.condition_means is not None and color_by is None
    if conditions not in (True, False):
        raise ValueError(f"conditions must be True, False or None, got {conditions!r}")
    if conditions and result.condition_means is None:
        raise ValueError("this result has no condition means; pass labels= (one per sequence "
                         "or per step, with at most 64 distinct values) to pca_trajectories")
    return bool(conditions)


def _window(values: np.ndarray, steps: Any, thin: Any) -> tuple[np.ndarray, int]:
    """Indices of the drawn steps: those of ``values`` inside the window, thinned."""
    if steps is not None and not isinstance(steps, slice):
        raise ValueError(f"steps must be a slice of steps, e.g. slice(100, 300), got "
                         f"{type(steps).__name__}")
    if thin is not None and (isinstance(thin, bool) or not isinstance(thin, (int, np.integer))
                             or thin < 1):
        raise ValueError(f"thin must be an int >= 1 (draw every thin-th step), got {thin!r}")
    keep = np.ones(values.size, bool)
    stride = 1
    if steps is not None:
        if steps.start is not None:
            keep &= values >= steps.start
        if steps.stop is not None:
            keep &= values < steps.stop
        if steps.step is not None:
            if isinstance(steps.step, bool) or not isinstance(steps.step, (int, np.integer)) \
                    or steps.step < 1:
                raise ValueError(f"the step of steps= must be an int >= 1, got {steps.step!r}")
            stride = int(steps.step)
    idx = np.flatnonzero(keep)
    if idx.size == 0:
        raise ValueError(f"steps={steps!r} selects none of the steps {values[0]} to "
                         f"{values[-1]}; pass a window inside them")
    if thin is None:
        thin = max(1, -(-idx[::stride].size // MAX_DRAWN_STEPS))
    stride *= int(thin)
    return idx[::stride], stride


def _condition_keys(result) -> dict[str, Any]:
    """Colour (and line style) of each condition: the palette with line styles for categories,
    a colour map for ordered values."""
    from .style import LINESTYLES, RUN_COLORS

    C = len(result.conditions)
    if result.label_kind == "ordered":
        import matplotlib
        from matplotlib.colors import Normalize

        v = np.asarray(result.conditions, dtype=float)
        norm = Normalize(float(v.min()), float(v.max()) if v.max() > v.min() else v.min() + 1)
        cmap = matplotlib.colormaps["viridis"]
        return {"kind": "ordered", "colors": [cmap(norm(x)) for x in v], "styles": ["-"] * C,
                "norm": norm, "cmap": cmap, "values": v}
    return {"kind": "categorical", "colors": [RUN_COLORS[i % len(RUN_COLORS)] for i in range(C)],
            "styles": [LINESTYLES[(i // len(RUN_COLORS) + i) % len(LINESTYLES)]
                       for i in range(C)],
            "values": np.asarray(result.conditions)}


def _colorbar(ax, keys, label: str = "label"):
    from matplotlib.cm import ScalarMappable

    sm = ScalarMappable(norm=keys["norm"], cmap=keys["cmap"])
    return ax.figure.colorbar(sm, ax=ax, label=label, shrink=0.8,
                              pad=0.12 if getattr(ax, "name", "") == "3d" else 0.04)


def _draw_means(ax, M: np.ndarray, keys, steps: np.ndarray) -> list:
    """One line per condition (C, t, dims), start/end and onset markers; legend handles."""
    from matplotlib.lines import Line2D

    from .style import plain_text

    handles = []
    names = []
    ordered = keys["kind"] == "ordered"
    for c in range(M.shape[0]):
        line = M[c]  # (t, dims)
        ok = np.isfinite(line).all(axis=1)
        if not ok.any():
            continue
        colour, style = keys["colors"][c], keys["styles"][c]
        ax.plot(*line.T, color=colour, ls=style, lw=1.8)
        first, last = line[ok][0], line[ok][-1]
        ax.scatter(*first[:, None], marker="o", facecolors="white", edgecolors=colour, s=26,
                   zorder=3)
        ax.scatter(*last[:, None], marker="s", color=colour, s=22, zorder=3)
        at = np.flatnonzero(steps == 0)
        if at.size and ok[at[0]]:
            ax.scatter(*line[at[0]][:, None], marker="^", color=colour, edgecolors="black",
                       s=40, zorder=4)
        if not ordered:
            names.append(c)
            handles.append(Line2D([], [], color=colour, ls=style, lw=1.8,
                                  label=plain_text(_name(keys, c))))
    if ordered:
        _colorbar(ax, keys, "label (condition)")
    handles.append(Line2D([], [], marker="o", ls="", markerfacecolor="white",
                          markeredgecolor="black", label="start"))
    handles.append(Line2D([], [], marker="s", ls="", color="black", label="end"))
    if (steps == 0).any():
        handles.append(Line2D([], [], marker="^", ls="", color="0.5", markeredgecolor="black",
                              label="onset"))
    return handles


def _name(keys, c: int) -> str:
    v = keys["values"][c]
    return f"{float(v):g}" if isinstance(v, (float, np.floating)) else str(
        v.item() if isinstance(v, np.generic) else v)


def _trial_colouring(result, color_by: Any, rows: np.ndarray, cols: np.ndarray, keys):
    """What colours single trajectories: ("time"|"sample", None), ("single", colour) or
    ("labels", (per-step label codes (b, t), keys))."""
    B, T, _ = result.projected.shape
    if color_by is None:
        color_by = "label" if result.labels is not None else "time"
    if isinstance(color_by, str):
        if color_by == "label":
            if result.labels is None:
                raise ValueError("color_by='label' needs labels; pass labels= to "
                                 "pca_trajectories or an array of labels as color_by")
            lab, kind = result.labels, result.label_kind
        elif color_by == "time":
            return ("time", None)
        elif color_by == "sample":
            return ("sample", rows)
        else:
            raise ValueError(f"color_by must be 'time', 'sample', 'label' or an array of {B} "
                             f"labels (one per sample) or ({B}, {T}) (one per step), got "
                             f"{color_by!r}")
    else:
        lab = np.asarray(color_by)
        if lab.shape not in ((B,), (B, T)):
            raise ValueError(f"color_by labels must have shape ({B},), one per sample, or "
                             f"({B}, {T}), one per step, got shape {lab.shape}")
        kind = "ordered" if lab.dtype.kind == "f" else "categorical"
        keys = None
    per_step = np.broadcast_to(lab[:, None], (B, T)) if lab.ndim == 1 else lab
    return ("labels", _label_codes(per_step[rows][:, cols], kind, keys))  # (b, t)


def _label_codes(sel: np.ndarray, kind: str, keys):
    """Per-step labels sel (b, t) as (colour values or codes (b, t), keys); codes of labels
    outside the keys are -1."""
    if keys is None:
        if kind == "ordered":
            finite = sel[np.isfinite(sel)] if sel.dtype.kind == "f" else sel
            uniq = np.unique(finite)
        else:
            uniq = np.unique(sel)
        fake = type("Labels", (), {"conditions": uniq, "label_kind": kind})
        keys = _condition_keys(fake)
    if keys["kind"] == "ordered":
        return (np.asarray(sel, dtype=float), keys)
    code = np.searchsorted(keys["values"], sel)
    code = np.where((code < len(keys["values"])) & (keys["values"][np.minimum(
        code, len(keys["values"]) - 1)] == sel), code, -1)
    return (code, keys)


_TIME_PIECES = 128  # most colour bands drawn along one trajectory coloured by time


def _draw_trials(ax, P: np.ndarray, colouring, steps, *, label: str | None = None,
                 ls: str = "-", alpha: float = 1.0, key: bool = True) -> list:
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
    per_sequence = kind == "labels" and _one_label_per_sequence(extra[0])
    m = _piece_steps(kind, t, per_sequence)
    firsts = np.arange(0, t - 1, m)  # first step of each piece
    segs = [P[i, a:min(a + m, t - 1) + 1] for i in range(b) for a in firsts]  # (<= m+1, dims)
    kw: dict[str, Any] = {"linewidths": 1.0, "linestyles": ls, "alpha": alpha}
    handles += _trial_styles(kw, kind, extra, b, firsts, per_sequence)
    if dims == 3:
        from mpl_toolkits.mplot3d.art3d import Line3DCollection as Collection
    else:
        Collection = LineCollection
    coll = Collection(segs, **kw)
    if kind == "time":
        coll.set_array(np.tile(steps[firsts], b).astype(float))
        coll.set_cmap("viridis")
    ax.add_collection(coll)
    return handles + _trial_keys(ax, coll, kind, extra, b, dims, per_sequence, key)


def _one_label_per_sequence(values: np.ndarray) -> bool:
    """Whether per-step labels (b, t) hold one label per sequence (NaN steps aside)."""
    return bool(np.all(values == values[:, :1]) or (
        values.dtype.kind == "f" and np.all(np.isnan(values) | (values == values[:, :1]))))


def _piece_steps(kind: str, t: int, per_sequence: bool) -> int:
    """Steps per drawn piece of a trajectory of t steps."""
    # One polyline per piece of m steps: a sample's own colour needs one piece, a colour over time
    # at most _TIME_PIECES pieces (finer colour bands are invisible, and each piece is a Path
    # that matplotlib builds and strokes on every redraw).
    if kind == "time":
        return -(-(t - 1) // _TIME_PIECES)
    if kind == "labels" and not per_sequence:
        return 1
    return t - 1


def _sample_names(extra, b: int) -> np.ndarray:
    return np.arange(b) if extra is None else extra


def _trial_styles(kw: dict[str, Any], kind: str, extra, b: int, firsts: np.ndarray,
                  per_sequence: bool) -> list:
    """Fill kw with the colours (and line styles) of the pieces; return legend handles."""
    from matplotlib.lines import Line2D

    handles = []
    if kind == "single":
        kw["colors"] = extra
    elif kind == "sample":
        from .style import LINESTYLES, RUN_COLORS

        names = _sample_names(extra, b)
        if b <= len(RUN_COLORS):  # a colour and a line style each, named in the legend
            kw["colors"] = [RUN_COLORS[i] for i in range(b)]
            kw["linestyles"] = [LINESTYLES[i] for i in range(b)]
            handles += [Line2D([], [], color=RUN_COLORS[i], ls=LINESTYLES[i],
                               label=f"sample {names[i]}") for i in range(b)]
        else:
            from .style import time_colors

            kw["colors"] = np.repeat(time_colors(b, "turbo"), firsts.size, axis=0)
    elif kind == "labels":
        values, keys = extra
        piece = values[:, firsts].reshape(-1)  # (b * pieces,) label at each piece's start
        if keys["kind"] == "ordered":
            kw["colors"] = [keys["cmap"](keys["norm"](v)) if np.isfinite(v) else (0.6,) * 3
                            + (1.0,) for v in piece]
        else:
            grey = "#999999"
            kw["colors"] = [keys["colors"][c] if c >= 0 else grey for c in piece]
            if per_sequence:
                kw["linestyles"] = [keys["styles"][c] if c >= 0 else "-" for c in piece]
    return handles


def _trial_keys(ax, coll, kind: str, extra, b: int, dims: int, per_sequence: bool,
                key: bool) -> list:
    """Draw the colour bar of the trajectories, or return their legend handles."""
    from matplotlib.lines import Line2D

    from .style import plain_text

    if kind == "time":
        ax.figure.colorbar(coll, ax=ax, label="step", shrink=0.8, pad=0.12 if dims == 3 else 0.04)
    elif kind == "sample" and b > 8:
        import matplotlib
        from matplotlib.cm import ScalarMappable
        from matplotlib.colors import Normalize

        names = _sample_names(extra, b)
        sm = ScalarMappable(norm=Normalize(float(names[0]), float(names[-1]) or 1.0),
                            cmap=matplotlib.colormaps["turbo"])
        ax.figure.colorbar(sm, ax=ax, label="sample", shrink=0.8,
                           pad=0.12 if dims == 3 else 0.04)
    elif kind == "labels" and key:
        keys = extra[1]
        if keys["kind"] == "ordered":
            _colorbar(ax, keys)
        else:
            return [Line2D([], [], color=keys["colors"][i], ls=keys["styles"][i]
                           if per_sequence else "-", label=plain_text(_name(keys, i)))
                    for i in range(len(keys["values"]))]
    return []


def _title(result, what: str, shown: np.ndarray, stride: int, *, aligned: bool) -> str:
    part = "all states" if result.parts is None else ", ".join(result.parts)
    first = f"PCA of {part}: participation ratio {result.participation_ratio:.1f}"
    if result.fit_description != "all steps":
        first += f" (axes fitted on {result.fit_description})"
    window = f"steps {shown[0]} to {shown[-1]}" + (" from the onset" if aligned else "")
    every = "" if stride == 1 else f", every {_ordinal(stride)} step"
    return f"{first}\n{what}, {window}{every}"


def _ordinal(n: int) -> str:
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


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
    pts = pts[np.isfinite(pts).all(axis=1)]  # condition means are NaN where no state counts
    if pts.size == 0:
        return
    lo, hi = pts.min(axis=0), pts.max(axis=0)
    span = hi - lo
    big = float(span.max()) or 1.0
    pad = np.where(span > 1e-9 * big, 0.05 * span, 0.5 * big)  # a flat axis gets room too
    setters = (ax.set_xlim, ax.set_ylim) + ((ax.set_zlim,) if dims == 3 else ())
    for i, setter in enumerate(setters):
        setter(lo[i] - pad[i], hi[i] + pad[i])
