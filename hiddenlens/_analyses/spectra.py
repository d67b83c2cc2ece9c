"""Singular values and spectral radius of the step Jacobians along a trace, chunked over time."""

from __future__ import annotations

import math
import numbers
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

from .._core.jacobians import (
    StepLinearization,
    check_chunk,
    linearize,
    system_for_trace,
    trace_tensors,
)
from .._core.options import analysis, check_options, int_seed, progress_bar
from .._core.results import Result, frozen_mapping, readonly
from .._core.threads import parallel_map, single_thread, usable_cores
from .._core.validation import as_dtype

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import ModelLike
    from .._core.trace import Trace

__all__ = ["JacobianSpectra", "jacobian_spectra", "top_singular_values"]

METHODS = ("auto", "svd", "gram", "krylov")
DEFAULT_QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)
# elements of step Jacobians (or Krylov bases) held at once: 32 MiB in float64
_CHUNK_ELEMENTS = 1 << 22
# "auto" uses block Krylov (no Jacobian formed) from this state size on, where one float64
# Jacobian takes 128 MiB; below it the single-precision Gram route is faster (benchmarks/)
_KRYLOV_MIN_STATE = 4096
# NOTE: [Eigenvalue error model of the Gram route]
# The eigenvalues of the Gram matrix G = J^T J formed and decomposed in precision eps are taken
# to be within c * sqrt(S) * eps * sigma_1^2 of sigma_i^2 (rounding of the S-term inner products
# grows like sqrt(S) eps in practice, Higham & Mary 2019; the symmetric eigensolver is backward
# stable, Golub & Van Loan section 8.3). A value is accepted when the interval of square roots
# this allows is within tol * sigma_i; steps whose top k fail are redone in float64, then by SVD.
# c = 16 leaves a margin of two orders of magnitude over the errors measured against float64
# SVD (tests/test_spectra.py, benchmarks/bench_spectra.py). When J itself is written in the
# same precision (the default float32 pass), each entry carries at most a few roundings of its
# gate terms, ||dJ|| <= 4 sqrt(S) eps sigma_1 (Frobenius bound; common practice), which moves
# sigma_i^2 by at most 2 ||dJ|| sigma_1 + ||dJ||^2 (Weyl's inequality): 8 more in c.
_GRAM_ERROR = 16.0
_FORM_ERROR = 8.0
# below this state size every per-chunk operation (elementwise gate terms, batched products,
# LAPACK) runs on one torch thread: on a shared 2-core machine a second thread waiting for a
# busy core turned each of them into milliseconds (benchmarks/bench_spectra.py). The cores are
# used instead by independent chunks on worker threads (NOTE: [Independent batches on worker
# threads] in _threads.py).
_THREADS_FROM_STATE = 2048
# chunks handed to each worker at least, so that a worker slowed by a busy core takes fewer
_PIECES_PER_WORKER = 4
# elements of Jacobians in a chunk at least when chunks are split for the workers: 1 MiB in
# float32, tens of microseconds of Python per chunk against milliseconds of work
_LEAST_ELEMENTS = 1 << 18
_EPS = {torch.float32: 2.0**-24, torch.float64: 2.0**-53}


@dataclass(frozen=True, eq=False)
class JacobianSpectra(Result):
    """Top singular values (and spectral radius) of every step Jacobian J_t = d s_t / d s_{t-1}.

    Attributes
    ----------
    singular_values : ndarray of shape (B, T, k)
        The k largest singular values of J_t for every sample and step, descending.
    spectral_radius : ndarray of shape (B, T) or None
        max |eigenvalue| of J_t, exact (one batched eigenvalue call); None when not asked for
        (see ``radius`` in :func:`jacobian_spectra`).
    quantile_levels : ndarray of shape (Q,)
    quantiles : ndarray of shape (Q, k)
        Quantiles of each singular-value index over all samples and steps.
    median : ndarray of shape (k,)
        Median of each index over all samples and steps.
    radius_quantiles : ndarray of shape (Q,) or None
        Quantiles of the spectral radius over samples and steps.
    method : str
        The algorithm used: "svd", "gram" or "krylov".
    state_size : int
        S; ``k == S`` means the whole spectrum.
    tol : float
        Relative accuracy requested of the "gram" and "krylov" methods.
    metadata : Mapping[str, Any]
        The trace's metadata.
    radius_bounds : ndarray of shape (B, T, 2) or None
        Bounds on the spectral radius at no extra cost, when the exact value was not asked for:
        column 0 the lower bound (prod sigma_i)^(1/S) = |det J_t|^(1/S) when all S values were
        computed, NaN otherwise; column 1 the upper bound sigma_1. These are bounds, not
        estimates: the radius lies between them (up to ``tol``, the accuracy of the sigma_i
        they are made from).
    excluded : ndarray of shape (n, 2)
        (sample, step) of every step left out because its state or Jacobian is not finite
        (NaN or Inf); their rows are NaN and the summaries are over the other steps.

    Notes
    -----
    J_t is taken along the recorded trajectory: the spectra describe the dynamics on these
    inputs, not the network everywhere. Singular values above 1 stretch some directions of a
    perturbation in one step; the spectral radius governs repeated application of the same J
    only, so neither alone predicts long-run growth (see :func:`hiddenlens.gradient_flow` and
    :func:`hiddenlens.lyapunov_spectrum`).
    """

    singular_values: np.ndarray
    spectral_radius: np.ndarray | None
    quantile_levels: np.ndarray
    quantiles: np.ndarray
    median: np.ndarray
    radius_quantiles: np.ndarray | None
    method: str
    state_size: int
    tol: float
    radius_bounds: np.ndarray | None = None
    excluded: np.ndarray = field(default_factory=lambda: readonly(np.zeros((0, 2), np.int64)))

    @property
    def k(self) -> int:
        """The number of singular values kept per step."""
        return int(self.singular_values.shape[2])

    def plot(self, ax: Any = None, *, sample: int | None = None, max_lines: int | None = None,
             **kw: Any):
        """Singular values over time on a log axis (median over samples, or one ``sample``).

        All ``k`` indices are drawn (or the first ``max_lines``, and the title then says how
        many of ``k``), coloured from the largest (dark) to the smallest; the spectral radius,
        when computed, is the dashed black line; the dotted line marks 1, where a step neither
        stretches nor shrinks.
        """
        from .._plotting.spectra import draw_spectra

        return draw_spectra(self, ax, sample=sample, max_lines=max_lines, **kw)

    def to_frame(self):
        """One row per (sample, step): columns ``sigma_1`` ... ``sigma_k`` (and the radius)."""
        import pandas as pd

        B, T, k = self.singular_values.shape
        idx = pd.MultiIndex.from_product([range(B), range(T)], names=["sample", "step"])
        df = pd.DataFrame(self.singular_values.reshape(B * T, k), index=idx,
                          columns=[f"sigma_{i + 1}" for i in range(k)])
        if self.spectral_radius is not None:
            df["spectral_radius"] = self.spectral_radius.reshape(B * T)
        return df

    def __repr__(self) -> str:
        B, T, k = self.singular_values.shape
        gone = ""
        if len(self.excluded):
            b, t = self.excluded[0]
            gone = (f", {len(self.excluded)} of {B * T} steps excluded as non-finite (first: "
                    f"sample {b}, step {t})")
        return (f"JacobianSpectra(B={B}, T={T}, k={k} of S={self.state_size}, "
                f"method={self.method!r}, median sigma_1={self.median[0]:.4g}{gone})")


@analysis("jacobian_spectra")
def jacobian_spectra(
    system: ModelLike,
    trace: Trace,
    k: int | None = None,
    *,
    method: str = "auto",
    radius: bool | None = None,
    quantiles: Sequence[float] = DEFAULT_QUANTILES,
    tol: float = 1e-3,
    dtype: Any = torch.float64,
    chunk: int | None = None,
    seed: int = 0,
    progress: bool | Callable[[int, int, str], Any] | None = None,
    threads: int | None = None,
) -> JacobianSpectra:
    """Singular values of the step Jacobians J_t = d s_t / d s_{t-1} along a recorded trace.

    Parameters
    ----------
    system : RecurrentSystem, nn.Module or callable
        The system that produced ``trace`` (a model is wrapped in the trace's precision).
    trace : Trace
        States (B, T, S); J at step 0 is taken at ``trace.initial``.
    k : int, optional
        How many of the largest singular values to keep per step (default: all S).
    method : {"auto", "svd", "gram", "krylov"}, default "auto"
        ``"gram"``: eigenvalues of J_t^T J_t (one batched product, one batched symmetric
        eigenvalue call) with J_t and its Gram matrix written in float32; each value is
        accepted only if the rounding-error model of the float32 pass keeps it within ``tol``
        of the true one, otherwise the step is redone from float64 Jacobians, and by SVD if
        that fails too (small singular values of a
        rank-deficient J take this last route). ``"svd"``: ``torch.linalg.svdvals`` in
        float64. ``"krylov"``: block Krylov iteration on J^T J through Jacobian-vector
        products, never forming J (light on memory; slower than "gram" unless S is in the
        thousands, as the top singular values of recurrent Jacobians often sit at the edge of a
        continuous bulk). ``"auto"``: "krylov" for top k from S = 4096 on, else "gram".
    radius : bool, optional
        ``True``: the exact spectral radius (max |eigenvalue|) of each J_t, one batched
        eigenvalue call per chunk (about 3x the cost of the singular values).
        ``None`` (default): only the free bounds in ``radius_bounds`` (sigma_1 above,
        |det J_t|^(1/S) below when all values are computed). ``False``: neither.
    quantiles : sequence of float, default (0.05, 0.25, 0.5, 0.75, 0.95)
        Levels of the summaries over samples and steps.
    tol : float, default 1e-3
        Relative accuracy of every reported singular value (against the full SVD): 1e-3 is
        what a diagnosis needs (lines on a log plot, medians, comparisons against 1). For
        more, pass a smaller ``tol`` (e.g. 1e-10: the "gram" route then works in float64 and
        falls back to SVD where it cannot vouch for a value) or ``method="svd"`` (float64 SVD
        of every step, accurate to rounding). For "krylov" the iteration stops once the top k
        move by less than ``tol`` (relative to max(sigma_i, 1e-3 sigma_1)).
    dtype : torch.float64 or torch.float32, default float64
        Working precision of the Jacobians and decompositions.
    chunk : int, optional
        Time steps per batch (all samples at once); by default sized to ~32 MiB of Jacobians.
        The B*T*S*S Jacobians are never held at once.
    seed : int, default 0
        Seed of the random start block of the Krylov method.
    progress : bool, optional
        Show a progress bar over the chunks, with the time left (default: for long runs).
    threads : int, optional
        Cores to use. Below 2048 units the chunks of a module-backed system run on this many
        worker threads, each with one torch thread (default: the cores this process may run
        on; the caller's own thread count is not changed); ``threads=1`` runs them in the
        calling thread. From 2048 units, and for step functions, chunks run one after the
        other in the calling thread.

    Returns
    -------
    JacobianSpectra
        Steps whose state or Jacobian is not finite are listed in ``excluded`` (with a
        RuntimeWarning naming the first sample and step); their rows are NaN.

    Notes
    -----
    The singular values of J_t bound how much one step can stretch (sigma_1) or shrink
    (sigma_S) a perturbation of the state; their logarithms over many steps relate to the
    Lyapunov exponents (Oseledets). See ``docs/jacobians.md``.
    """
    check_options("jacobian_spectra", locals())
    seed = int_seed(seed)  # a numpy Generator gives one draw; local generators from here
    system = system_for_trace(system, trace)
    prev, x = trace_tensors(system, trace)  # (B, T, S), (B, T, I)
    B, T, S = prev.shape
    I = x.shape[2]
    k = _check_k(k, S)
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(map(repr, METHODS))}, got "
                         f"{method!r}")
    work = as_dtype(dtype)
    levels = _check_quantiles(quantiles)
    if isinstance(tol, bool) or not (isinstance(tol, numbers.Real) and 0 < tol < 1):
        raise ValueError(f"tol must be a number in (0, 1), got {tol!r}")
    chunk = check_chunk(chunk)
    if method == "auto":
        method = "krylov" if (S >= _KRYLOV_MIN_STATE and k < S) else "gram"
    want_radius = bool(radius)  # None: bounds only (free), True: exact, False: neither
    want_bounds = radius is None
    # the default first pass writes J and its Gram matrix in float32 when float32 can reach
    # tol (NOTE: [Eigenvalue error model of the Gram route]); failing steps get float64
    form = work
    if method == "gram" and not want_radius and _slack(torch.float32, S) / 2 <= tol:
        form = torch.float32
    workers = _workers(system, S, threads)
    if chunk is None:
        chunk = _default_chunk(method, want_radius, B, T, S, k, workers)
    from .._core.record import valid_steps

    real = valid_steps(trace)  # (B, T) or None: padded steps are left out (NaN rows)
    real_t = None if real is None else torch.from_numpy(real)

    sv_out = np.empty((B, T, k), dtype=np.float64)
    rad_out = np.empty((B, T), dtype=np.float64) if want_radius else None
    low_out = np.full((B, T), np.nan) if want_bounds else None
    finite = np.ones((B, T), dtype=bool)
    starts = range(0, T, chunk)
    show = progress if progress is not None else (len(starts) > 10 and B * T * S * S > 1 << 28)

    def one_chunk(t0: int) -> None:
        t1 = min(T, t0 + chunk)
        n = t1 - t0
        p = prev[:, t0:t1].reshape(B * n, S)  # (B n, S)
        u = x[:, t0:t1].reshape(B * n, I)  # (B n, I)

        def exact(index: torch.Tensor) -> torch.Tensor:
            """float64 Jacobians of the steps ``index`` of this chunk, for the fallbacks."""
            return linearize(system, p[index], u[index], dtype=torch.float64).dense()

        # each chunk draws its Krylov start from its own generator: the same values whichever
        # worker runs it, in whatever order
        gen = torch.Generator().manual_seed((int(seed) + 1_000_003 * t0) % (1 << 63))
        with torch.no_grad():
            lin = linearize(system, p, u, dtype=form)
            sv, rad, low, ok = _chunk_spectra(
                lin, k, method, tol, gen, want_radius, work, want_bounds and k == S, exact,
                None if real_t is None else real_t[:, t0:t1].reshape(B * n))
        sv_out[:, t0:t1] = sv.reshape(B, n, k).numpy()
        finite[:, t0:t1] = ok.reshape(B, n).numpy()
        if rad_out is not None:
            rad_out[:, t0:t1] = rad.reshape(B, n).numpy()
        if low is not None:
            low_out[:, t0:t1] = low.reshape(B, n).numpy()

    with progress_bar(progress, total=len(starts), label="spectra", auto=bool(show)) as bar:
        _run_chunks(one_chunk, starts, workers, bar, S)
    excluded = np.argwhere(~finite)  # (n, 2): sample, step
    _warn_excluded(excluded, B * T)
    q = _nanquantile(sv_out.reshape(B * T, k), levels)  # (Q, k)
    med = _nanquantile(sv_out.reshape(B * T, k), np.array([0.5]))[0]
    rq = None if rad_out is None else _nanquantile(rad_out.reshape(B * T, 1), levels)[:, 0]
    bounds = None if low_out is None else np.stack([low_out, sv_out[:, :, 0]], axis=-1)
    return JacobianSpectra(
        singular_values=readonly(sv_out), spectral_radius=None if rad_out is None
        else readonly(rad_out), quantile_levels=readonly(levels), quantiles=readonly(q),
        median=readonly(med), radius_quantiles=None if rq is None else readonly(rq),
        method=method, state_size=S, tol=float(tol),
        metadata=frozen_mapping({**trace.metadata, **_padding_note(real)}),
        radius_bounds=None if bounds is None else readonly(bounds),
        excluded=readonly(excluded.astype(np.int64)),
    )


def _workers(system, S: int, threads: int | None) -> int:
    """Threads that compute the chunks."""
    # closed forms are thread-safe; a user's step function is never run on two threads at once
    if system.layers and S < _THREADS_FROM_STATE:
        return threads if threads is not None else usable_cores()
    return 1


def _default_chunk(method: str, want_radius: bool, B: int, T: int, S: int, k: int,
                   workers: int) -> int:
    """Steps per chunk when none was given."""
    per_state = S * S if (method != "krylov" or want_radius) else S * min(S, 8 * k + 64)
    chunk = max(1, _CHUNK_ELEMENTS // max(per_state * B, 1))
    if workers > 1:  # enough chunks for every worker, none so small that overhead rules
        least = max(1, _LEAST_ELEMENTS // max(per_state * B, 1))
        chunk = max(least, min(chunk, -(-T // (_PIECES_PER_WORKER * workers))))
    return chunk


def _run_chunks(one_chunk: Callable[[int], None], starts: range, workers: int, bar: Any,
                S: int) -> None:
    if workers > 1:
        parallel_map(one_chunk, starts, workers, done=lambda i: bar.update(1))
    else:
        # one torch thread for states below _THREADS_FROM_STATE: see _dense_top
        with single_thread(S < _THREADS_FROM_STATE):
            for t0 in starts:
                one_chunk(t0)
                bar.update(1)


def _warn_excluded(excluded: np.ndarray, n_steps: int) -> None:
    """Warn (at the caller of jacobian_spectra) about the excluded (sample, step) pairs."""
    if len(excluded):
        b0, s0 = excluded[0]
        warnings.warn(
            f"jacobian_spectra: {len(excluded)} of {n_steps} steps have non-finite states or "
            f"Jacobians (first at sample {b0}, step {s0}); their singular values are NaN and "
            "the quantiles and median are over the remaining steps (see result.excluded)",
            RuntimeWarning, stacklevel=3)


def _padding_note(real: np.ndarray | None) -> dict[str, Any]:
    return {} if real is None else {"padded_steps": int((~real).sum())}


def _slack(prec: torch.dtype, S: int) -> float:
    """Absolute error bound on every Gram eigenvalue, relative to sigma_1^2 (see the NOTE)."""
    return (_GRAM_ERROR + _FORM_ERROR) * math.sqrt(S) * _EPS[prec]


def _chunk_spectra(lin: StepLinearization, k: int, method: str, tol: float,
                   gen: torch.Generator, want_radius: bool, work: torch.dtype,
                   want_low: bool, exact: Callable[[torch.Tensor], torch.Tensor] | None = None,
                   real: torch.Tensor | None = None):
    """Top-k singular values (N, k), exact radii (N,) or None, the lower radius bound (N,) or
    None, and the finite mask (N,) of one chunk; NaN where the trajectory is not finite and on
    padded steps (``real`` False: not computed, and not counted as non-finite).

    ``exact(index)`` gives float64 Jacobians of some steps when ``lin`` is in float32 (the
    fallback of the Gram route)."""
    N, S = lin.new_state.shape
    ok = torch.isfinite(lin.new_state).all(1)
    J = None
    if method != "krylov" or want_radius:
        J = _dense_jacobians(lin, work, exact, ok)  # (N, S, S)
    if real is not None:
        ok |= ~real  # a padded step is never reported as non-finite
    sv = torch.full((N, k), float("nan"), dtype=torch.float64)
    rad = torch.full((N,), float("nan"), dtype=torch.float64) if want_radius else None
    low = torch.full((N,), float("nan"), dtype=torch.float64) if want_low else None
    idx = (ok if real is None else ok & real).nonzero().squeeze(1)
    if idx.numel() == 0:
        return sv, rad, low, ok
    full = idx.numel() == N
    if J is not None and not full:
        J = J[idx]
    if method == "krylov":
        sub = top_singular_values(lin if full else lin.select(idx), k, tol=tol, generator=gen)
    else:
        sub = _dense_top(J, k, method, tol, _exact_rows(exact, J, idx))
    sv[idx] = sub.to(torch.float64)
    if low is not None:
        # |det J| = prod sigma_i = prod |lambda_i| <= rho^S
        low[idx] = torch.log(sub.to(torch.float64)).mean(1).exp()
    if rad is not None:
        with single_thread():  # one batched LAPACK call of small matrices: see _dense_top
            rad[idx] = torch.linalg.eigvals(J).abs().amax(-1).to(torch.float64)
    return sv, rad, low, ok


def _dense_jacobians(lin: StepLinearization, work: torch.dtype,
                     exact: Callable[[torch.Tensor], torch.Tensor] | None,
                     ok: torch.Tensor) -> torch.Tensor:
    """Dense Jacobians (N, S, S) of one chunk; clears ``ok`` (N,) in place where they are not
    finite."""
    J = lin.dense()
    if J.dtype != torch.float32 or exact is None:
        J = J.to(work)  # (N, S, S)
    # a sum is NaN or Inf whenever a term is (and overflows only past 1e300 per entry):
    # the full elementwise test runs on those steps only
    sus = (~torch.isfinite(J.sum((1, 2)))).nonzero().squeeze(1)
    if sus.numel():
        ok[sus] &= torch.isfinite(J[sus]).all(2).all(1)
    return J


def _exact_rows(exact: Callable[[torch.Tensor], torch.Tensor] | None, J: torch.Tensor,
                idx: torch.Tensor) -> Callable[[torch.Tensor], torch.Tensor] | None:
    """float64 Jacobians of rows of the computed steps ``idx``, when J is in float32."""
    if exact is None or J.dtype != torch.float32:
        return None

    def high(rows: torch.Tensor) -> torch.Tensor:
        return exact(idx[rows])
    return high


# ---------------------------------------------------------------------- dense top-k
def _dense_top(J: torch.Tensor, k: int, method: str, tol: float,
               high: Callable[[torch.Tensor], torch.Tensor] | None = None) -> torch.Tensor:
    """Top-k singular values of dense J (N, S, S), descending: (N, k), float64.

    ``"svd"``: ``torch.linalg.svdvals`` in float64. ``"gram"``: eigenvalues of J^T J in float32,
    accepted value by value under the error model of NOTE: [Eigenvalue error model of the Gram
    route]; steps that fail are redone in float64, and those that fail again by SVD. When J is
    float32, ``high(rows)`` gives those steps' Jacobians in float64 for the fallbacks.

    Batched LAPACK calls on small matrices run on one torch thread (measured on a shared
    2-core machine: two threads were 1.1-2x slower when idle and up to 40x under load).
    """
    N, S, _ = J.shape

    def in64(rows: torch.Tensor) -> torch.Tensor:
        if high is not None:
            return high(rows).to(torch.float64)  # a generic step function may answer in float32
        return (J if rows.numel() == N else J[rows]).to(torch.float64)

    if method == "svd":
        with single_thread():
            return torch.linalg.svdvals(in64(torch.arange(N)))[:, :k]
    out = torch.empty(N, k, dtype=torch.float64)
    todo = torch.arange(N)
    for prec in (torch.float32, torch.float64):
        slack = _slack(prec, S)
        if todo.numel() == 0 or slack / 2 > tol:
            continue  # this precision cannot reach tol even for sigma_1
        if prec == torch.float64:
            Jp = in64(todo)
        else:
            Jp = (J if todo.numel() == N else J[todo]).to(prec)
        with single_thread():
            lam = torch.linalg.eigvalsh(torch.bmm(Jp.mT, Jp))  # (n, S) ascending
        lam = lam.flip(-1)[:, :k].to(torch.float64)  # (n, k)
        err = slack * lam[:, :1].clamp_min(0)  # absolute bound on every eigenvalue
        sig = lam.clamp_min(0).sqrt()
        width = (lam + err).sqrt() - (lam - err).clamp_min(0).sqrt()
        good = (width <= tol * sig).all(1)
        out[todo[good]] = sig[good]
        todo = todo[~good]
    if todo.numel():
        with single_thread():
            out[todo] = torch.linalg.svdvals(in64(todo))[:, :k]
    return out


# ---------------------------------------------------------------------- block Krylov
class _Dense:
    """A dense batch of matrices seen as a linear operator (for tests and small systems)."""

    def __init__(self, J: torch.Tensor) -> None:
        self.J = J
        self.dtype = J.dtype

    def jvp(self, V: torch.Tensor) -> torch.Tensor:
        return torch.bmm(self.J, V)

    def vjp(self, W: torch.Tensor) -> torch.Tensor:
        return torch.bmm(self.J.mT, W)

    def select(self, index: torch.Tensor) -> _Dense:
        return _Dense(self.J[index])


def top_singular_values(op: StepLinearization | torch.Tensor, k: int, *, tol: float = 1e-5,
                        generator: torch.Generator | None = None,
                        block: int | None = None) -> torch.Tensor:
    """The k largest singular values of N operators by block Krylov iteration: (N, k).

    Parameters
    ----------
    op : StepLinearization or Tensor of shape (N, S, S)
        Anything with ``jvp(V)`` / ``vjp(W)`` on (N, S, p) blocks and ``select(index)``;
        a dense tensor is wrapped.
    k : int
    tol : float
        Stop once the top-k Ritz values change by less than ``tol`` (relative to
        max(sigma_i, 1e-3 sigma_1)) and an extrapolation of their remaining change agrees.
    generator : torch.Generator, optional
        Source of the random start block.
    block : int, optional
        Block size (default max(k + 2, 8)).

    Notes
    -----
    NOTE: [Top-k singular values by block Krylov]
    The Krylov space of A = J^T J grown from a random block Q_0,
    span{Q_0, A Q_0, A^2 Q_0, ...}, is orthonormalised block by block (two passes of classical
    Gram-Schmidt, then QR). Each new block Q_j is mapped once, Z_j = J Q_j, and the projected
    matrix M = (J K)^T (J K) = K^T A K is extended with the new rows Z_j^T [Z_0 ... Z_j]; its
    eigenvalues are the squared Ritz singular values, which rise monotonically to the true
    ones as the space grows (Cauchy interlacing). Operators whose values have converged leave
    the batch; at dimension S the space is complete and the values exact. Cost per block: one
    J and one J^T product of p vectors, plus O(S m p) for the orthogonalisation.
    Reference: Golub & Van Loan, Matrix Computations (4th ed.), sections 10.1 and 10.3.
    """
    if isinstance(op, torch.Tensor):
        op = _Dense(op)
    N = op.new_state.shape[0] if hasattr(op, "new_state") else op.J.shape[0]
    S = op.new_state.shape[1] if hasattr(op, "new_state") else op.J.shape[1]
    dtype = op.dtype
    p = min(S, block or max(k + 2, 8))
    out = torch.empty(N, k, dtype=dtype)
    active = torch.arange(N)
    Q = torch.linalg.qr(torch.randn(N, S, p, generator=generator, dtype=dtype))[0]
    Z = op.jvp(Q)
    Qs, Zs = [Q], [Z]
    M = Z.mT @ Z  # (n, m, m)
    last = last_delta = None
    check_at = 0
    while True:
        m = M.shape[-1]
        if m < min(S, check_at):
            # Ritz values cost O(m^3) per operator: look at them on a geometric schedule
            Qs, Zs, M = _extend(op, Qs, Zs, M, p, S)
            continue
        check_at = m + max(p, m // 4)
        theta = torch.linalg.eigvalsh(M).flip(-1)[:, :k].clamp_min(0).sqrt()  # (n, k)
        done = torch.full((theta.shape[0],), m >= S)
        if last is not None and m < S:
            scale = torch.maximum(theta, 1e-3 * theta[:, :1]).clamp_min(1e-300)
            delta = ((theta - last).abs() / scale).amax(1)  # (n,)
            if last_delta is None:
                rho = torch.full_like(delta, 0.5)
            else:
                rho = (delta / last_delta.clamp_min(1e-300)).clamp(0.0, 0.9)
            done = (delta <= tol) & (delta * rho / (1 - rho) <= tol)
            last_delta = delta
        last = theta
        if bool(done.any()):
            out[active[done]] = theta[done]
            keep = (~done).nonzero().squeeze(1)
            if keep.numel() == 0:
                return out
            active = active[keep]
            op = op.select(keep)
            Qs = [q[keep] for q in Qs]
            Zs = [z[keep] for z in Zs]
            M, last = M[keep], last[keep]
            if last_delta is not None:
                last_delta = last_delta[keep]
        Qs, Zs, M = _extend(op, Qs, Zs, M, p, S)


def _extend(op, Qs, Zs, M, p, S):
    """Grow the Krylov basis by one block: A Q_last orthogonalised against the whole basis."""
    m = M.shape[-1]
    K = torch.cat(Qs, dim=2)  # (n, S, m)
    Y = op.vjp(Zs[-1])[:, :, : min(p, S - m)]
    scale = torch.linalg.vector_norm(Y, dim=1).amax(1)  # (n,)
    for _ in range(2):
        Y = Y - K @ (K.mT @ Y)
    Q, R = torch.linalg.qr(Y)
    if bool((R.diagonal(dim1=1, dim2=2).abs().amin(1) <= 1e-8 * scale).any()):
        # the new directions are (nearly) dependent, e.g. J has low rank and the space is
        # (nearly) invariant: QR then fills Q with rounding noise that is not orthogonal to
        # K; two more passes make it so (any orthonormal extension keeps Rayleigh-Ritz valid)
        for _ in range(2):
            Q = Q - K @ (K.mT @ Q)
        Q = torch.linalg.qr(Q)[0]
    Z = op.jvp(Q)
    C = torch.cat(Zs, dim=2).mT @ Z  # (n, m, p)
    M = torch.cat([torch.cat([M, C], dim=2), torch.cat([C.mT, Z.mT @ Z], dim=2)], dim=1)
    return Qs + [Q], Zs + [Z], M


# ---------------------------------------------------------------------- checks and summaries
def _check_k(k: Any, S: int) -> int:
    if k is None:
        return S
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 1 <= k <= S:
        raise ValueError(f"k must be an integer in [1, {S}] (the state size) or None for all "
                         f"singular values, got {k!r}")
    return int(k)


def _check_quantiles(quantiles: Any) -> np.ndarray:
    try:
        q = np.asarray(quantiles, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        q = np.array([np.nan])
    if q.size == 0 or not np.all((q >= 0) & (q <= 1)):
        raise ValueError(f"quantiles must be levels in [0, 1], e.g. (0.05, 0.5, 0.95), got "
                         f"{quantiles!r}")
    return q


def _nanquantile(a: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """Quantiles over axis 0 ignoring NaN; all-NaN columns give NaN without a warning."""
    out = np.full((levels.size, a.shape[1]), np.nan)
    rows = ~np.isnan(a).any(axis=1)
    if rows.all() or not np.isnan(a[rows]).any():
        # NaN only in whole rows (excluded steps): numpy's vectorised quantile on the rest
        if rows.any():
            out[:] = np.quantile(a[rows] if not rows.all() else a, levels, axis=0)
        return out
    ok = ~np.isnan(a).all(axis=0)
    if ok.any():
        out[:, ok] = np.nanquantile(a[:, ok], levels, axis=0)
    return out
