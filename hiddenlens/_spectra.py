"""Singular values and spectral radius of the step Jacobians along a trace, chunked over time."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

from ._jacobians import (
    StepLinearization,
    _trace_tensors,
    check_chunk,
    linearize,
    system_for_trace,
)
from ._options import analysis, check_options, int_seed, progress_bar
from ._results import Result, frozen_mapping, readonly
from ._validation import as_dtype

__all__ = ["JacobianSpectra", "jacobian_spectra", "top_singular_values"]

METHODS = ("auto", "svd", "gram", "krylov")
DEFAULT_QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)
# elements of step Jacobians (or Krylov bases) held at once: 32 MiB in float64
_CHUNK_ELEMENTS = 1 << 22
# "auto" uses block Krylov (no Jacobian formed) from this state size on, where one float64
# Jacobian takes 128 MiB; below it the single-precision Gram route is faster (benchmarks/)
_KRYLOV_MIN_STATE = 4096


@dataclass(frozen=True, eq=False)
class JacobianSpectra(Result):
    """Top singular values (and spectral radius) of every step Jacobian J_t = d s_t / d s_{t-1}.

    Attributes
    ----------
    singular_values : ndarray of shape (B, T, k)
        The k largest singular values of J_t for every sample and step, descending.
    spectral_radius : ndarray of shape (B, T) or None
        max |eigenvalue| of J_t; None when not computed (see ``radius`` in
        :func:`jacobian_spectra`).
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

    @property
    def k(self) -> int:
        """The number of singular values kept per step."""
        return int(self.singular_values.shape[2])

    def plot(self, ax: Any = None, *, sample: int | None = None, max_lines: int = 10,
             **kw: Any):
        """Singular values over time on a log axis (median over samples, or one ``sample``).

        The first ``max_lines`` indices are drawn, coloured from the largest (dark) to the
        smallest; the spectral radius, when computed, is the dashed black line; the dotted line
        marks 1, where a step neither stretches nor shrinks.
        """
        from ._plotting import get_axes, time_colors

        ax = get_axes(ax)
        sv = self.singular_values  # (B, T, k)
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
        if self.spectral_radius is not None:
            rad = self.spectral_radius
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
        ax.set_title(f"{self.metadata.get('model_class', 'system')}: Jacobian spectra ({label})")
        ax.legend(fontsize="small", loc="best")
        return ax

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
        return (f"JacobianSpectra(B={B}, T={T}, k={k} of S={self.state_size}, "
                f"method={self.method!r}, median sigma_1={self.median[0]:.4g})")


@analysis("jacobian_spectra")
def jacobian_spectra(
    system: Any,
    trace: Any,
    k: int | None = None,
    *,
    method: str = "auto",
    radius: bool | None = None,
    quantiles: Sequence[float] = DEFAULT_QUANTILES,
    tol: float = 1e-5,
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
        ``"svd"``: ``torch.linalg.svdvals`` of each J_t. ``"gram"``: top eigenvectors of
        J_t^T J_t in single precision for a subspace of ~2k directions, then the singular values
        of J_t on it in the working precision, each checked by its residual against ``tol``
        (steps that fail are redone by SVD). ``"krylov"``: block Krylov iteration on J^T J
        through Jacobian-vector products, never forming J; converged to ``tol`` (light on
        memory, but slower than "gram" unless S is in the thousands, as the top singular
        values of recurrent Jacobians often sit at the edge of a continuous bulk). ``"auto"``:
        "svd" for the whole spectrum, "krylov" from S = 4096 on, else "gram".
    radius : bool, optional
        Also compute the spectral radius (max |eigenvalue|) of each J_t. Non-symmetric
        eigenvalues cost several SVDs each; default: only when ``k`` is None.
    quantiles : sequence of float, default (0.05, 0.25, 0.5, 0.75, 0.95)
        Levels of the summaries over samples and steps.
    tol : float, default 1e-5
        Relative accuracy of the top-k singular values for the "gram" and "krylov" methods
        (measured against max(sigma_i, 1e-3 sigma_1)).
    dtype : torch.float64 or torch.float32, default float64
        Working precision of the Jacobians and decompositions.
    chunk : int, optional
        Time steps per batch (all samples at once); by default sized to ~32 MiB of Jacobians.
        The B*T*S*S Jacobians are never held at once.
    seed : int, default 0
        Seed of the random start block of the Krylov method.
    progress : bool, optional
        Show a progress bar (default: for long runs).

    Returns
    -------
    JacobianSpectra

    Notes
    -----
    The singular values of J_t bound how much one step can stretch (sigma_1) or shrink
    (sigma_S) a perturbation of the state; their logarithms over many steps relate to the
    Lyapunov exponents (Oseledets). See ``docs/jacobians.md``.
    """
    check_options("jacobian_spectra", locals())
    seed = int_seed(seed)  # a numpy Generator gives one draw; local generators from here
    system = system_for_trace(system, trace)
    prev, x = _trace_tensors(system, trace)  # (B, T, S), (B, T, I)
    B, T, S = prev.shape
    I = x.shape[2]
    k = _check_k(k, S)
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(map(repr, METHODS))}, got "
                         f"{method!r}")
    work = as_dtype(dtype)
    levels = _check_quantiles(quantiles)
    if not (isinstance(tol, (int, float)) and 0 < tol < 1):
        raise ValueError(f"tol must be a number in (0, 1), got {tol!r}")
    chunk = check_chunk(chunk)
    if method == "auto":
        if k == S:
            method = "svd"
        elif S >= _KRYLOV_MIN_STATE:
            method = "krylov"
        else:
            method = "gram"
    want_radius = (k == S) if radius is None else bool(radius)
    if chunk is None:
        per_state = S * S if (method != "krylov" or want_radius) else S * min(S, 8 * k + 64)
        chunk = max(1, _CHUNK_ELEMENTS // max(per_state * B, 1))
    gen = torch.Generator().manual_seed(int(seed))

    sv_out = np.empty((B, T, k), dtype=np.float64)
    rad_out = np.empty((B, T), dtype=np.float64) if want_radius else None
    starts = range(0, T, chunk)
    show = progress if progress is not None else (len(starts) > 10 and B * T * S * S > 1 << 28)

    with torch.no_grad():
        for t0 in progress_bar(progress, iterable=starts, total=len(starts),
                              label="spectra", auto=bool(show)):
            t1 = min(T, t0 + chunk)
            n = t1 - t0
            lin = linearize(system, prev[:, t0:t1].reshape(B * n, S),
                            x[:, t0:t1].reshape(B * n, I), dtype=work)
            sv, rad = _chunk_spectra(lin, k, method, tol, gen, want_radius, work)
            sv_out[:, t0:t1] = sv.reshape(B, n, k).numpy()
            if rad_out is not None:
                rad_out[:, t0:t1] = rad.reshape(B, n).numpy()
    q = _nanquantile(sv_out.reshape(B * T, k), levels)  # (Q, k)
    med = _nanquantile(sv_out.reshape(B * T, k), np.array([0.5]))[0]
    rq = None if rad_out is None else _nanquantile(rad_out.reshape(B * T, 1), levels)[:, 0]
    return JacobianSpectra(
        singular_values=readonly(sv_out), spectral_radius=None if rad_out is None
        else readonly(rad_out), quantile_levels=readonly(levels), quantiles=readonly(q),
        median=readonly(med), radius_quantiles=None if rq is None else readonly(rq),
        method=method, state_size=S, tol=float(tol), metadata=frozen_mapping(trace.metadata),
    )


def _chunk_spectra(lin: StepLinearization, k: int, method: str, tol: float,
                   gen: torch.Generator, want_radius: bool, work: torch.dtype):
    """Top-k singular values (N, k) and radii (N,) or None of one chunk, NaN where the
    trajectory is not finite."""
    N = lin.new_state.shape[0]
    ok = torch.isfinite(lin.new_state).all(1)
    J = None
    if method != "krylov" or want_radius:
        J = lin.dense().to(work)  # (N, S, S)
        ok &= torch.isfinite(J).all(2).all(1)
    sv = torch.full((N, k), float("nan"), dtype=torch.float64)
    rad = torch.full((N,), float("nan"), dtype=torch.float64) if want_radius else None
    idx = ok.nonzero().squeeze(1)
    if idx.numel() == 0:
        return sv, rad
    full = idx.numel() == N
    if J is not None and not full:
        J = J[idx]
    if method == "krylov":
        sub = top_singular_values(lin if full else lin.select(idx), k, tol=tol, generator=gen)
    else:
        sub = _dense_top(J, k, method, tol)
    sv[idx] = sub.to(torch.float64)
    if rad is not None:
        rad[idx] = torch.linalg.eigvals(J).abs().amax(-1).to(torch.float64)
    return sv, rad


# ---------------------------------------------------------------------- dense top-k
def _dense_top(J: torch.Tensor, k: int, method: str, tol: float) -> torch.Tensor:
    """Top-k singular values of dense J (N, S, S), descending: (N, k)."""
    N, S, _ = J.shape
    if method == "svd" or k == S or S < 32:
        return torch.linalg.svdvals(J)[:, :k]
    import scipy.linalg
    from threadpoolctl import threadpool_limits

    # NOTE: [Top-k singular values from a single-precision Gram matrix]
    # The top r = k + max(5, k) eigenvectors of J^T J, computed in float32 with LAPACK's
    # MRRR driver for a subset of the spectrum (tridiagonalisation plus r vectors, not the
    # bidiagonal SVD), span a subspace close to the top right singular vectors: angle
    # ~ eps32 / relative gap. The Rayleigh-Ritz values of J on that subspace, in the working
    # precision, err by the square of that angle. Each Ritz triplet (sigma, u, y), J y = sigma u,
    # is checked by its residual ||J^T u - sigma y|| (a singular value lies within it); steps
    # whose residuals exceed tol * sigma are redone by full SVD.
    r = min(S, k + max(5, k))
    J32 = J.to(torch.float32)
    G = torch.bmm(J32.mT, J32).numpy()  # (N, S, S)
    V = np.empty((N, S, r), dtype=np.float32)

    def solve(indices: range) -> None:
        for i in indices:
            V[i] = scipy.linalg.eigh(G[i], subset_by_index=[S - r, S - 1], driver="evr",
                                     check_finite=False, overwrite_a=True)[1]

    # one LAPACK call per matrix, single-threaded BLAS inside (threads only add contention on
    # a matrix this size); torch's thread count of them run side by side (LAPACK releases the
    # GIL)
    workers = max(1, min(torch.get_num_threads(), N))
    with threadpool_limits(limits=1, user_api="blas"):
        if workers == 1:
            solve(range(N))
        else:
            with ThreadPoolExecutor(workers) as pool:
                list(pool.map(solve, [range(w, N, workers) for w in range(workers)]))
    V = torch.linalg.qr(torch.from_numpy(V).to(J.dtype))[0]  # (N, S, r)
    U, sig, Wt = torch.linalg.svd(torch.bmm(J, V), full_matrices=False)
    U, sig = U[:, :, :k], sig[:, :k]  # (N, S, k), (N, k)
    Y = torch.bmm(V, Wt.mT[:, :, :k])  # right Ritz vectors (N, S, k)
    res = torch.linalg.vector_norm(torch.bmm(J.mT, U) - Y * sig.unsqueeze(1), dim=1)  # (N, k)
    scale = torch.maximum(sig, 1e-3 * sig[:, :1])
    bad = ~((res <= tol * scale).all(1))
    if bool(bad.any()):
        sig[bad] = torch.linalg.svdvals(J[bad])[:, :k]
    return sig


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
    ok = ~np.isnan(a).all(axis=0)
    if ok.any():
        out[:, ok] = np.nanquantile(a[:, ok], levels, axis=0)
    return out
