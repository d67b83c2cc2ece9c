"""Drawing of gradient flow results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np


def draw_gradient_flow(result, ax: Any = None, *, sample: int | None = None, norm: str = "spectral",
                       **kw: Any):
    """log10 of the gradient norm against the lag, with the fitted line.

    ``sample=None`` draws the median over samples with the 10-90% band of the samples;
    the dashed line is the pooled fit, its slope the rate in the title.
    """
    from .style import get_axes

    if norm not in ("spectral", "frobenius"):
        raise ValueError(f"norm must be 'spectral' or 'frobenius', got {norm!r}")
    ax = get_axes(ax)
    logs = (result.log_norms if norm == "spectral" else result.log_frobenius) / math.log(10)
    B = logs.shape[0]
    x = result.lags
    with np.errstate(all="ignore"):
        if sample is None:
            finite = np.where(np.isfinite(logs), logs, np.nan)
            ok = ~np.isnan(finite).all(axis=0)
            mid = np.full(x.shape, np.nan)
            mid[ok] = np.nanmedian(finite[:, ok], axis=0)
            if B > 1 and ok.any():
                lo = np.full(x.shape, np.nan)
                hi = np.full(x.shape, np.nan)
                lo[ok], hi[ok] = np.nanquantile(finite[:, ok], [0.1, 0.9], axis=0)
                ax.fill_between(x, lo, hi, color="C0", alpha=0.2, lw=0,
                                label="10-90% of samples")
            label = f"median of {B} samples" if B > 1 else f"sample {result.samples[0]}"
        else:
            if not -B <= sample < B:
                raise ValueError(f"sample must be in [0, {B}), got {sample}")
            mid, label = logs[sample], f"sample {result.samples[sample]}"
    ax.plot(x, mid, color="C0", lw=kw.get("lw", 1.5), label=label)
    if np.isfinite(result.rate) and norm == "spectral":
        ax.plot(x, (result.intercept + result.rate * x) / math.log(10), "k--", lw=1.0,
                label=f"fit: {result.rate:+.3g} per step")
    ax.axhline(0.0, color="0.6", lw=0.8, ls=":")
    what = "||d s_T / d s_t||" + ("_2" if norm == "spectral" else "_F")
    ax.set_xlabel("lag T - t (steps)")
    ax.set_ylabel(f"log10 {what}")
    ax.set_title(f"{result.metadata.get('model_class', 'system')}: gradient flow, "
                 f"{result.verdict}")
    ax.legend(fontsize="small", loc="best")
    return ax


def draw_loss_gradient_norms(result, ax: Any = None, *, sample: int | None = None, **kw: Any):
    """||dL/ds_t|| over the steps t on a log axis (median over samples, or one sample);
    grey ticks mark the steps the loss reads."""
    from .style import finish_step_axes, get_axes, sample_or_median

    ax = get_axes(ax)
    B, T = result.norms.shape
    y = sample_or_median(result.norms, sample)
    label = (f"median of {B} samples" if B > 1 else "sample 0") if sample is None \
        else f"sample {sample}"
    ax.plot(np.arange(T), y, lw=kw.get("lw", 1.5), label=label)
    if result.loss_steps is not None:
        for t in result.loss_steps:
            ax.axvline(t, color="0.7", lw=0.8, ls=":")
    return finish_step_axes(
        ax, y, "||dL / ds_t||",
        f"{result.metadata.get('model_class', 'model')}: loss gradient per step")
