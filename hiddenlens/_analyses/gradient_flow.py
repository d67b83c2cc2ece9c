"""Gradient flow through time: how d s_T / d s_t scales with the lag T - t, and loss gradients.

:func:`gradient_flow` multiplies the step Jacobians backward from a final step in log space
(vanishing and exploding products stay representable over thousands of steps) and fits a rate
per step; :func:`loss_gradient_norms` gives the norm of the total gradient dL/dh_t of a user's
loss at every step.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
from torch import nn

from .._core.jacobians import check_chunk, linearize, system_for_trace, trace_tensors
from .._core.options import analysis, check_options, int_seed, progress_bar
from .._core.results import Result, frozen_mapping, readonly
from .._core.stepcheck import step_errors
from .._core.threads import single_thread_below
from .._core.validation import as_float_tensor

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import ModelLike, Sequences
    from .._core.trace import Trace

__all__ = ["GradientFlow", "LossGradientNorms", "gradient_flow", "loss_gradient_norms",
           "VERDICTS"]

#: The verdicts of :func:`gradient_flow`, from the fitted rate r (natural log per step) and
#: the threshold h: r < -h "vanishing", r > h "exploding", otherwise "near-isometric";
#: "undetermined" when no finite norm was available to fit.
VERDICTS = ("vanishing", "near-isometric", "exploding", "undetermined")
DEFAULT_THRESHOLD = 0.01
_CHUNK_ELEMENTS = 1 << 22
# per-step work below this many flops runs on one thread (see single_thread_below)
_SMALL_STEP_FLOPS = 2e7
# products up to this size get their 2-norm from an SVD outright (cheaper than iterating)
_EXACT_SIZE = 128


# ---------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class GradientFlow(Result):
    """Norms of d s_T / d s_t over the lag T - t, with a fitted rate and a verdict.

    Attributes
    ----------
    lags : ndarray of shape (L,)
        Lags T - t in steps (1, 2, ..., max_lag).
    norms : ndarray of shape (B, L)
        Operator 2-norm (largest singular value) of d s_T / d s_{T-lag} for every sample. Values
        beyond the float64 range read 0 or inf; ``log_norms`` holds them exactly.
    log_norms : ndarray of shape (B, L)
        Natural log of ``norms``, accumulated in log space.
    frobenius, log_frobenius : ndarray of shape (B, L)
        Frobenius norm (root of the summed squared singular values) and its log.
    rate : float
        Least-squares slope of the sample-mean of ``log_norms`` against the lag: the change of
        the log gradient norm per step of lag (negative: shrinking).
    rates : ndarray of shape (B,)
        The same slope fitted to each sample.
    intercept : float
        Intercept of the pooled fit (log norm extrapolated to lag 0).
    half_life : float
        ln 2 / -rate: lag over which the norm halves (inf unless ``rate`` < 0).
    verdict : str
        "vanishing" (rate < -threshold), "exploding" (rate > threshold), "near-isometric"
        otherwise, or "undetermined" (no finite norms).
    threshold : float
        The rate threshold (natural log per step) used for the verdict.
    end : int
        Step index of the final state s_T in the trace.
    samples : ndarray of shape (B,)
        Which samples of the trace these rows are.
    parts : tuple of str or None
        The parts of the state the norms cover (None: the whole state).
    metadata : Mapping[str, Any]
        The trace's metadata.

    Notes
    -----
    The verdict is a heuristic read off a straight-line fit over a finite range of lags along
    one trajectory; it depends on the inputs and on the end step, and says nothing certain about
    training. See ``docs/gradient_flow.md``.
    """

    lags: np.ndarray
    norms: np.ndarray
    log_norms: np.ndarray
    frobenius: np.ndarray
    log_frobenius: np.ndarray
    rate: float
    rates: np.ndarray
    intercept: float
    half_life: float
    verdict: str
    threshold: float
    end: int
    samples: np.ndarray
    parts: tuple[str, ...] | None

    def plot(self, ax: Any = None, *, sample: int | None = None, norm: str = "spectral",
             **kw: Any):
        """log10 of the gradient norm against the lag, with the fitted line.

        ``sample=None`` draws the median over samples with the 10-90% band of the samples;
        the dashed line is the pooled fit, its slope the rate in the title.
        """
        from .._plotting.gradient_flow import draw_gradient_flow

        return draw_gradient_flow(self, ax, sample=sample, norm=norm, **kw)

    def to_frame(self):
        """One row per (sample, lag): ``norm``, ``log_norm``, ``frobenius``, ``log_frobenius``."""
        import pandas as pd

        B, L = self.norms.shape
        idx = pd.MultiIndex.from_product([self.samples.tolist(), self.lags.tolist()],
                                         names=["sample", "lag"])
        return pd.DataFrame({"norm": self.norms.ravel(), "log_norm": self.log_norms.ravel(),
                             "frobenius": self.frobenius.ravel(),
                             "log_frobenius": self.log_frobenius.ravel()}, index=idx)

    def __repr__(self) -> str:
        B, L = self.norms.shape
        note = self.metadata.get("verdict_note")
        return (f"GradientFlow(B={B}, lags 1..{L}, rate={self.rate:+.4g} per step from "
                f"{self.metadata.get('counted_lags', L)} lags, half_life={self.half_life:.4g}, "
                f"verdict={self.verdict!r}" + (f" [{note}]" if note else "") + ")")


# ---------------------------------------------------------------------- computation
@analysis("gradient_flow")
def gradient_flow(
    system: ModelLike,
    trace: Trace,
    *,
    max_lag: int | None = None,
    end: int | None = None,
    samples: Any = None,
    parts: str | Sequence[str] | None = None,
    threshold: float = DEFAULT_THRESHOLD,
    fit_lags: tuple[int, int] | None = None,
    tol: float = 1e-9,
    max_iter: int = 30,
    chunk: int | None = None,
    seed: int = 0,
    progress: bool | Callable[[int, int, str], Any] | None = None,
    threads: int | None = None,
) -> GradientFlow:
    """Norm of d s_T / d s_t against the lag T - t along a recorded trace.

    Parameters
    ----------
    system : RecurrentSystem, nn.Module or callable
        The system that produced ``trace`` (a model is wrapped in the trace's precision).
    trace : Trace
    max_lag : int, optional
        Largest lag (default: ``end``, i.e. every lag back to the first recorded state; up to
        ``end + 1`` reaches back to ``trace.initial``).
    end : int, optional
        Step index of the final state s_T (default: the last step, T - 1). For a trace
        recorded with ``lengths``, each sequence ends at its own last real step (or at
        ``end``, whichever is earlier); lags past a sequence's start have NaN norms there and
        the pooled rate averages the sequences that reach each lag.
    samples : int or sequence of int, optional
        Which samples to analyse (default: all).
    parts : str or sequence of str, optional
        Restrict rows and columns to these parts of the state, e.g. ``"layer0.h"`` for
        d h_T / d h_t of an LSTM without its cell state (default: the whole state).
    threshold : float, default 0.01
        Rate (natural log per step) beyond which the verdict is "vanishing" or "exploding".
        0.01 means a factor e over 100 steps of lag (half-life ~69 steps).
    fit_lags : (int, int), optional
        Inclusive range of lags the rate is fitted on (default: all computed lags).
    tol : float, default 1e-9
        Relative tolerance of the power iteration for the 2-norm.
    max_iter : int, default 30
        Power iterations per lag before the 2-norm is taken from an SVD instead.
    chunk : int, optional
        Steps of Jacobians formed at a time (default: ~32 MiB of them).
    seed : int, default 0
        Seed of the power iteration's start vector.
    progress : bool, optional
        Show a progress bar (default: for long runs).

    Returns
    -------
    GradientFlow

    Notes
    -----
    d s_T / d s_{T-L} = J_T J_{T-1} ... J_{T-L+1} is built backward one factor per lag (as
    backpropagation through time does) in float64. After every factor the product is divided
    by its Frobenius norm and the log of that norm is accumulated, so the log norms stay exact
    however far the product shrinks or grows. The 2-norm comes from power iteration on the
    (normalised) product, started from the previous lag's singular vectors (an SVD for S <= 128).
    Cost: one S x S matrix product per lag and sample.
    """
    check_options("gradient_flow", locals())
    seed = int_seed(seed)  # a numpy Generator gives one draw; local generators from here
    system = system_for_trace(system, trace)
    prev, x = trace_tensors(system, trace)  # (B, T, S), (B, T, I)
    B_all, T, S = prev.shape
    from .._core.record import valid_steps

    real = valid_steps(trace)  # (B, T) or None: right-padded sequences end at their length
    sel = _check_samples(samples, B_all)
    end = _check_index(end, T, "end", T - 1)
    if real is not None:
        # each sequence ends at its own last real step (or at end=, whichever comes first)
        ends_all = np.minimum(real.sum(axis=1) - 1, end)  # (B,)
        end = int(ends_all[sel.numpy()].max())
    max_lag = _check_index(max_lag, end + 2, "max_lag", max(end, 1), low=1)
    rows = _part_columns(trace, parts)
    if not (isinstance(threshold, (int, float, np.integer, np.floating))
            and not isinstance(threshold, bool) and 0 <= threshold < math.inf):
        raise ValueError(f"threshold must be a number >= 0 (natural log per step), got "
                         f"{threshold!r}")
    if not (isinstance(tol, (int, float, np.integer, np.floating))
            and not isinstance(tol, bool) and 0 < tol < 1):
        raise ValueError(f"tol must be a number in (0, 1) (relative tolerance of the power "
                         f"iteration), got {tol!r}")
    lo_fit, hi_fit = _check_fit_lags(fit_lags, max_lag)
    if isinstance(max_iter, bool) or not isinstance(max_iter, numbers.Integral) or max_iter < 1:
        raise ValueError(f"max_iter must be a positive integer, got {max_iter!r}")
    chunk = check_chunk(chunk)
    prev, x = prev[sel], x[sel]
    B = prev.shape[0]
    # overflow or NaN in the states must not reach the products (an inf state gives a zero or
    # NaN Jacobian, which would read as "vanishing"): fit on the finite part before it
    states_sel = trace.states[sel.numpy()]
    if real is not None:  # padded states take no part in the products: not checked either
        states_sel = np.where(real[sel.numpy()][:, :, None], states_sel, 0.0)
    end, max_lag, lo_fit, hi_fit, blowup = _finite_window(
        states_sel, trace.initial[sel.numpy()], x, end, max_lag, lo_fit, hi_fit,
        sel.numpy(), fit_lags is not None)
    # the step of each sample's final state: one for all, or each sequence's own
    ends = torch.full((B,), end, dtype=torch.int64) if real is None else \
        torch.from_numpy(np.minimum(ends_all[sel.numpy()], end)).to(torch.int64)
    rows_b = torch.arange(B)[:, None]
    if chunk is None:
        chunk = max(1, _CHUNK_ELEMENTS // max(B * S * S, 1))
    gen = torch.Generator().manual_seed(int(seed))

    log_n = np.empty((B, max_lag))
    log_f = np.empty((B, max_lag))
    P = torch.eye(S, dtype=torch.float64).expand(B, S, S).clone()  # (B, S, S)
    log_scale = torch.zeros(B, dtype=torch.float64)
    ncols = S if rows is None else rows.numel()
    v = torch.linalg.qr(torch.randn(B, ncols, min(ncols, 4), generator=gen,
                                    dtype=torch.float64))[0]  # (B, C, p) start block

    show = progress if progress is not None else max_lag * B * S**3 > 5e10
    bar = progress_bar(progress, total=max_lag, label="gradient flow", auto=bool(show))
    L = 0
    one_thread = single_thread_below(2.0 * B * S**3, _SMALL_STEP_FLOPS)
    with torch.no_grad(), bar, one_thread, step_errors(system):
        while L < max_lag:
            # Jacobians J_t for t = end - L, end - L - 1, ... (the next factors), newest first;
            # a sequence shorter than the lag has no factor there (identity, norm left NaN)
            n = min(chunk, max_lag - L)
            t = ends[:, None] - L - torch.arange(n)[None, :]  # (B, n) step of each factor
            has = t >= 0
            t = t.clamp(min=0)
            lin = linearize(system, prev[rows_b, t].reshape(B * n, S),
                            x[rows_b, t].reshape(B * n, -1), dtype=torch.float64)
            J = lin.dense().to(torch.float64).reshape(B, n, S, S)
            if not bool(has.all()):
                J[~has] = torch.eye(S, dtype=torch.float64)
            for j in range(n):
                P = torch.bmm(P, J[:, j])
                f = torch.linalg.matrix_norm(P)  # (B,) Frobenius
                alive = torch.isfinite(f) & (f > 0)
                P = P / torch.where(alive, f, torch.ones_like(f))[:, None, None]
                log_scale = log_scale + torch.where(
                    alive, f.log(), torch.where(f == 0, -math.inf, math.nan))
                sub = P if rows is None else P[:, rows][:, :, rows]
                sub_f = torch.linalg.matrix_norm(sub) if rows is not None else \
                    torch.ones_like(f)
                sigma, v = _top_singular(sub, v, alive & (sub_f > 0), tol, max_iter)
                with np.errstate(divide="ignore"):
                    log_f[:, L] = (log_scale + sub_f.log()).numpy()
                    log_n[:, L] = (log_scale + sigma.log()).numpy()
                gone = ~has[:, j].numpy()
                log_f[gone, L] = np.nan
                log_n[gone, L] = np.nan
                L += 1
                bar.update(1)
    if blowup is not None and blowup["excluded"]:
        rows_out = np.isin(sel.numpy(), blowup["excluded"])
        log_n[rows_out] = np.nan
        log_f[rows_out] = np.nan
    lags = np.arange(1, max_lag + 1)
    with np.errstate(over="ignore", under="ignore"):
        norms, frob = np.exp(log_n), np.exp(log_f)
    fit = (lags >= lo_fit) & (lags <= hi_fit)
    rates = np.array([_fit_rate(lags[fit], log_n[b, fit])[0] for b in range(B)])
    # mean over the samples whose norms are defined (a trajectory that blew up to NaN has none)
    known = ~np.isnan(log_n[:, fit])
    with np.errstate(invalid="ignore", divide="ignore"):
        pooled = np.where(known, log_n[:, fit], 0.0).sum(axis=0) / known.sum(axis=0)
    rate, intercept = _fit_rate(lags[fit], pooled)
    counted = int(np.isfinite(pooled).sum())
    verdict = _verdict(rate, threshold)
    notes = []
    if blowup is not None:
        if blowup["kind"] == "overflow" and verdict != "undetermined":
            # states that grow without bound to inf are exploding whatever the finite part says
            verdict = "exploding"
        notes.append(blowup["note"])
    if verdict != "undetermined" and counted < MIN_FIT_LAGS:
        notes.append(f"rate from only {counted} lag{'s' if counted != 1 else ''} (fewer than "
                     f"{MIN_FIT_LAGS}); treat it as indicative")
    if verdict == "undetermined" and counted < 2:
        notes.append(f"{counted} finite lag{'s' if counted != 1 else ''}: no rate can be fitted"
                     " (need at least 2; raise max_lag)")
    meta = dict(trace.metadata, counted_lags=counted, fit_lags=[int(lo_fit), int(hi_fit)])
    if real is not None:
        meta["ends"] = ends.tolist()  # each sample's final step (its own length)
    if notes:
        meta["verdict_note"] = "; ".join(notes)
    if blowup is not None:
        meta["non_finite"] = {k: v for k, v in blowup.items() if k != "note"}
    return GradientFlow(
        lags=readonly(lags), norms=readonly(norms), log_norms=readonly(log_n),
        frobenius=readonly(frob), log_frobenius=readonly(log_f), rate=rate, rates=readonly(rates),
        intercept=intercept, half_life=_half_life(rate), verdict=verdict,
        threshold=float(threshold), end=end, samples=readonly(sel.numpy()),
        parts=None if parts is None else tuple([parts] if isinstance(parts, str) else parts),
        metadata=frozen_mapping(meta),
    )


#: Fewer lags than this in the fit mark the rate as indicative (``metadata["verdict_note"]``).
MIN_FIT_LAGS = 20


def _finite_window(states: np.ndarray, initial: np.ndarray, x: torch.Tensor, end: int,
                   max_lag: int, lo_fit: int, hi_fit: int, samples: np.ndarray,
                   fit_given: bool) -> tuple[int, int, int, int, dict[str, Any] | None]:
    """Where the states (B, T, S) the products need are not finite: exclude or shorten.

    Samples whose states stay finite over the window are kept and the others excluded (their
    norms read NaN); when every sample blows up, ``end`` moves before the first non-finite
    state. Returns the end, max_lag and fit range to use and a description of the blow-up
    (None when every state is finite).
    """
    if not bool(torch.isfinite(x).all()):
        bt = (~torch.isfinite(x)).any(dim=2).nonzero()[0].tolist()
        raise ValueError(f"the trace's inputs contain NaN or Inf (sample {samples[bt[0]]}, step "
                         f"{bt[1]}); record the trace from finite inputs")
    lo_step = end - max_lag  # s_{end - max_lag} is the oldest state used (initial when -1)
    window = states[:, max(lo_step, 0):end + 1]  # (B, n, S)
    init_ok = lo_step >= 0 or bool(np.isfinite(initial).all())
    if init_ok and np.isfinite(window.max()) and np.isfinite(window.min()):
        return end, max_lag, lo_fit, hi_fit, None
    finite = np.isfinite(window).all(axis=2)  # (B, n)
    if lo_step < 0:
        finite = np.concatenate([np.isfinite(initial).all(axis=1)[:, None], finite], axis=1)
    first = np.where(finite.all(axis=1), finite.shape[1], np.argmin(finite, axis=1))
    t_first = first + (lo_step if lo_step < 0 else max(lo_step, 0))  # step of s_t, -1: initial
    bad = np.flatnonzero(first < finite.shape[1])
    b = int(bad[np.argmin(t_first[bad])])
    t_bad = int(t_first[b])
    row = initial[b] if t_bad < 0 else states[b, t_bad]
    kind = "overflow" if np.isinf(row).any() else "nan"
    what = "overflowed to inf" if kind == "overflow" else "became NaN"
    where = "in the initial state" if t_bad < 0 else f"at t={t_bad}"
    info: dict[str, Any] = {"kind": kind, "step": t_bad, "sample": int(samples[b]),
                            "excluded": [int(samples[i]) for i in bad]}
    if kind == "nan" and np.isinf(states[bad]).any():
        info["kind"] = kind = "overflow"  # a NaN that follows an overflow elsewhere
    if bad.size < len(samples):
        names = ", ".join(str(samples[i]) for i in bad)
        info["note"] = (f"states {what} {where}, sample {samples[b]}; "
                        f"sample{'s' if bad.size > 1 else ''} {names} excluded from the rate")
        return end, max_lag, lo_fit, hi_fit, info
    new_end = t_bad - 1
    new_max = min(max_lag, new_end + 1) if new_end >= 0 else 0
    if new_max < 1:
        raise ValueError(f"the states {what} {where} (sample {samples[b]}) before any finite "
                         "lag: gradient flow is undefined there; pass end= before the blow-up "
                         "or record with smaller inputs / weights")
    hi = min(hi_fit, new_max)
    lo = min(lo_fit, hi)
    info["end"] = new_end
    info["note"] = (f"states {what} {where}, sample {samples[b]}; the rate is fitted on the "
                    f"finite part before it (end={new_end}, lags {lo}..{hi})")
    if fit_given and (hi, lo) != (hi_fit, lo_fit):
        info["note"] += f" instead of the requested lags {lo_fit}..{hi_fit}"
    info["excluded"] = []
    return new_end, new_max, lo, hi, info



def _top_singular(P: torch.Tensor, V: torch.Tensor, ok: torch.Tensor, tol: float,
                  max_iter: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Largest singular value of each P (B, R, C), warm-started from the block V (B, C, p).

    Small matrices go straight to an SVD. Larger ones use block power iteration (subspace
    iteration on P^T P with p = 4 vectors: the top singular values of a product of step
    Jacobians often come in near-equal pairs, from complex eigenvalue pairs, which stall a
    single vector) with the Ritz value max sigma(P V) <= sigma_1; entries that do not converge
    in ``max_iter`` iterations are taken from an SVD. Entries not ``ok`` (zero or non-finite
    products) get 0 or NaN.
    """
    B = P.shape[0]
    sigma = torch.full((B,), math.nan, dtype=P.dtype)
    sigma[~ok & (torch.linalg.matrix_norm(P) == 0)] = 0.0
    idx = ok.nonzero().squeeze(1)
    if idx.numel() == 0:
        return sigma, V
    Pa = P[idx]
    if min(P.shape[1], P.shape[2]) <= _EXACT_SIZE:
        sigma[idx] = torch.linalg.matrix_norm(Pa, ord=2)
        return sigma, V
    Va = V[idx]
    last = torch.zeros(idx.numel(), dtype=P.dtype)
    done = torch.zeros(idx.numel(), dtype=torch.bool)
    for _ in range(max_iter):
        W = torch.bmm(Pa, Va)  # (n, R, p)
        s = torch.linalg.svdvals(W)[:, 0]  # Ritz value, rises to sigma_1
        Va = torch.linalg.qr(torch.bmm(Pa.mT, W))[0]
        done = (s - last).abs() <= tol * s
        last = s
        if bool(done.all()):
            break
    if not bool(done.all()):
        bad = (~done).nonzero().squeeze(1)
        last[bad] = torch.linalg.matrix_norm(Pa[bad], ord=2)
    sigma[idx] = last
    V = V.clone()
    V[idx] = Va
    return sigma, V


def _fit_rate(lags: np.ndarray, logs: np.ndarray) -> tuple[float, float]:
    """Least-squares slope and intercept of finite log norms over lags; -inf if they collapse."""
    logs = np.asarray(logs, dtype=np.float64)
    if np.any(logs == -np.inf):
        return -math.inf, math.nan
    ok = np.isfinite(logs)
    if ok.sum() == 0:
        return math.nan, math.nan
    if ok.sum() == 1:
        return math.nan, float(logs[ok][0])
    slope, icept = np.polyfit(lags[ok].astype(np.float64), logs[ok], 1)
    return float(slope), float(icept)


def _half_life(rate: float) -> float:
    if not np.isfinite(rate):
        return 0.0 if rate == -math.inf else math.nan
    return math.log(2.0) / -rate if rate < 0 else math.inf


def _verdict(rate: float, threshold: float) -> str:
    if math.isnan(rate):
        return "undetermined"
    if rate < -threshold:
        return "vanishing"
    if rate > threshold:
        return "exploding"
    return "near-isometric"


def _check_index(value: Any, upper: int, name: str, default: int, low: int = 0) -> int:
    if value is None:
        return default
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ValueError(f"{name} must be an integer in [{low}, {upper - 1}], got {value!r}")
    v = int(value)
    if name == "end" and v < 0:
        v += upper  # end=-1 is the last step
    if not low <= v < upper:
        raise ValueError(f"{name} must be an integer in [{low}, {upper - 1}], got {value!r}")
    return v


def _check_samples(samples: Any, B: int) -> torch.Tensor:
    if samples is None:
        return torch.arange(B)
    try:
        idx = np.atleast_1d(np.asarray(samples))
        ok = idx.size > 0 and np.issubdtype(idx.dtype, np.integer) and idx.ndim == 1 \
            and np.all((idx >= -B) & (idx < B))
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise ValueError(f"samples must be sample indices in [0, {B}), e.g. samples=[0, 2], got "
                         f"{samples!r}")
    idx = np.where(idx < 0, idx + B, idx).astype(np.int64)
    if np.unique(idx).size != idx.size:
        raise ValueError(f"samples must be distinct sample indices (each counted once in the "
                         f"rate), got {samples!r}")
    return torch.from_numpy(idx)


def _part_columns(trace: Any, parts: Any) -> torch.Tensor | None:
    if parts is None:
        return None
    try:
        return torch.from_numpy(trace.columns(parts))
    except KeyError as err:
        raise ValueError(str(err.args[0])) from None


def _check_fit_lags(fit_lags: Any, max_lag: int) -> tuple[int, int]:
    if fit_lags is None:
        return 1, max_lag
    try:
        lo, hi = (int(v) for v in fit_lags)
    except (TypeError, ValueError):
        lo, hi = 0, -1
    if not 1 <= lo < hi <= max_lag:
        raise ValueError(f"fit_lags must be (first, last) lags with 1 <= first < last <= "
                         f"{max_lag}, got {fit_lags!r}")
    return lo, hi


# ---------------------------------------------------------------------- loss gradients
@dataclass(frozen=True, eq=False)
class LossGradientNorms(Result):
    """Norm of the total gradient dL/dh_t of a loss at every step of a model's recurrence.

    Attributes
    ----------
    norms : ndarray of shape (B, T)
        ||dL/ds_t|| over the whole flat state (all layers, LSTM cell states included) for every
        sample and step; s_t is the state after step t.
    part_norms : Mapping[str, ndarray of shape (B, T)]
        The same restricted to each part of the state (``"layer0.h"``, ...).
    initial_norms : ndarray of shape (B,)
        ||dL/ds_0|| for the initial state.
    loss : float
        The loss value.
    loss_steps : ndarray or None
        The steps the loss reads outputs at (None: whatever ``loss_fn`` read).
    metadata : Mapping[str, Any]
        Model class and sizes.

    Notes
    -----
    The total gradient sums every path from the loss back to s_t: the direct readout at step t
    and all later steps through the recurrence (as backpropagation through time accumulates
    it). Norms depend on the loss scale and on the chosen steps; compare shapes over t, not
    absolute values between models.
    """

    norms: np.ndarray
    part_norms: Mapping[str, np.ndarray]
    initial_norms: np.ndarray
    loss: float
    loss_steps: np.ndarray | None

    def plot(self, ax: Any = None, *, sample: int | None = None, **kw: Any):
        """||dL/ds_t|| over the steps t on a log axis (median over samples, or one sample);
        grey ticks mark the steps the loss reads."""
        from .._plotting.gradient_flow import draw_loss_gradient_norms

        return draw_loss_gradient_norms(self, ax, sample=sample, **kw)

    def to_frame(self):
        """One row per (sample, step): ``norm`` and one column per part."""
        import pandas as pd

        B, T = self.norms.shape
        idx = pd.MultiIndex.from_product([range(B), range(T)], names=["sample", "step"])
        cols = {"norm": self.norms.ravel()}
        cols.update({n: v.ravel() for n, v in self.part_norms.items()})
        return pd.DataFrame(cols, index=idx)


def loss_gradient_norms(
    model: nn.Module,
    inputs: Sequences,
    loss_fn: Callable[..., torch.Tensor],
    *,
    targets: Any = None,
    steps: Any = None,
    submodule: str | None = None,
) -> LossGradientNorms:
    """Norm of the total gradient dL/ds_t of a loss at every step t of a model's recurrence.

    Parameters
    ----------
    model : nn.Module or RecurrentSystem
        The whole model (encoder, recurrent layer, readout); it holds one recurrent submodule
        (``nn.RNN``/``GRU``/``LSTM`` or a cell called once per step), or name it with
        ``submodule``. Any other recurrence (a leaky RNN, a cell or step function of your own)
        is given as a system (``hiddenlens.wrap(...)``): the loss then reads its states,
        ``loss_fn(states)`` or ``loss_fn(states, targets)`` with states (B, T, S) (restricted to
        ``states[:, steps]``); apply a readout inside ``loss_fn``. The model is called as
        ``model(inputs)``, in eval mode, with detached
        parameters; nothing of it is changed and no ``.grad`` is written.
    inputs : Tensor or ndarray
        What ``model`` takes.
    loss_fn : callable
        ``loss_fn(outputs, targets)`` (or ``loss_fn(outputs)`` without targets) returning a
        scalar tensor. ``outputs`` is the model's output (its first element if it returns a
        tuple), batch first, restricted to ``outputs[:, steps]`` when ``steps`` is given.
    targets : Tensor or ndarray, optional
        Passed to ``loss_fn``.
    steps : int, sequence of int or slice, optional
        Steps whose outputs enter the loss.
    submodule : str, optional
        Name of the recurrent submodule when the model holds several.

    Returns
    -------
    LossGradientNorms

    Notes
    -----
    The model runs once with a hook on its recurrent submodule that captures the layer's inputs
    and gives back its outputs as fresh leaves; ``torch.autograd.grad`` then yields the direct
    gradient of the loss with respect to every state the model used. The total gradient follows
    from the adjoint recurrence lambda_t = g_t + J_{t+1}^T lambda_{t+1} with the closed-form
    step Jacobians, in float64.
    """
    from .._core.guard import grad_restored, private_copy
    from .._core.record import initial_states
    from .._core.systems import RecurrentSystem, find_recurrent, wrap

    if isinstance(model, RecurrentSystem):
        return _system_loss_gradients(model, inputs, loss_fn, targets, steps)
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch nn.Module (the whole model, with its readout), "
                        f"got {type(model).__name__}")
    if not callable(loss_fn):
        raise TypeError(f"loss_fn must be callable as loss_fn(outputs, targets) -> scalar "
                        f"tensor, got {type(loss_fn).__name__}")
    module, path = find_recurrent(model, submodule)
    if isinstance(module, nn.RNNBase) and module.bidirectional:
        raise ValueError("loss_gradient_norms does not handle bidirectional recurrent layers: "
                         "the two directions run in opposite time orders; analyse a "
                         "unidirectional model")
    if not isinstance(module, (nn.RNNBase, nn.RNNCellBase)):
        raise ValueError(f"loss_gradient_norms follows nn.RNN/GRU/LSTM modules and their cells; "
                         f"{type(module).__name__} is not one of them; pass hiddenlens.wrap(model) "
                         "and a loss on its states instead")
    system = wrap(model, submodule=submodule, dtype=torch.float64)
    w_dtype = next(module.parameters()).dtype
    # the model runs as a private copy: attributes its forward assigns never reach the user's
    import copy as _copy

    model = _copy.deepcopy(model)
    module = model.get_submodule(path) if path else model
    if not isinstance(inputs, torch.Tensor):
        inputs = as_float_tensor(inputs, "inputs", w_dtype)
    is_cell = isinstance(module, nn.RNNCellBase)
    calls: list[dict[str, Any]] = []

    def hook(mod, args, kwargs, output):
        if not isinstance(output, tuple):
            leaf = output.detach().requires_grad_(True)
            calls.append({"args": args, "kwargs": kwargs, "out": (output,), "leaves": (leaf,)})
            return leaf
        if is_cell:
            leaves = tuple(o.detach().requires_grad_(True) for o in output)
            calls.append({"args": args, "kwargs": kwargs, "out": output, "leaves": leaves})
            return leaves
        seq, hn = output
        if isinstance(seq, nn.utils.rnn.PackedSequence):
            raise TypeError(
                f"the model packs its sequences before its {type(mod).__name__} "
                "(PackedSequence); loss_gradient_norms follows padded (B, T, I) tensors: run "
                "the model on sequences of one length, or give a model variant that pads")
        seq_leaf = seq.detach().requires_grad_(True)
        if isinstance(hn, tuple):
            hn_leaf = tuple(h.detach().requires_grad_(True) for h in hn)
            leaves = (seq_leaf, *hn_leaf)
        else:
            hn_leaf = hn.detach().requires_grad_(True)
            leaves = (seq_leaf, hn_leaf)
        calls.append({"args": args, "kwargs": kwargs, "out": output, "leaves": leaves})
        return seq_leaf, hn_leaf

    # the model runs as a private frozen copy (eval mode, parameters without grad): the hook
    # goes on the copy's recurrent submodule, never on the user's
    work = private_copy(model)
    work_module, _ = find_recurrent(work, submodule)
    with grad_restored(), torch.enable_grad():
        work_module.register_forward_hook(hook, with_kwargs=True)
        out = work(inputs)
        pred = out[0] if isinstance(out, (tuple, list)) else out
        if not isinstance(pred, torch.Tensor):
            raise TypeError(f"the model returned {type(pred).__name__}; loss_gradient_norms "
                            "needs a tensor output (or a tuple whose first element is one)")
        if steps is not None:
            pred = pred[:, _check_steps(steps, pred.shape[1])]
        loss = loss_fn(pred) if targets is None else loss_fn(pred, _like(targets, pred))
        if not (isinstance(loss, torch.Tensor) and loss.numel() == 1):
            raise ValueError(f"loss_fn must return a scalar tensor, got "
                             f"{getattr(loss, 'shape', type(loss).__name__)}")
        if not calls:
            raise ValueError("the model never called its recurrent submodule; check that "
                             "model(inputs) runs it")
        leaves = [leaf for c in calls for leaf in c["leaves"]]
        grads = torch.autograd.grad(loss, leaves, allow_unused=True)
    grads = [torch.zeros_like(l_) if g is None else g for l_, g in zip(leaves, grads, strict=True)]
    if is_cell:
        x, h0, g = _cell_calls(calls, grads, system, module)
    else:
        x, h0, g = _module_call(calls, grads, system, module)
    B, T, _ = x.shape
    s0 = initial_states(system, h0, B)  # (B, S) float64
    states = system.run(x, s0)  # (B, T, S)
    _check_reproduced(calls, states, system, module, is_cell)
    lam = torch.empty(B, T, system.state_size, dtype=torch.float64)
    lam[:, T - 1] = g[:, T - 1]
    prev = torch.cat([s0.unsqueeze(1), states[:, :-1]], dim=1)  # (B, T, S)
    S = system.state_size
    with torch.no_grad(), single_thread_below(2.0 * B * S * S * 4, _SMALL_STEP_FLOPS):
        for t in range(T - 1, -1, -1):
            back = linearize(system, prev[:, t], x[:, t]).vjp(lam[:, t].unsqueeze(2))[:, :, 0]
            if t > 0:
                lam[:, t - 1] = g[:, t - 1] + back
            else:
                lam0 = back
    norms = torch.linalg.vector_norm(lam, dim=2).numpy()
    part_norms = {n: readonly(torch.linalg.vector_norm(lam[:, :, sl], dim=2))
                  for n, sl in system.parts.items()}
    loss_steps = None
    if steps is not None:
        loss_steps = np.arange(T)[steps]
        loss_steps = np.atleast_1d(loss_steps)
    meta = {"model_class": type(model).__name__, "recurrent": type(module).__name__,
            "state_size": system.state_size, "batch_size": B, "n_steps": T}
    return LossGradientNorms(
        norms=readonly(norms), part_norms=frozen_mapping(part_norms),
        initial_norms=readonly(torch.linalg.vector_norm(lam0, dim=1)),
        loss=float(loss.detach()),
        loss_steps=None if loss_steps is None else readonly(loss_steps),
        metadata=frozen_mapping(meta),
    )


def _system_loss_gradients(system, inputs, loss_fn, targets, steps) -> LossGradientNorms:
    """Total gradients dL/ds_t of a loss on a system's states, by autograd through its steps."""
    from .._core.validation import as_sequences

    if not callable(loss_fn):
        raise TypeError(f"loss_fn must be callable as loss_fn(states, targets) -> scalar "
                        f"tensor, got {type(loss_fn).__name__}")
    if system.front is not None:  # the model's raw inputs, through its front end (no grad)
        from .._core.record import through_front

        inputs = through_front(system, inputs)
    x = as_sequences(inputs, system.input_size, torch.float64 if system.is_module
                     else system.dtype, what=f"the {system.source} system")  # (B, T, I)
    if system.time_reversed:
        x = x.flip(1)
    work = _float64_system(system)
    B, T, _ = x.shape
    s0 = work.zeros(B).to(x.dtype).requires_grad_(True)
    from .._core.guard import grad_restored

    with grad_restored(), torch.enable_grad():
        seq, s = [], s0
        for t in range(T):
            s = work.step(s, x[:, t])
            seq.append(s)
        states = torch.stack(seq, dim=1)  # (B, T, S)
        read = states if steps is None else states[:, _check_steps(steps, T)]
        loss = loss_fn(read) if targets is None else loss_fn(read, _like(targets, read))
        if not (isinstance(loss, torch.Tensor) and loss.numel() == 1):
            raise ValueError(f"loss_fn must return a scalar tensor, got "
                             f"{getattr(loss, 'shape', type(loss).__name__)}")
        grads = torch.autograd.grad(loss, [s0, *seq], allow_unused=True)
    grads = [torch.zeros_like(s0) if g is None else g for g in grads]
    lam = torch.stack(grads[1:], dim=1).detach().to(torch.float64)  # (B, T, S) total gradients
    loss_steps = None if steps is None else readonly(np.atleast_1d(np.arange(T)[steps]))
    meta = {"model_class": system.source, "recurrent": system.kind,
            "state_size": system.state_size, "batch_size": B, "n_steps": T}
    return LossGradientNorms(
        norms=readonly(torch.linalg.vector_norm(lam, dim=2).numpy()),
        part_norms=frozen_mapping({n: readonly(torch.linalg.vector_norm(lam[:, :, sl], dim=2))
                                   for n, sl in system.parts.items()}),
        initial_norms=readonly(torch.linalg.vector_norm(grads[0].detach(), dim=1)),
        loss=float(loss.detach()), loss_steps=loss_steps, metadata=frozen_mapping(meta),
    )


def _float64_system(system):
    """Module-backed systems compute in float64 (weight copies converted); others as they are."""
    import dataclasses

    from .._core.systems import RecurrentSystem

    if not system.is_module or system.dtype == torch.float64:
        return system
    layers = tuple(dataclasses.replace(
        layer, **{n: None if getattr(layer, n) is None else getattr(layer, n).to(torch.float64)
                  for n in ("w_ih", "w_hh", "b_ih", "b_hh", "alpha", "w_hr")})
        for layer in system.layers)
    return RecurrentSystem(
        state_size=system.state_size, input_size=system.input_size, parts=system.parts,
        dtype=torch.float64, kind=system.kind, source=system.source,
        fingerprint=system.fingerprint, layers=layers, time_reversed=system.time_reversed)


def _check_steps(steps: Any, T: int) -> Any:
    """``steps`` as an index into T output steps, refused clearly when out of range."""
    if isinstance(steps, slice):
        if not range(T)[steps]:
            raise ValueError(f"steps={steps!r} selects no step of the {T} output steps")
        return steps
    idx = np.atleast_1d(np.asarray(steps))
    if idx.size == 0 or not np.issubdtype(idx.dtype, np.integer) or idx.ndim != 1:
        raise ValueError(f"steps must be an int, a sequence of ints or a slice, got {steps!r}")
    if idx.min() < -T or idx.max() >= T:
        raise ValueError(f"steps {idx.tolist()} lie outside the model's {T} output steps "
                         f"(valid: 0 .. {T - 1}, or negative from the end)")
    return steps


def _like(targets: Any, pred: torch.Tensor) -> Any:
    if isinstance(targets, np.ndarray):
        t = torch.from_numpy(np.array(targets))
        return t.to(pred.dtype) if t.is_floating_point() else t
    return targets


def _hx(call: dict[str, Any]) -> Any:
    args, kwargs = call["args"], call["kwargs"]
    if len(args) > 1:
        return args[1]
    return kwargs.get("hx")


def _module_call(calls, grads, system, module):
    """Inputs (B, T, I), initial state, and direct gradients (B, T, S) of one module call."""
    if len(calls) != 1:
        raise ValueError(f"the model called its {type(module).__name__} {len(calls)} times; "
                         "loss_gradient_norms follows one call over the whole sequence")
    call = calls[0]
    x = call["args"][0] if call["args"] else call["kwargs"].get("input")
    if isinstance(x, nn.utils.rnn.PackedSequence):
        raise TypeError("the recurrent layer received a PackedSequence; pad the sequences and "
                        "pass a (B, T, I) tensor")
    if x.ndim != 3:
        raise ValueError(f"the recurrent layer received input of shape {tuple(x.shape)}; "
                         "loss_gradient_norms needs batched sequences (3-D input)")
    bf = module.batch_first
    x = (x if bf else x.transpose(0, 1)).detach().to(torch.float64)  # (B, T, I)
    B, T, _ = x.shape
    hx = _hx(call)
    h0 = None
    if hx is not None:
        h0 = tuple(h.detach().to(torch.float64) for h in hx) if isinstance(hx, tuple) \
            else hx.detach().to(torch.float64)
    g = torch.zeros(B, T, system.state_size, dtype=torch.float64)
    g_seq = grads[0] if bf else grads[0].transpose(0, 1)  # (B, T, H)
    top = system.layers[-1]
    g[:, :, top.h] += g_seq.to(torch.float64)
    g_h = grads[1]  # (L, B, H)
    for li, layer in enumerate(system.layers):
        g[:, T - 1, layer.h] += g_h[li].to(torch.float64)
        if layer.c is not None:
            g[:, T - 1, layer.c] += grads[2][li].to(torch.float64)
    return x, h0, g


def _cell_calls(calls, grads, system, module):
    """Inputs, initial state and direct gradients of a cell called once per step."""
    layer = system.layers[0]
    per = len(calls[0]["leaves"])
    xs, g = [], []
    for t, call in enumerate(calls):
        x = call["args"][0] if call["args"] else call["kwargs"].get("input")
        if x.ndim != 2:
            raise ValueError(f"the {type(module).__name__} received input of shape "
                             f"{tuple(x.shape)}; loss_gradient_norms needs batched steps "
                             "(B, I)")
        if t > 0:
            hx = _hx(call)
            prev = calls[t - 1]["leaves"]
            same = hx is prev[0] if per == 1 else (
                isinstance(hx, tuple) and hx[0] is prev[0] and hx[1] is prev[1])
            if not same:
                raise ValueError(
                    f"call {t} of the {type(module).__name__} did not take the state returned "
                    f"by call {t - 1}; loss_gradient_norms follows one chain of calls (feed "
                    "each step's output state into the next call)")
        xs.append(x.detach().to(torch.float64))
        gg = torch.zeros(x.shape[0], system.state_size, dtype=torch.float64)
        gg[:, layer.h] = grads[t * per].to(torch.float64)
        if per == 2:
            gg[:, layer.c] = grads[t * per + 1].to(torch.float64)
        g.append(gg)
    hx = _hx(calls[0])
    h0 = None
    if hx is not None:
        h0 = tuple(h.detach().to(torch.float64) for h in hx) if isinstance(hx, tuple) \
            else hx.detach().to(torch.float64)
    return torch.stack(xs, dim=1), h0, torch.stack(g, dim=1)


def _check_reproduced(calls, states, system, module, is_cell):
    """The recomputed trajectory must match what the model's own layer returned."""
    top = system.layers[-1]
    if is_cell:
        seen = torch.stack([c["out"][0].detach() for c in calls], dim=1)
    else:
        seq = calls[0]["out"][0].detach()
        seen = seq if module.batch_first else seq.transpose(0, 1)
    ours = states[:, :, top.h]
    err = (ours - seen.to(torch.float64)).abs().max().item()
    if not err <= 1e-4 * (1.0 + seen.abs().max().item()):
        raise ValueError(
            f"the states of the {type(module).__name__} could not be reproduced from its "
            f"captured inputs (max difference {err:.3g}); loss_gradient_norms supports layers "
            "called plainly on a (B, T, I) tensor (or a cell chained step by step)")

