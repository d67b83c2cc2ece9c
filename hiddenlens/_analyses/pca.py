"""PCA of recorded hidden states: low-dimensional trajectories and the effective dimension."""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

from .._core.options import analysis, check_options, int_seed, renamed
from .._core.results import Result, frozen_mapping, readonly
from .._core.systems import RecurrentSystem
from .._core.trace import Trace
from .._core.validation import check_trace_fits

__all__ = ["PCATrajectories", "pca_trajectories"]


@dataclass(frozen=True, eq=False)
class PCATrajectories(Result):
    """Hidden-state trajectories projected onto their principal components.

    Attributes
    ----------
    projected : ndarray of shape (B, T, k)
        The states of the fitted trace in the basis of the k leading components.
    components : ndarray of shape (k, D)
        Principal axes over the D selected state units (rows of unit length).
    mean : ndarray of shape (D,)
        Mean state over all samples and steps, removed before projecting.
    explained_variance : ndarray of shape (k,)
        Variance along each kept component.
    explained_variance_ratio : ndarray of shape (k,)
        Fraction of the total variance along each kept component.
    spectrum : ndarray of shape (D,)
        All eigenvalues of the state covariance, largest first (not only the k kept).
    cumulative : ndarray of shape (D,)
        Cumulative fraction of variance of the first 1, 2, ..., D components.
    participation_ratio : float
        Effective dimension ``(sum(spectrum))**2 / sum(spectrum**2)``, between 1 and D.
    n_components_90, n_components_95 : int
        Fewest components that explain at least 90% / 95% of the variance.
    columns : ndarray of shape (D,)
        Indices of the selected units in the flat state.
    parts : tuple of str or None
        The parts PCA was fitted on (None: the whole state).
    state_size : int
        S of the fitted trace; :meth:`project` accepts states of this length.
    trace_parts : Mapping[str, slice]
        The part layout of the fitted trace, to check traces given to :meth:`project`.
    pca : sklearn.decomposition.PCA
        The fitted scikit-learn estimator (do not refit it: the arrays above would no longer
        match it).

    Notes
    -----
    PCA axes belong to the data they were fitted on. The axes of two separate fits (two runs,
    two models, two input conditions) are not comparable, even when they look alike: project
    both traces into one basis with :meth:`project` (or ``others=`` in :meth:`plot`). The
    fraction of variance along an axis says how much the states spread along it, not how much
    the network relies on it.
    """

    projected: np.ndarray
    components: np.ndarray
    mean: np.ndarray
    explained_variance: np.ndarray
    explained_variance_ratio: np.ndarray
    spectrum: np.ndarray
    cumulative: np.ndarray
    participation_ratio: float
    n_components_90: int
    n_components_95: int
    columns: np.ndarray
    parts: tuple[str, ...] | None
    state_size: int
    trace_parts: Mapping[str, slice]
    pca: Any

    @property
    def n_components(self) -> int:
        """k, the number of kept components."""
        return self.components.shape[0]

    # ------------------------------------------------------------------ projecting
    def project(self, other: Trace | Any) -> np.ndarray:
        """Project another trace, or flat states, into this basis.

        Parameters
        ----------
        other : Trace or array_like of shape (..., S)
            A trace with the same part layout as the fitted one (another run or input condition
            of the same model), or flat states of the fitted length S (e.g. fixed points).

        Returns
        -------
        ndarray of shape (B', T', k) for a trace, (..., k) for an array
        """
        if isinstance(other, Trace):
            self._check_layout(other)
            states = other.states
        else:
            states = np.asarray(other, dtype=np.float64)
            if states.ndim == 0 or states.shape[-1] != self.state_size:
                raise ValueError(
                    f"states to project must have shape (..., {self.state_size}), the state "
                    f"size of the fitted trace, got shape {states.shape}"
                )
        X = np.asarray(states[..., self.columns], dtype=np.float64)  # (..., D)
        return (X - self.mean) @ self.components.T  # (..., k)

    def _check_layout(self, other: Trace) -> None:
        names = self.parts if self.parts is not None else tuple(self.trace_parts)
        own = {n: self.trace_parts[n] for n in names}
        theirs = {n: other.parts.get(n) for n in names}
        same_size = other.state_size == self.state_size or self.parts is not None
        if own != theirs or not same_size:
            raise ValueError(
                f"the trace to project has state size {other.state_size} and parts "
                f"{_describe_parts(other.parts)}, but PCA was fitted on parts "
                f"{_describe_parts(own)} of states of size {self.state_size}; project traces "
                "of the same model (or pass flat states of matching size as an array)"
            )

    # ------------------------------------------------------------------ tables
    def to_frame(self):
        """Long table of the projected trajectories: index (sample, step), columns PC1..PCk."""
        import pandas as pd

        B, T, k = self.projected.shape
        idx = pd.MultiIndex.from_product([range(B), range(T)], names=["sample", "step"])
        return pd.DataFrame(self.projected.reshape(B * T, k), index=idx,
                            columns=[f"PC{i + 1}" for i in range(k)])

    # ------------------------------------------------------------------ plots
    def axis_label(self, i: int) -> str:
        """``"PC1 (42.0%)"``: the label of component ``i`` (from 0) with its variance share."""
        return f"PC{i + 1} ({100 * self.explained_variance_ratio[i]:.1f}%)"

    def plot(self, ax: Any = None, *, dims: int = 2, color_by: Any = "time", samples: Any = None,
             steps: slice | None = None, others: Any = None):
        """Draw the trajectories in the plane (or space) of the leading components.

        Parameters
        ----------
        ax : matplotlib Axes, optional
            Where to draw (3-D axes for ``dims=3``); a new figure by default.
        dims : {2, 3}
        color_by : "time", "sample" or array_like of shape (B,)
            Colour segments by step, each sample in its own colour, or by a label per sample
            (e.g. the class of each sequence).
        samples : int, sequence of int or slice, optional
            Which samples to draw (all by default).
        steps : slice, optional
            Which steps to draw (all by default).
        others : Trace, sequence of Trace or mapping name -> Trace, optional
            Further traces of the same model, projected into this basis and drawn dashed.

        Returns
        -------
        matplotlib Axes

        Notes
        -----
        Circles mark where each trajectory starts, squares where it ends.
        """
        from .._plotting.pca import draw_trajectories

        projected = [(label, self.project(tr)) for label, tr in _as_named_traces(others)]
        return draw_trajectories(self, ax, dims=dims, color_by=color_by, samples=samples,
                                 steps=steps, others=projected)

    def plot_variance(self, ax: Any = None, *, max_components: int = 30):
        """Draw the variance share of each component and the cumulative curve (90%/95% marked)."""
        from .._plotting.pca import draw_variance

        return draw_variance(self, ax, max_components=max_components)

    def __repr__(self) -> str:
        B, T, k = self.projected.shape
        return (f"PCATrajectories(B={B}, T={T}, k={k}, D={self.columns.size}, "
                f"participation_ratio={self.participation_ratio:.3g}, "
                f"n_components_90={self.n_components_90})")


@analysis("pca_trajectories")
def pca_trajectories(
    system: Any,
    trace: Trace | None = None,
    *legacy: Any,
    k: int | None = None,
    parts: str | Sequence[str] | None = None,
    svd_solver: str | None = None,
    seed: int | np.random.Generator = 0,
    threads: int | None = None,
    n_components: int | None = None,
) -> PCATrajectories:
    """Fit PCA to the recorded states and project the trajectories onto the leading components.

    Every (sample, step) state of the chosen parts is one observation: the (B, T, D) states are
    reshaped to (B * T, D) and fitted with :class:`sklearn.decomposition.PCA` in float64.

    Called as ``pca_trajectories(system, trace, k=3)`` like every analysis, or as
    ``pca_trajectories(trace)`` (PCA needs only the states).

    Parameters
    ----------
    system : RecurrentSystem, model or Trace
        The system the trace was recorded from (checked against the trace's sizes when it is a
        RecurrentSystem), or the trace itself.
    trace : Trace
        Recorded states (B, T, S), e.g. from :func:`hiddenlens.record`. Input sequences given
        here are recorded first through ``system`` (with a DeprecationWarning).
    k : int, default 3
        The number of components to keep (the participation ratio and the 90%/95% counts use
        the whole spectrum regardless). Called ``n_components`` in 0.1; that name and the
        positional ``pca_trajectories(trace, 3, parts)`` still work for one release with a
        DeprecationWarning.
    parts : str or sequence of str, optional
        Parts of the state to analyse (e.g. ``"layer1.h"``). Default: the whole flat state,
        except for an LSTM (parts ``"layer<k>.h"`` and ``"layer<k>.c"``), where the h parts
        only: h and c have different scales, and mixing them lets the larger c dominate the
        axes. Pass both parts by name to fit them together.
    svd_solver : str, optional
        Passed to scikit-learn. By default "covariance_eigh" (an eigendecomposition of the
        D × D covariance, exact and fast when B·T >> D) where scikit-learn has it, else "full";
        "randomized" is faster for very wide states.
    seed : int >= 0 or numpy.random.Generator, default 0
        Random state of the randomized solver.
    threads : int, optional
        Torch threads of the calling thread during the fit (see docs/options.md).

    Returns
    -------
    PCATrajectories

    Notes
    -----
    With covariance eigenvalues λ_1 >= ... >= λ_D the participation ratio is
    PR = (Σ λ_i)² / Σ λ_i² (Gao et al. 2017; Litwin-Kumar et al. 2017): D for isotropic states,
    1 when all variance lies along one axis. The axes of two fits are not comparable; project
    other traces with :meth:`PCATrajectories.project` to see them in one basis.

    References
    ----------
    Gao, Trautmann, Yu, Santhanam, Ryu, Shenoy & Ganguli (2017), "A theory of multineuronal
    dimensionality, dynamics and measurement", bioRxiv 214262.
    Litwin-Kumar, Harris, Axel, Sompolinsky & Abbott (2017), "Optimal degrees of synaptic
    connectivity", Neuron 93(5).
    """
    from sklearn.decomposition import PCA

    trace, k, parts = _call_form(system, trace, legacy, k, parts, n_components)
    check_options("pca_trajectories", locals())
    seed = int_seed(seed)
    n_components = k
    names = None if parts is None else ((parts,) if isinstance(parts, str) else tuple(parts))
    if names is None:
        names = _default_parts(trace)
    try:
        cols = trace.columns(names)  # (D,)
    except KeyError as err:  # an unknown part is a bad option value, as elsewhere
        raise ValueError(str(err.args[0])) from None
    B, T, _ = trace.states.shape
    X = np.asarray(trace.states[:, :, cols], dtype=np.float64).reshape(B * T, cols.size)
    from .._core.record import valid_steps

    keep = valid_steps(trace)  # (B, T): padded steps of variable-length batches stay out
    X_fit = X if keep is None else X[keep.reshape(-1)]
    _check_data(X_fit, n_components)
    spectrum = _covariance_spectrum(X_fit)  # (D,)
    total = spectrum.sum()
    if not total > 0:
        raise ValueError("the selected states do not vary over samples and steps, so they have "
                         "no principal components; record longer or more varied inputs")
    if svd_solver is None:
        svd_solver = "covariance_eigh" if _has_covariance_eigh() and \
            X_fit.shape[0] >= X_fit.shape[1] else "full"
    pca = PCA(n_components=n_components, svd_solver=svd_solver, random_state=seed).fit(X_fit)
    cumulative = np.minimum(np.cumsum(spectrum) / total, 1.0)  # (D,)
    projected = pca.transform(X).reshape(B, T, n_components)  # (B, T, k)
    return PCATrajectories(
        projected=readonly(projected),
        components=readonly(pca.components_),
        mean=readonly(pca.mean_),
        explained_variance=readonly(pca.explained_variance_),
        explained_variance_ratio=readonly(pca.explained_variance_ratio_),
        spectrum=readonly(spectrum),
        cumulative=readonly(cumulative),
        participation_ratio=float(total**2 / np.sum(spectrum**2)),
        n_components_90=_components_for(cumulative, 0.90),
        n_components_95=_components_for(cumulative, 0.95),
        columns=readonly(cols),
        parts=names,
        state_size=trace.state_size,
        trace_parts=frozen_mapping(trace.parts),
        pca=pca,
    )


# ---------------------------------------------------------------------- computing
def _call_form(system: Any, trace: Any, legacy: tuple[Any, ...], k: Any, parts: Any,
               n_components: Any) -> tuple[Trace, Any, Any]:
    """The trace, k and parts of any accepted call form (the 0.1 forms with a warning)."""
    if isinstance(system, Trace):
        given, positional = system, ((trace,) if trace is not None else ()) + tuple(legacy)
    else:
        given, positional = _trace_of(system, trace), tuple(legacy)
    if positional:
        k, parts = _positional_options(positional, k, parts, n_components)
    k = renamed("pca_trajectories", "n_components", "k", n_components, k, default=None)
    return given, (3 if k is None else k), parts


def _trace_of(system: Any, trace: Any) -> Trace:
    """The trace of pca_trajectories(system, trace), recorded first when inputs are given."""
    if trace is None:
        raise TypeError(f"the trace must be a hiddenlens Trace, got {type(system).__name__}; "
                        "call pca_trajectories(system, trace) or pca_trajectories(trace) "
                        "with trace = hiddenlens.record(model, inputs)")
    if isinstance(trace, Trace):
        if isinstance(system, RecurrentSystem):
            check_trace_fits(system, trace, "pca_trajectories")
        return trace
    if not isinstance(trace, (np.ndarray, torch.Tensor)):
        raise TypeError(f"trace must be a hiddenlens Trace, got {type(trace).__name__}; "
                        "record one with hiddenlens.record(model, inputs)")
    from .._core.record import record

    warnings.warn("pca_trajectories(system, inputs) is deprecated; record first: "
                  "pca_trajectories(system, hiddenlens.record(system, inputs))",
                  DeprecationWarning, stacklevel=5)
    return record(system, trace)


def _positional_options(positional: tuple[Any, ...], k: Any, parts: Any, n_components: Any
                        ) -> tuple[Any, Any]:
    """k and parts of the 0.1 form pca_trajectories(trace, n_components, parts)."""
    if len(positional) > 2:
        raise TypeError(f"pca_trajectories takes at most (system, trace) positionally, got "
                        f"{len(positional)} more; pass k= and parts= by keyword")
    warnings.warn("pca_trajectories(trace, n_components, parts) with positional options is "
                  "deprecated; pass them by keyword: pca_trajectories(system, trace, k=..., "
                  "parts=...)", DeprecationWarning, stacklevel=5)
    if k is not None or n_components is not None:
        raise TypeError("pca_trajectories got the number of components twice; pass only k=")
    if len(positional) == 2 and parts is not None:
        raise TypeError("pca_trajectories got parts twice; pass only parts=")
    return positional[0], (positional[1] if len(positional) == 2 else parts)


def _default_parts(trace: Trace) -> tuple[str, ...] | None:
    """The h parts of an LSTM trace (which also holds c parts); None (all) otherwise."""
    names = list(trace.parts)
    cells = [n for n in names if n.endswith(".c")]
    hidden = [n for n in names if n.endswith(".h")]
    if cells and hidden and len(cells) + len(hidden) == len(names):
        return tuple(hidden)
    return None


def _has_covariance_eigh() -> bool:
    """scikit-learn >= 1.5 offers the "covariance_eigh" PCA solver."""
    import sklearn

    major, minor = (int(v) for v in sklearn.__version__.split(".")[:2])
    return (major, minor) >= (1, 5)


def _check_data(X: np.ndarray, n_components: Any) -> None:
    N, D = X.shape
    if N < 2:
        raise ValueError("PCA needs at least two states; record more than one step or sample")
    if not np.isfinite(X).all():
        raise ValueError(
            "the selected states contain NaN or Inf (the dynamics exploded); restrict the trace "
            "to the finite part with trace.select(steps=...) or samples=..."
        )
    if isinstance(n_components, bool) or not isinstance(n_components, (int, np.integer)) \
            or not 1 <= n_components <= min(N, D):
        raise ValueError(f"k (the number of components) must be an integer from 1 to "
                         f"{min(N, D)} (the number of selected units or states), got "
                         f"{n_components!r}")


def _covariance_spectrum(X: np.ndarray) -> np.ndarray:
    """All eigenvalues of the sample covariance of X (N, D), largest first, length D."""
    N, D = X.shape
    Xc = X - X.mean(axis=0)
    # the smaller of the two Gram matrices has the same non-zero eigenvalues
    G = Xc.T @ Xc if N >= D else Xc @ Xc.T  # (D, D) or (N, N)
    lam = np.clip(np.linalg.eigvalsh(G)[::-1], 0.0, None) / (N - 1)
    out = np.zeros(D)
    out[: min(lam.size, D)] = lam[:D]
    return out


def _components_for(cumulative: np.ndarray, level: float) -> int:
    # a small slack so that exactly 90% counts as reaching 90% despite rounding
    return int(np.searchsorted(cumulative, level - 1e-12) + 1)


def _describe_parts(parts: Mapping[str, Any]) -> str:
    return "{" + ", ".join(f"{n}: {s.start}:{s.stop}" if isinstance(s, slice) else f"{n}: none"
                           for n, s in parts.items()) + "}"


def _as_named_traces(others: Any) -> list[tuple[str, Trace]]:
    if others is None:
        return []
    if isinstance(others, Trace):
        return [("other", others)]
    items = list(others.items()) if isinstance(others, Mapping) else \
        [(f"other {i + 1}", tr) for i, tr in enumerate(others)]
    for name, tr in items:
        if not isinstance(tr, Trace):
            raise TypeError(f"others must hold Traces, got {type(tr).__name__} for {name!r}")
    return [(str(n), tr) for n, tr in items]

