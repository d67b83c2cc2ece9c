"""Drawing of spectra results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any

import numpy as np


def draw_spectra(result, ax: Any = None, *, sample: int | None = None, max_lines: int = 10,
                 **kw: Any):
    """Singular values over time on a log axis (median over samples, or one ``sample``).

    The first ``max_lines`` indices are drawn, coloured from the largest (dark) to the
    smallest; the spectral radius, when computed, is the dashed black line; the dotted line
    marks 1, where a step neither stretches nor shrinks.
    """
    from .style import get_axes, time_colors

    ax = get_axes(ax)
    sv = result.singular_values  # (B, T, k)
    B, T, k = sv.shape
    if sample is None:
        curve = np.nanmedian(sv, axis=0) if B > 1 else sv[0]  # (T, k)
        label = f"median over {B} samples" if B > 1 else "sample 0"
    else:
        if not -B <= sample < B:
            raise ValueError(f"sample must be in [0, {B}), got {sample}")
        curve, label = sv[sample], f"sample {sample}"
    n = min(k, max_lines)
    colors = time_colors(n)
    steps = np.arange(T)
    for i in range(n):
        ax.plot(steps, curve[:, i], color=colors[i], lw=kw.get("lw", 1.0),
                label=f"σ{i + 1}" if i < 3 or i == n - 1 else None)
    drawn = [curve[:, :n]]
    if result.spectral_radius is not None:
        rad = result.spectral_radius
        r = (np.nanmedian(rad, axis=0) if B > 1 else rad[0]) if sample is None \
            else rad[sample]
        ax.plot(steps, r, "k--", lw=1.0, label="spectral radius")
        drawn.append(r[:, None])
    ax.axhline(1.0, color="0.6", lw=0.8, ls=":")
    values = np.concatenate([d.ravel() for d in drawn])
    if np.any(np.isfinite(values) & (values > 0)):
        ax.set_yscale("log")
    ax.set_xlabel("step t")
    ax.set_ylabel("singular value of J_t")
    ax.set_title(f"{result.metadata.get('model_class', 'system')}: Jacobian spectra ({label})")
    ax.legend(fontsize="small", loc="best")
    return ax
