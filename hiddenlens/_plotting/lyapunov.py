"""Drawing of lyapunov results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any

import numpy as np


def draw_lyapunov(result, ax: Any = None, *, kind: str = "convergence", **kw: Any):
    """Draw a LyapunovSpectrum on ``ax``; the options are those of ``LyapunovSpectrum.plot``."""
    from .style import get_axes, time_colors

    if kind not in ("convergence", "spectrum"):
        raise ValueError(f"kind must be 'convergence' or 'spectrum', got {kind!r}")
    ax = get_axes(ax)
    k = result.k
    if kind == "convergence":
        colors = time_colors(k, "viridis")
        for i in range(k):
            label = f"λ{i + 1}" if k <= 10 else None
            ax.plot(result.running_steps, result.running[:, i], color=colors[i], label=label,
                    **kw)
        if result.running_steps.shape[0] > 1:
            ax.set_xscale("log")
        ax.set_xlabel("counted steps")
        ax.set_ylabel("running estimate (per step)")
        ax.set_title(f"Lyapunov exponents: convergence (B={result.batch_size})")
        if k <= 10:
            ax.legend(fontsize="small")
    else:
        idx = np.arange(1, k + 1)
        yerr = result.std if result.batch_size > 1 else None
        kw.setdefault("fmt", "o")
        kw.setdefault("markersize", 4 if k <= 50 else 2)
        ax.errorbar(idx, result.exponents, yerr=yerr, **kw)
        ax.set_xlabel("index i")
        ax.set_ylabel("λ_i (per step)")
        ky = float(result.kaplan_yorke)
        ax.set_title("Lyapunov spectrum: every exponent negative (Kaplan–Yorke dimension 0)"
                     if ky == 0 else f"Lyapunov spectrum, Kaplan–Yorke dimension {ky:.3g}")
    ax.axhline(0.0, color="0.5", linewidth=0.8, linestyle=":")
    return ax
