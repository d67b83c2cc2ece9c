"""Drawing of spectra results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any

import numpy as np


def draw_spectra(result, ax: Any = None, *, sample: int | None = None, max_lines: int | None = None,
                 **kw: Any):
    """Singular values over time on a log axis (median over samples, or one ``sample``).

    All ``k`` indices are drawn (or the first ``max_lines``; the title then says how many of
    ``k``), coloured from the largest (dark) to the
    smallest; the spectral radius, when computed, is the dashed black line; the dotted line
    marks 1, where a step neither stretches nor shrinks.
    """
    from .style import finish_step_axes, get_axes, sample_or_median, time_colors

    ax = get_axes(ax)
    sv = result.singular_values  # (B, T, k)
    B, T, k = sv.shape
    curve = sample_or_median(sv, sample, np.nanmedian)  # (T, k)
    label = (f"median over {B} samples" if B > 1 else "sample 0") if sample is None \
        else f"sample {sample}"
    n = k if max_lines is None else max(1, min(k, int(max_lines)))
    colors = time_colors(n)
    steps = np.arange(T)
    for i in range(n):
        ax.plot(steps, curve[:, i], color=colors[i], lw=kw.get("lw", 1.0),
                label=f"σ{i + 1}" if i < 3 or i == n - 1 else None)
    drawn = [curve[:, :n]]
    if result.spectral_radius is not None:
        r = sample_or_median(result.spectral_radius, sample, np.nanmedian)  # (T,)
        ax.plot(steps, r, "k--", lw=1.0, label="spectral radius")
        drawn.append(r[:, None])
    ax.axhline(1.0, color="0.6", lw=0.8, ls=":")
    return finish_step_axes(
        ax, np.concatenate([d.ravel() for d in drawn]), "singular value of J_t",
        f"{result.metadata.get('model_class', 'system')}: Jacobian spectra ({label}"
        + (f"; σ1–σ{n} of {k} drawn)" if n < k else ")"))
