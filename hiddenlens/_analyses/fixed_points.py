"""Fixed and slow points of a recurrent map under a constant input, and their linear stability."""

from __future__ import annotations

import dataclasses
import math
import numbers
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

from .._core.guard import grad_restored
from .._core.jacobians import step_jacobians
from .._core.options import analysis, check_options, int_seed, progress_bar, renamed
from .._core.record import as_system
from .._core.results import Result, frozen_mapping, readonly
from .._core.stepcheck import step_errors
from .._core.systems import RecurrentSystem, refuse_random_steps
from .._core.threads import single_thread
from .._core.trace import Trace, unit_names
from .._core.validation import as_float_tensor, check_finite, describe

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import ModelLike

__all__ = ["FixedPoints", "find_fixed_points", "STABILITY_CLASSES"]

STABILITY_CLASSES = ("stable", "saddle", "unstable", "marginal")

# largest state size searched on one torch thread (see benchmarks/bench_fixed_points.py)
_ONE_THREAD_UP_TO = 512


@dataclass(frozen=True, eq=False)
class FixedPoints(Result):
    """Fixed and slow points of ``s = F(s, x*)`` found by minimising ``q(s)``, with their stability.

    Points are ordered by ``q``, smallest first.

    Attributes
    ----------
    points : ndarray of shape (n, S)
        Distinct end points of the search where ``q(s) = ½‖F(s, x*) − s‖²`` is at most
        ``slow_tol``.
    q : ndarray of shape (n,)
        ``q`` at each point (``sqrt(2 q)`` is the distance the state moves in one step there).
    is_fixed : ndarray of shape (n,), bool
        ``q < tol``: a fixed point; otherwise a slow point, where the state still drifts at speed
        ``sqrt(2 q)`` per step.
    converged : ndarray of shape (n,), bool
        The search stopped at a fixed point or at a local minimum of q. False: it ran out of
        iterations while q was still falling slowly, so the point lies in a slow valley (often
        near a continuum of nearly fixed, marginal states) rather than at an isolated minimum.
    eigenvalues : ndarray of shape (n, S), complex
        Eigenvalues of the step Jacobian ``dF/ds`` at each point, largest modulus first.
    stability : ndarray of shape (n,), str
        "marginal" when any eigenvalue has ``| |λ| − 1 | <= marginal_tol`` (this takes
        precedence); otherwise "stable" (all ``|λ| < 1``), "unstable" (all ``|λ| > 1``) or
        "saddle" (some of each).
    unstable_directions : tuple of n ndarrays of shape (m_i, S)
        Unit vectors spanning the expanding directions (``|λ| > 1 + marginal_tol``) at each point:
        the eigenvector of a real eigenvalue, or the real and imaginary parts of the eigenvector
        of a complex pair (the plane the state spirals out in).
    support : ndarray of shape (n,), int
        How many starts ended at each point.
    final_q : ndarray of shape (n_starts,)
        ``q`` reached from every start, kept or not (a histogram shows how clear-cut the minima
        are).
    x : ndarray of shape (I,)
        The constant input x*.
    n_starts : int
    n_discarded : int
        Starts that ended with ``q > slow_tol``, in no point above.
    n_unconverged : int
        Starts whose q was still falling, above ``tol``, after ``max_iter`` steps (kept as slow
        points when ``q <= slow_tol``; raise ``max_iter`` to follow them further).
    tol, slow_tol, marginal_tol, distance_tol : float
        The thresholds used.
    parts : Mapping[str, slice]
        Part layout of the state.
    source : str
        What the system was made from.
    trace : Trace or None
        The trace the starts were sampled from; ``.plot()`` draws on its PCA axes by default.
    distance_to_states : ndarray of shape (n,) or None
        With a trace: each point's Euclidean distance to the nearest recorded state.
    outside : ndarray of shape (n,), bool, or None
        With a trace: the point lies outside the box of the recorded states (widened by 10% of
        each unit's range), a region the network's own trajectories do not reach. Such points
        stay in the result but are left out of the slow set and of the registry's counts.
    settled : ndarray of shape (n,), bool
        The start stopped on the speed rule (``slow_margin``): a slow point on a slow direction.
    slow_margin : float
    in_slow_set : ndarray of shape (n,), bool
        Points of the slow set: inside the recorded region, with an eigenvalue modulus within
        ``max(marginal_tol, slow_margin)`` of 1.
    slow_set_dimension : int
        Components of the slow set's PCA needed for 95% of its spread (0: isolated points; fewer
        than 3 members, or a spread along no slow direction, also give 0).
    slow_set_explained : ndarray of shape (k,)
        Fraction of the slow set's spread on each principal component.
    slow_set_coordinate : ndarray of shape (n,)
        Each point's coordinate along the first principal component of the slow set (NaN
        when the slow set has dimension 0).
    slow_set_order : ndarray of shape (m,), int
        Indices of the slow set's members ordered along that coordinate.
    tangent_eigenvalue : float
        Median over members of ``|λ|`` closest to 1 among the eigenvalues of the Jacobian
        restricted to the slow set's tangent (``Tᵀ J T``, T its top principal directions).
    summary : str
        One plain-words line, e.g. "approximate line attractor: 150 slow points along one
        direction, |λ| 0.999".

    Notes
    -----
    Fixed points belong to the constant input x* chosen: another input gives another map and
    other points. Slow points are not fixed points: the state still drifts there, only slowly.
    The points found depend on the starting states: a point that no trajectory comes near is
    not found, and its absence is no proof that it does not exist. The linearisation describes
    the dynamics only close to each point.
    """

    points: np.ndarray
    q: np.ndarray
    is_fixed: np.ndarray
    converged: np.ndarray
    eigenvalues: np.ndarray
    stability: np.ndarray
    unstable_directions: tuple[np.ndarray, ...]
    support: np.ndarray
    final_q: np.ndarray
    x: np.ndarray
    n_starts: int
    n_discarded: int
    n_unconverged: int
    tol: float
    slow_tol: float
    marginal_tol: float
    distance_tol: float
    parts: Mapping[str, slice]
    source: str
    trace: Any = None
    distance_to_states: np.ndarray | None = None
    outside: np.ndarray | None = None
    settled: np.ndarray | None = None
    slow_margin: float = 0.0
    in_slow_set: np.ndarray | None = None
    slow_set_dimension: int = 0
    slow_set_explained: np.ndarray | None = None
    slow_set_coordinate: np.ndarray | None = None
    slow_set_order: np.ndarray | None = None
    tangent_eigenvalue: float = math.nan
    summary: str = ""

    # ------------------------------------------------------------------ summaries
    def __len__(self) -> int:
        return self.points.shape[0]

    @property
    def counts(self) -> dict[str, int]:
        """Number of points in each stability class (all four classes, zeros included)."""
        return {c: int(np.sum(self.stability == c)) for c in STABILITY_CLASSES}

    @property
    def n_fixed(self) -> int:
        """Number of points with ``q < tol``."""
        return int(self.is_fixed.sum())

    @property
    def n_slow(self) -> int:
        """Number of slow points (``tol <= q <= slow_tol``)."""
        return len(self) - self.n_fixed

    @property
    def spectral_radius(self) -> np.ndarray:
        """Largest eigenvalue modulus at each point, shape (n,)."""
        if self.eigenvalues.shape[1] == 0:
            return np.zeros(len(self))
        return np.abs(self.eigenvalues[:, 0])

    def to_frame(self):
        """One row per point: q, kind, stability, expanding directions, support and coordinates.

        Also whether each point lies outside the recorded states, belongs to the slow set and
        its coordinate along it; ``frame.attrs["summary"]`` holds :attr:`summary`.
        """
        import pandas as pd

        names = unit_names(self.parts, self.points.shape[1])
        frame = pd.DataFrame({
            "q": self.q,
            "speed": np.sqrt(2 * self.q),
            "kind": np.where(self.is_fixed, "fixed", "slow"),
            "converged": self.converged,
            "stability": self.stability,
            "n_unstable": [d.shape[0] for d in self.unstable_directions],
            "spectral_radius": self.spectral_radius,
            "support": self.support,
        })
        m = len(self)
        frame["outside"] = self.outside if self.outside is not None else np.zeros(m, bool)
        frame["in_slow_set"] = (self.in_slow_set if self.in_slow_set is not None
                                else np.zeros(m, bool))
        frame["along_slow_set"] = (self.slow_set_coordinate if self.slow_set_coordinate
                                   is not None else np.full(m, np.nan))
        coords = pd.DataFrame(self.points, columns=names)
        out = pd.concat([frame, coords], axis=1)
        out.index.name = "point"
        out.attrs["summary"] = self.summary
        out.attrs["slow_set_dimension"] = self.slow_set_dimension
        return out

    def __repr__(self) -> str:
        counts = ", ".join(f"{k}={v}" for k, v in self.counts.items())
        return (f"FixedPoints(n={len(self)}, fixed={self.n_fixed}, slow={self.n_slow}, {counts}, "
                f"starts={self.n_starts}, discarded={self.n_discarded}, "
                f"unconverged={self.n_unconverged}, slow_set_dimension="
                f"{self.slow_set_dimension}; {self.summary})")

    # ------------------------------------------------------------------ plot
    def plot(self, ax: Any = None, *, pca: Any = None, dims: int = 2,
             show_trajectories: bool = True, direction_length: float | None = None,
             show_slow: bool = True):
        """Draw the points on the PCA axes of a trace, with their unstable directions.

        Parameters
        ----------
        ax : matplotlib Axes, optional
            Where to draw (3-D axes for ``dims=3``); a new figure by default.
        pca : PCATrajectories or Trace, optional
            The axes: a result of :func:`hiddenlens.pca_trajectories`, or a trace to fit one on.
            By default the trace the search started from (S > 3), or the raw state coordinates
            (S <= 3).
        dims : {2, 3}
        show_trajectories : bool, default True
            Draw the PCA's trajectories faintly behind the points.
        direction_length : float, optional
            Half-length, in state units, of the segments along unstable directions (default:
            a tenth of the extent of the drawn data).
        show_slow : bool, default True
            Also draw slow points (faded).

        Returns
        -------
        matplotlib Axes
        """
        from .._plotting.pca import check_dims
        from .pca import PCATrajectories, pca_trajectories

        S = self.points.shape[1]
        if pca is None and S > 3 and self.trace is not None:
            pca = self.trace
        if isinstance(pca, Trace):
            pca = pca_trajectories(pca, k=dims)
        if pca is None:
            if S > 3:
                raise ValueError(
                    f"the state has {S} units; choose the axes to draw on with "
                    "pca=hiddenlens.pca_trajectories(trace) or pca=trace"
                )
            dims = int(dims) if dims in (2, 3) else check_dims(dims, 3)
            names = unit_names(self.parts, S)
            labels = [names[i] if i < S else "(none)" for i in range(dims)]

            def coords(a: np.ndarray) -> np.ndarray:  # (m, S) -> (m, dims)
                return np.pad(a, ((0, 0), (0, dims - S)))[:, :dims]

            along = coords
            background = None
        else:
            if not isinstance(pca, PCATrajectories):
                raise TypeError(f"pca must be a PCATrajectories result or a Trace, got "
                                f"{type(pca).__name__}")
            if pca.state_size != S:
                raise ValueError(f"pca was fitted on states of size {pca.state_size} but the "
                                 f"points have {S} units; fit it on a trace of this system")
            dims = check_dims(dims, pca.n_components)
            labels = [pca.axis_label(i) for i in range(dims)]

            def coords(a: np.ndarray) -> np.ndarray:
                return pca.project(a)[:, :dims]

            def along(v: np.ndarray) -> np.ndarray:  # directions: no centring
                return v[:, pca.columns] @ pca.components[:dims].T

            background = pca.projected[:, :, :dims] if show_trajectories else None
        from .._plotting.fixed_points import draw_fixed_points

        return draw_fixed_points(self, ax, coords=coords, along=along, labels=labels, dims=dims,
                                 background=background, direction_length=direction_length,
                                 show_slow=show_slow)


@analysis("find_fixed_points")
def find_fixed_points(
    model_or_system: ModelLike,
    trace: Trace | None,
    x: Any = None,
    *,
    n_starts: int | None = None,
    starts: Any = None,
    noise: float = 0.0,
    fixed_tol: float | None = None,
    slow_tol: float = 1e-5,
    max_iter: int | None = None,
    distance_tol: float = 1e-3,
    marginal_tol: float = 1e-3,
    slow_margin: float = 0.05,
    dtype: Any = None,
    seed: int = 0,
    progress: bool | Callable[[int, int, str], Any] | None = None,
    threads: int | None = None,
    tol: float | None = None,
    **wrap_options: Any,
) -> FixedPoints:
    """Find fixed and slow points of ``s = F(s, x*)`` under a constant input and classify them.

    Minimises ``q(s) = ½‖F(s, x*) − s‖²`` (Sussillo & Barak 2013) from many starting states at
    once. Each start takes damped Gauss–Newton (Levenberg–Marquardt) steps
    ``δ = −(AᵀA + μI)⁻¹ Aᵀ r`` with ``r = F(s, x*) − s`` and ``A = dF/ds − I``; far from a
    minimum this is a short gradient step on ``q``, close to a fixed point a Newton step, so
    fixed points converge quadratically and slow points (minima with ``q > 0``) are still found.
    Starts that end at the same point (within ``distance_tol``) are merged, and the Jacobian at
    each point gives its eigenvalues and stability.

    Parameters
    ----------
    model_or_system : RecurrentSystem, nn.Module or callable
        Anything :func:`hiddenlens.wrap` accepts (wrapped with ``wrap_options``), or a system.
    trace : Trace or None
        Recorded states of this system; starts are sampled from its states (all samples and
        steps). None only when ``starts`` is given.
    x : array_like of shape (I,), "mean" or ("mean", t0, t1), optional
        The constant input x*; zeros by default. "mean": the trace's inputs averaged over all
        samples and steps; ``("mean", t0, t1)``: averaged over steps ``t0 <= t < t1`` (a task
        period, e.g. a delay), all samples.
    n_starts : int, optional
        Number of starting states sampled from the trace (without replacement when it has as
        many states). Default 256 up to S = 128 states, then 256 * 128 / S (at least 16): one
        iteration costs ~n_starts * S^3, so the default search stays within minutes at S = 1024.
    starts : array_like of shape (n_starts, S), optional
        Explicit starting states instead of samples from the trace.
    noise : float, default 0.0
        Standard deviation of Gaussian noise added to the sampled starts (state units).
    fixed_tol : float, optional
        Points with ``q < fixed_tol`` are fixed points; default 1e-12 when computing in float64
        and 1e-9 in float32. (Called ``tol`` in 0.1; ``tol=`` still works for one release with
        a DeprecationWarning. In hiddenlens ``tol`` names solver convergence tolerances.)
    slow_tol : float, default 1e-5
        End points with ``tol <= q <= slow_tol`` are kept as slow points; starts that end higher
        are discarded. q is in squared state units: scale it with the size of the states.
    max_iter : int, optional
        Most optimisation steps per start (default 100, 50 from S = 512 on). Isolated fixed
        points take about ten; starts in a slow valley may use them all (see
        ``FixedPoints.converged``).
    distance_tol : float, default 1e-3
        Points closer than this (Euclidean, state units) are merged.
    marginal_tol : float, default 1e-3
        Eigenvalues with ``| |λ| − 1 | <= marginal_tol`` make a point "marginal".
    slow_margin : float, default 0.05
        Stopping on speed, per start: a start that is already a slow point (``q <= slow_tol``)
        stops where it is once its next step would be longer than ``speed / slow_margin``,
        i.e. once it moves along a direction where ``|1 − λ| < slow_margin``. This keeps the
        points of a slow manifold (a line attractor) spread along it instead of sliding them
        all to one end. 0 turns it off: every start is followed to a fixed point or a minimum
        of q (an isolated but very slow fixed point is then polished, a slow manifold
        collapses).
    dtype : torch dtype, optional
        Precision of the search. Default float64 for systems made from nn modules (a float64
        copy of the weights) and the system's own dtype for step functions.
    seed : int, default 0
        Seed of the local generator that samples the starts and the noise.
    progress : bool, optional
        Show a progress bar; by default it appears only when the search takes a few seconds.

    Returns
    -------
    FixedPoints

    Notes
    -----
    The stability classes read the eigenvalues of the step Jacobian at each point: a
    discrete-time map contracts along directions with ``|λ| < 1`` and expands along those with
    ``|λ| > 1``. "marginal" takes precedence: a point with any ``|λ|`` within ``marginal_tol``
    of 1 is marginal (e.g. a point on a line attractor), whatever its other eigenvalues.

    Fixed points depend on the constant input chosen; slow points are not fixed points; the
    points found depend on the starts (a point the trace never comes near may be missed).

    References
    ----------
    Sussillo & Barak (2013), "Opening the black box: low-dimensional dynamics in
    high-dimensional recurrent neural networks", Neural Computation 25(3), 626-649.
    """
    check_options("find_fixed_points", locals())
    tol = renamed("find_fixed_points", "tol", "fixed_tol", tol, fixed_tol)
    seed = int_seed(seed)  # a numpy Generator gives one draw; local generators from here
    system = as_system(model_or_system, **wrap_options)
    work, dt = _working_system(system, dtype)
    S, I = system.state_size, system.input_size
    if n_starts is None:
        n_starts = 256 if S <= 128 else max(16, 256 * 128 // S)
    if max_iter is None:
        max_iter = 100 if S < 512 else 50
    x_star = _constant_input(_mean_input(x, trace, I), I, dt)  # (I,)
    s0 = _starts(trace, starts, system, n_starts, noise, seed, dt)  # (n_starts, S)
    n = s0.shape[0]
    _check_options(max_iter=max_iter, slow_tol=slow_tol, distance_tol=distance_tol,
                   marginal_tol=marginal_tol, tol=tol, slow_margin=slow_margin)
    tol = float(tol) if tol is not None else (1e-12 if dt == torch.float64 else 1e-9)
    # batched S x S solves of small states: one torch thread (two were 5.4x slower on a
    # shared 2-core machine at S = 128; benchmarks/bench_fixed_points.py)
    refuse_random_steps(system, s0[:1], x_star[None])  # before any step draws
    with grad_restored(), step_errors(system), single_thread(S <= _ONE_THREAD_UP_TO):
        s, q, converged, settled = _minimise(
            work, s0, x_star.expand(n, I), tol=tol, max_iter=max_iter, progress=progress,
            slow_tol=float(slow_tol), slow_margin=float(slow_margin))
        kept = ((q < tol) | (q <= slow_tol)).nonzero().squeeze(1)
        reps, support = _merge(s[kept], q[kept], distance_tol)
        P = s[kept][reps]  # (m, S)
        if P.shape[0]:
            # the search returns float64 points: give the step its own precision back, and
            # keep a module step function's trainable parameters out of the Jacobians' graph
            with torch.no_grad():
                J = step_jacobians(work, P.to(dt), x_star.expand(P.shape[0], I))
            J = J.detach().to(torch.float64)
        else:
            J = torch.zeros(0, S, S, dtype=torch.float64)
    eig, directions, stability = _linearise(J, marginal_tol)
    q_kept = q[kept][reps]
    reach = _reach(P, trace)
    slow_set = _slow_set(P.numpy(), J.numpy(), q_kept.numpy() < tol, reach.get("outside"),
                         float(distance_tol), n, int(n - kept.numel()), float(slow_tol),
                         float(marginal_tol), float(slow_margin))
    return FixedPoints(
        points=readonly(P, np.float64),
        q=readonly(q_kept, np.float64),
        is_fixed=readonly(q_kept < tol),
        converged=readonly(converged[kept][reps] | (q_kept < tol)),
        settled=readonly(settled[kept][reps] & (q_kept >= tol)),
        eigenvalues=readonly(eig),
        stability=readonly(np.array(stability, dtype="<U8")),
        unstable_directions=tuple(readonly(d) for d in directions),
        support=readonly(support, np.int64),
        final_q=readonly(q, np.float64),
        x=readonly(x_star, np.float64),
        n_starts=n,
        n_discarded=int(n - kept.numel()),
        n_unconverged=int((~converged & (q >= tol)).sum()),
        tol=tol,
        slow_tol=float(slow_tol),
        marginal_tol=float(marginal_tol),
        distance_tol=float(distance_tol),
        parts=frozen_mapping(system.parts),
        source=system.source,
        trace=trace,
        slow_margin=float(slow_margin),
        **reach,
        **slow_set,
        metadata={"summary": slow_set["summary"],
                  "slow_set_dimension": slow_set["slow_set_dimension"]},
    )


_NUMBER_WORDS = {1: "one direction", 2: "two directions", 3: "three directions"}
_SHAPES = {1: "line attractor", 2: "plane attractor"}


def _slow_set(P: np.ndarray, J: np.ndarray, fixed: np.ndarray, outside: Any,
              distance_tol: float, n_starts: int, n_discarded: int, slow_tol: float,
              marginal_tol: float, slow_margin: float) -> dict[str, Any]:
    """The slow set's PCA dimension, ordering, tangent eigenvalue and its plain-words line.

    Members: points inside the recorded region with some ``|λ|`` within
    ``max(marginal_tol, slow_margin)`` of 1. Dimension: principal components for 95% of the
    members' spread (0 with fewer than 3 members, a spread under 3 distance_tol, or a tangent
    whose eigenvalue is not within that margin of 1: isolated points then)."""
    m, S = P.shape
    out_mask = np.zeros(m, bool) if outside is None else np.asarray(outside, bool)
    margin = max(marginal_tol, slow_margin)
    if m:
        mod = np.abs(np.linalg.eigvals(J)) if S else np.zeros((m, 0))
        near = np.any(np.abs(mod - 1) <= margin, axis=1) if S else np.zeros(m, bool)
    else:
        near = np.zeros(0, bool)
    member = near & ~out_mask
    k = int(member.sum())
    dim, explained, coord, order, lam = 0, np.zeros(0), np.full(m, np.nan), np.zeros(0, int), \
        math.nan
    if k >= 3:
        X = P[member]
        mean = X.mean(axis=0)
        _, sv, Vt = np.linalg.svd(X - mean, full_matrices=False)
        var = sv**2
        total = float(var.sum())
        if total > 0 and math.sqrt(total / k) > 3 * distance_tol:
            explained = var / total
            d = int(np.searchsorted(np.cumsum(explained), 0.95) + 1)
            T = Vt[:d].T  # (S, d)
            lam_t = float(np.median(_tangent_moduli(J[member], T)))
            if abs(lam_t - 1) <= margin:
                dim, lam = d, lam_t
                coord = (P - mean) @ Vt[0]
                idx = np.nonzero(member)[0]
                order = idx[np.argsort(coord[idx], kind="stable")]
    n_out = int(out_mask.sum())
    if m == 0:
        words = (f"no point found: all {n_starts} starts ended with q above slow_tol="
                 f"{slow_tol:g} (raise slow_tol or max_iter, or start elsewhere)"
                 if n_discarded == n_starts else "no point found")
    elif dim == 0:
        inside = m - n_out
        nf = int((fixed & ~out_mask).sum())
        words = (f"{inside} isolated point{'s' if inside != 1 else ''} ({nf} fixed, "
                 f"{inside - nf} slow)")
    else:
        all_fixed = bool(fixed[member].all())
        shape = _SHAPES.get(dim, f"slow manifold of dimension {dim}")
        noun = "fixed points" if all_fixed else "slow points"
        words = (f"{'' if all_fixed else 'approximate '}{shape}: {k} {noun} along "
                 f"{_NUMBER_WORDS.get(dim, f'{dim} directions')}, |λ| {lam:.3f}")
    if n_out:
        words += f"; {n_out} outside the recorded states (not counted)"
    return {"in_slow_set": readonly(member), "slow_set_dimension": dim,
            "slow_set_explained": readonly(explained, np.float64),
            "slow_set_coordinate": readonly(coord, np.float64),
            "slow_set_order": readonly(order, np.int64), "tangent_eigenvalue": lam,
            "summary": words}


def _tangent_moduli(J: np.ndarray, T: np.ndarray) -> np.ndarray:
    """Per point, the |λ| closest to 1 among the d eigenvalues of J whose eigenvectors lie
    most in the tangent span of T (S, d): (k,).

    Eigenvectors rather than the restriction Tᵀ J T, whose eigenvalues differ from J's when J
    is not normal (a trained net's Jacobian: the Rayleigh quotient along a line attractor's
    tangent read 1.10 where its eigenvalue was 1.03)."""
    d = T.shape[1]
    w, v = np.linalg.eig(J)  # (k, S), (k, S, S) columns unit-norm
    along = np.linalg.norm(np.einsum("sd,msj->mdj", T, v), axis=1)  # (k, S) in [0, 1]
    top = np.argsort(-along, axis=1)[:, :d]  # (k, d)
    mod = np.abs(np.take_along_axis(w, top, axis=1))  # (k, d)
    return np.take_along_axis(mod, np.argmin(np.abs(mod - 1), axis=1)[:, None], 1)[:, 0]


def _mean_input(x: Any, trace: Any, I: int) -> Any:
    """``x`` itself, or the trace's mean input for "mean" / ("mean", t0, t1)."""
    is_mean = isinstance(x, str) or (isinstance(x, tuple) and len(x) > 0
                                     and isinstance(x[0], str))
    if not is_mean:
        return x
    how = "x must be an input vector of shape (I,), \"mean\" or (\"mean\", t0, t1)"
    if (x if isinstance(x, str) else x[0]) != "mean" or (isinstance(x, tuple) and len(x) != 3):
        raise ValueError(f"{how}, got {x!r}")
    if not isinstance(trace, Trace):
        raise TypeError(f"x={x!r} averages the inputs of a trace; pass the Trace the inputs "
                        f"were recorded in, got {type(trace).__name__}")
    T = trace.inputs.shape[1]
    t0, t1 = (0, T) if isinstance(x, str) else x[1:]
    if any(isinstance(t, bool) or not isinstance(t, (int, np.integer)) for t in (t0, t1)) \
            or not 0 <= t0 < t1 <= T:
        raise ValueError(f"{how} with integer steps 0 <= t0 < t1 <= {T} (the trace's length), "
                         f"got {x!r}")
    window = np.asarray(trace.inputs[:, t0:t1], dtype=np.float64)  # (B, t1-t0, I)
    real = _real_rows(trace)
    if real is not None:  # the mean over real steps only
        inside = real.reshape(trace.batch_size, -1)[:, t0:t1]  # (B, t1-t0)
        if not inside.any():
            raise ValueError(f"x={x!r}: every step of that window is padding (see the trace's "
                             "lengths); pass a window inside the sequences")
        return window[inside].mean(axis=0)
    return window.reshape(-1, window.shape[2]).mean(axis=0)


def _real_rows(trace: Any) -> np.ndarray | None:
    """(B*T,) True on the real (not padded) steps of a trace recorded with lengths, or None."""
    from .._core.record import valid_steps

    real = valid_steps(trace) if isinstance(trace, Trace) else None
    return None if real is None else real.reshape(-1)


def _reach(P: torch.Tensor, trace: Any) -> dict[str, Any]:
    """Each point's Euclidean distance to the nearest recorded state, and whether it lies
    outside the box of the recorded states (widened by 10% of each unit's range): a point the
    network's own trajectories cannot reach says little about them."""
    if trace is None or not hasattr(trace, "states"):
        return {}
    X = np.asarray(trace.states, dtype=np.float64).reshape(-1, trace.state_size)  # (B*T, S)
    real = _real_rows(trace)
    if real is not None:
        X = X[real]  # (N, S) the real steps
    pts = np.asarray(P.detach().cpu().numpy(), dtype=np.float64)  # (m, S)
    if pts.shape[0] == 0 or X.shape[1] != pts.shape[1]:
        return {}
    lo, hi = X.min(axis=0), X.max(axis=0)
    pad = 0.1 * (hi - lo)
    outside = np.any((pts < lo - pad) | (pts > hi + pad), axis=1)
    dist = np.empty(pts.shape[0])
    for i in range(0, pts.shape[0], 256):  # chunks of (256, B*T) distances
        chunk = pts[i:i + 256]
        d2 = (chunk**2).sum(1)[:, None] - 2 * chunk @ X.T + (X**2).sum(1)[None, :]
        dist[i:i + 256] = np.sqrt(np.clip(d2.min(axis=1), 0.0, None))
    return {"distance_to_states": readonly(dist), "outside": readonly(outside)}


# ---------------------------------------------------------------------- inputs
def _working_system(system: RecurrentSystem, dtype: Any) -> tuple[RecurrentSystem, torch.dtype]:
    """The system in the precision of the search (a float64 weight copy for module systems)."""
    from .._core.validation import as_dtype

    if dtype is None:
        dt = torch.float64 if system.layers else system.dtype
    else:
        dt = as_dtype(dtype)
    if dt == system.dtype or not system.layers:
        return system, dt
    layers = tuple(dataclasses.replace(
        layer, w_ih=layer.w_ih.to(dt), w_hh=layer.w_hh.to(dt),
        b_ih=None if layer.b_ih is None else layer.b_ih.to(dt),
        b_hh=None if layer.b_hh is None else layer.b_hh.to(dt)) for layer in system.layers)
    copy = RecurrentSystem(
        state_size=system.state_size, input_size=system.input_size, parts=system.parts,
        dtype=dt, kind=system.kind, source=system.source, fingerprint=system.fingerprint,
        layers=layers, time_reversed=system.time_reversed, model=system.model,
    )
    return copy, dt


def _constant_input(x: Any, I: int, dt: torch.dtype) -> torch.Tensor:
    if x is None:
        return torch.zeros(I, dtype=dt)
    if isinstance(x, (int, float, list, tuple)):
        x = np.asarray(x, dtype=np.float64)
    t = as_float_tensor(x, "x", dt)
    if t.ndim == 0 and I == 1:
        t = t.reshape(1)
    if t.ndim == 2 and t.shape[0] == 1:
        t = t[0]
    if tuple(t.shape) != (I,):
        raise ValueError(f"x is the constant input x* and must have shape ({I},), one value "
                         f"per input feature, got {describe(x)}")
    check_finite(t, "x", "pass a finite constant input")
    return t


def _starts(trace, starts, system, n_starts, noise, seed, dt) -> torch.Tensor:
    S = system.state_size
    if isinstance(noise, bool) or not isinstance(noise, numbers.Real) or not noise >= 0:
        raise ValueError(f"noise must be a number >= 0 (a standard deviation), got {noise!r}")
    gen = torch.Generator().manual_seed(int(seed))
    if starts is not None:
        s0 = _given_starts(starts, S)
    else:
        s0 = _sampled_starts(trace, system, n_starts, gen)
    if noise > 0:
        s0 = s0 + noise * torch.randn(s0.shape, generator=gen, dtype=torch.float64)
    return s0.to(dt)


def _given_starts(starts, S: int) -> torch.Tensor:
    """The user's start states checked, as float64 (n, S)."""
    if isinstance(starts, (list, tuple)):
        starts = np.asarray(starts, dtype=np.float64)
    s0 = as_float_tensor(starts, "starts", torch.float64)
    if s0.ndim == 1 and s0.shape[0] == S:
        s0 = s0.unsqueeze(0)
    if s0.ndim != 2 or s0.shape[1] != S or s0.shape[0] == 0:
        raise ValueError(f"starts must have shape (n_starts, {S}), got {describe(starts)}")
    check_finite(s0, "starts", "pass finite start states")
    return s0


def _sampled_starts(trace, system, n_starts, gen: torch.Generator) -> torch.Tensor:
    """n_starts finite, real states of the trace drawn with gen, as float64 (n, S)."""
    S = system.state_size
    if not isinstance(trace, Trace):
        raise TypeError(f"trace must be a hiddenlens Trace of this system to sample starts "
                        f"from, got {type(trace).__name__}; record one with "
                        "hiddenlens.record(model, inputs), or pass starts=")
    if trace.state_size != S:
        raise ValueError(f"the trace has states of size {trace.state_size} but the "
                         f"{system.source} system has {S}; record the trace from this "
                         "system")
    if isinstance(n_starts, bool) or not isinstance(n_starts, (int, np.integer)) \
            or n_starts < 1:
        raise ValueError(f"n_starts must be an integer >= 1, got {n_starts!r}")
    flat = trace.states.reshape(-1, S)  # (B*T, S), a view
    usable = np.isfinite(flat).all(axis=1)  # exploded states cannot start
    real = _real_rows(trace)
    if real is not None:
        usable &= real  # nor padded ones
    finite = np.nonzero(usable)[0]
    N = finite.size
    if N == 0:
        raise ValueError("the trace has no finite state to start from; record a trace "
                         "whose dynamics do not explode or pass starts=")
    idx = torch.randperm(N, generator=gen)[:n_starts] if n_starts <= N else \
        torch.randint(N, (int(n_starts),), generator=gen)
    return torch.from_numpy(np.array(flat[finite[idx.numpy()]], dtype=np.float64))  # (n, S)


def _check_options(**opts: Any) -> None:
    it = opts["max_iter"]
    if isinstance(it, bool) or not isinstance(it, (int, np.integer)) or it < 0:
        raise ValueError(f"max_iter must be an integer >= 0, got {it!r}")
    for name in ("slow_tol", "distance_tol", "marginal_tol", "tol", "slow_margin"):
        v = opts[name]
        if v is None and name == "tol":
            continue
        # numpy scalars (np.float32(1e-5)) are numbers too; NaN and inf are not tolerances
        if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, float, np.integer,
                                                                 np.floating)) \
                or not 0 <= v < math.inf:
            raise ValueError(f"{name} must be a number >= 0 (finite), got {v!r}")


# ---------------------------------------------------------------------- optimisation
def _residual(system: RecurrentSystem, s: torch.Tensor, X: torch.Tensor) -> torch.Tensor:
    with torch.no_grad():
        return system.step(s, X) - s  # (n, S)


def _gauss_newton(system, s, X, r) -> tuple[torch.Tensor, torch.Tensor]:
    """AᵀA (n, S, S) and Aᵀr (n, S) in float64, A = dF/ds − I at states s (n, S), r = F(s) − s."""
    S = s.shape[1]
    J = step_jacobians(system, s, X).to(torch.float64)  # (n, S, S)
    A = J - torch.eye(S, dtype=torch.float64)
    return A.mT @ A, (A.mT @ r.unsqueeze(-1)).squeeze(-1)


def _minimise(system, s0, X, *, tol, max_iter, progress, slow_tol=0.0, slow_margin=0.0):
    """Levenberg–Marquardt on q for every start at once.

    Returns the final states (n, S) and q (n,) in float64, whether each start converged
    (reached a fixed point or a minimum of q, or settled on the speed rule) rather than running
    out of iterations, and whether it settled on the speed rule.

    NOTE: [Stopping on speed]
    A start with ``q <= slow_tol`` whose next step would be longer than ``speed / slow_margin``
    (speed ``sqrt(2 q)``) stops where it is: a step that much longer than the distance the map
    moves the state means ``|1 − λ| < slow_margin`` along the step, a slow direction, and
    following it would slide the start along a slow valley (a line attractor's) to wherever the
    valley ends, merging a whole manifold of slow points into one. Near an isolated fixed point
    whose eigenvalues stay away from 1 the step is about as long as the speed, and the start
    is polished to a fixed point as before.

    NOTE: [Batched damped Gauss–Newton]
    The starts do not interact, so q summed over starts has a block-diagonal Hessian and each
    start solves its own S x S system (H + μ diag(H)) δ = −g, H = AᵀA, g = Aᵀr; all of them go
    through one batched Cholesky solve. Marquardt's diag(H) scaling makes the damping
    indifferent to the units of each state coordinate (an LSTM's c next to its h). Each start
    keeps its own μ: an accepted step (q fell) divides it by 3, a rejected one multiplies it by
    a factor that doubles on each rejection in a row (2, 4, 8, ...) and is retried from the
    same state without a new Jacobian; Jacobians are recomputed only where a step was
    accepted. A start leaves the batch when q <= 1e-8 tol (a fixed point, polished) or when it
    stalls at a minimum of q: q fell by less than a relative 1e-10 on three accepted steps in a
    row, or μ grew past 1e12. Starts still descending after max_iter steps did not converge:
    typically a slow valley towards a degenerate (marginal) fixed point, where Newton's method
    is only linearly convergent, such as a continuum of nearly fixed states.
    """

    s = s0.clone()  # (n, S)
    r = _residual(system, s, X).to(torch.float64)
    q = 0.5 * (r * r).sum(dim=1)  # (n,)
    converged = torch.ones(q.shape, dtype=torch.bool)
    settled = torch.zeros(q.shape, dtype=torch.bool)
    # below tol a point counts as fixed; a few more (quadratically convergent) steps pin it down
    polish = tol * 1e-8
    active = (q > polish).nonzero().squeeze(1)
    if active.numel() == 0:
        return s.to(torch.float64), q, converged, settled
    if max_iter == 0:
        converged[active] = False
        return s.to(torch.float64), q, converged, settled
    H, g = _gauss_newton(system, s[active], X[active], r[active])
    mu = torch.full((active.numel(),), 1e-3, dtype=torch.float64)
    nu = torch.full_like(mu, 2.0)
    stall = torch.zeros(active.numel(), dtype=torch.long)
    show = {"disable": progress is False, "delay": 0.0 if progress else 2.0}
    started = time.perf_counter()
    with progress_bar(progress, total=max_iter, label="fixed points", auto=True,
                      delay=show["delay"]) as bar:
        for it in range(max_iter):
            delta, info = _damped_solve(H, g, mu)  # (a, S)
            q_a = q[active]
            # see NOTE: [Stopping on speed]
            slow = (info == 0) & (q_a <= slow_tol) & (
                slow_margin * torch.linalg.vector_norm(delta, dim=1) > torch.sqrt(2 * q_a))
            if slow_margin > 0 and bool(slow.any()):
                settled[active[slow]] = True
            trial = s[active] + delta.to(s.dtype)
            r_t = _residual(system, trial, X[active]).to(torch.float64)
            q_t = 0.5 * (r_t * r_t).sum(dim=1)
            accept = (info == 0) & torch.isfinite(q_t) & (q_t < q_a) & ~slow
            tiny = accept & (q_a - q_t <= 1e-10 * q_a)
            stall = torch.where(accept, torch.where(tiny, stall + 1, 0), stall)
            mu = torch.where(accept, (mu / 3).clamp_min(1e-15), mu * nu)
            nu = torch.where(accept, 2.0, 2 * nu)
            moved = active[accept]
            s[moved] = trial[accept]
            q[moved] = q_t[accept]
            r[moved] = r_t[accept]
            done = (q[active] <= polish) | (stall >= 3) | (mu > 1e12) | slow
            left = ~done
            refresh = (accept & left)[left]  # among those left, who needs a new Jacobian
            if not bool(left.all()):  # (copying H is not free: only when starts finished)
                active, H, g, mu, nu, stall = (a[left] for a in (active, H, g, mu, nu, stall))
            if bool(refresh.all()):
                H, g = _gauss_newton(system, s[active], X[active], r[active])
            elif refresh.any():
                at = active[refresh]
                H[refresh], g[refresh] = _gauss_newton(system, s[at], X[at], r[at])
            bar.update(1)
            # an upper estimate of the time left: the remaining iterations at the mean cost so
            # far (starts that finish leave the batch, so later iterations cost less)
            left = (time.perf_counter() - started) / (it + 1) * (max_iter - it - 1)
            bar.set_postfix(active=int(active.numel()), left=f"<={_duration(left)}",
                            refresh=False)
            if active.numel() == 0:
                break
    converged[active] = False
    return s.to(torch.float64), q, converged, settled


def _duration(seconds: float) -> str:
    """Seconds as "42s", "3m05s" or "1h02m"."""
    seconds = max(0, int(round(seconds)))
    if seconds < 60:
        return f"{seconds}s"
    if seconds < 3600:
        return f"{seconds // 60}m{seconds % 60:02d}s"
    return f"{seconds // 3600}h{seconds % 3600 // 60:02d}m"


def _scaling(H: torch.Tensor) -> torch.Tensor:
    """Marquardt's damping scale diag(H), floored so a flat direction is still damped."""
    d = H.diagonal(dim1=1, dim2=2)  # (a, S)
    return d.clamp_min(1e-12 * d.amax(dim=1, keepdim=True).clamp_min(1e-300))


def _damped_solve(H: torch.Tensor, g: torch.Tensor, mu: torch.Tensor):
    """δ = −(H + μ diag(H))⁻¹ g for each start by Cholesky; ``info`` > 0 where it failed."""
    diag = H.diagonal(dim1=1, dim2=2)  # (a, S), a view: damp H in place and restore it
    saved = diag.clone()
    diag.add_(mu.unsqueeze(1) * _scaling(H))
    L, info = torch.linalg.cholesky_ex(H)
    diag.copy_(saved)
    y = torch.linalg.solve_triangular(L, g.unsqueeze(-1), upper=False)
    return -torch.linalg.solve_triangular(L.mT, y, upper=True).squeeze(-1), info


def _merge(points: torch.Tensor, q: torch.Tensor, distance_tol: float):
    """Greedy de-duplication, best q first: indices of representatives and starts per one."""
    order = torch.argsort(q)
    reps: list[int] = []
    for i in order.tolist():
        if reps and bool((torch.linalg.vector_norm(points[reps] - points[i], dim=1)
                          <= distance_tol).any()):
            continue
        reps.append(i)
    if not reps:
        return torch.zeros(0, dtype=torch.long), np.zeros(0, dtype=np.int64)
    rep_t = torch.tensor(reps)
    nearest = torch.cdist(points, points[rep_t]).argmin(dim=1)  # (n_kept,)
    support = np.bincount(nearest.numpy(), minlength=len(reps))
    return rep_t, support


# ---------------------------------------------------------------------- linearisation
def _linearise(J: torch.Tensor, marginal_tol: float):
    """Eigenvalues (largest |λ| first), expanding directions and stability class per point."""
    m, S = J.shape[0], J.shape[1]
    if m == 0:
        return np.zeros((0, S), complex), [], []
    vals, vecs = torch.linalg.eig(J)  # (m, S), (m, S, S) with eigenvectors as columns
    vals, vecs = vals.numpy(), vecs.numpy()
    order = np.argsort(-np.abs(vals), axis=1, kind="stable")
    vals = np.take_along_axis(vals, order, axis=1)
    vecs = np.take_along_axis(vecs, order[:, None, :], axis=2)
    mod = np.abs(vals)
    directions, stability = [], []
    for i in range(m):
        if np.any(np.abs(mod[i] - 1) <= marginal_tol):
            stability.append("marginal")
        elif np.all(mod[i] < 1):
            stability.append("stable")
        elif np.all(mod[i] > 1):
            stability.append("unstable")
        else:
            stability.append("saddle")
        directions.append(_expanding(vals[i], vecs[i], 1 + marginal_tol))
    return vals, directions, stability


def _expanding(vals: np.ndarray, vecs: np.ndarray, threshold: float) -> np.ndarray:
    """Real unit vectors (m, S) spanning the eigen-directions with |λ| > threshold."""
    out = []
    for j in np.nonzero(np.abs(vals) > threshold)[0]:
        v = vecs[:, j]
        if abs(vals[j].imag) <= 1e-12 * max(1.0, abs(vals[j])):
            out.append(v.real)
        elif vals[j].imag > 0:  # one of each conjugate pair spans the plane
            out += [v.real, v.imag]
    S = vecs.shape[0]
    if not out:
        return np.zeros((0, S))
    D = np.array(out)  # (m, S)
    D /= np.maximum(np.linalg.norm(D, axis=1, keepdims=True), 1e-300)
    # sign convention: the largest component of each direction is positive
    flip = np.sign(D[np.arange(D.shape[0]), np.argmax(np.abs(D), axis=1)])
    return D * flip[:, None]
