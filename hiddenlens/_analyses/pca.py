"""PCA of recorded hidden states: low-dimensional trajectories and the participation ratio."""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

from .._core.options import analysis, check_options, int_seed, renamed
from .._core.registry import wraps_analysis
from .._core.results import Result, frozen_mapping, readonly
from .._core.systems import RecurrentSystem
from .._core.trace import Trace
from .._core.validation import check_trace_fits

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import ModelLike

__all__ = ["MAX_CONDITIONS", "PCATrajectories", "pca_analysis", "pca_trajectories"]


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
        Participation ratio ``(sum(spectrum))**2 / sum(spectrum**2)``, between 1 and D.
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
    fit_mask : ndarray of shape (B, T), bool
        The states the axes were fitted on (``fit_steps``, less padded steps); every state is
        projected regardless.
    fit_description : str
        Those states in words: ``"all steps"``, ``"steps 20 to 59"``, ``"a mask of 300 of 1200
        states"``.
    variance_captured : float
        Fraction of the variance of *all* states (not only the fitted ones) that lies along the
        k axes; equal to ``explained_variance_ratio.sum()`` when the fit used every state.
    labels : ndarray of shape (B,) or (B, T), or None
        The labels given (one per sequence or one per step).
    onsets : ndarray of shape (B,), int, or None
        The event step of each sequence the condition means are aligned to.
    label_kind : {"categorical", "ordered"} or None
        How the labels are read and drawn: categories (a legend) or ordered values (a colour
        map with a colour bar).
    conditions : ndarray of shape (C,) or None
        The distinct label values, sorted (None without labels, or with more than
        ``MAX_CONDITIONS`` of them).
    condition_names : tuple of str
        ``conditions`` as text, for legends.
    condition_means : ndarray of shape (C, L, k) or None
        The mean projected state of each condition at each step of ``condition_steps``: over
        the sequences (per-sequence labels) or the states (per-step labels) with that label
        there. NaN where no state counts.
    condition_counts : ndarray of shape (C, L), int, or None
        How many states each mean averages.
    condition_steps : ndarray of shape (L,), int, or None
        The steps of ``condition_means``: 0 .. T-1, or steps relative to the onset (0 at the
        event, negative before it) when ``onsets`` were given.

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
    fit_mask: np.ndarray | None = None
    fit_description: str = "all steps"
    variance_captured: float | None = None
    labels: np.ndarray | None = None
    onsets: np.ndarray | None = None
    label_kind: str | None = None
    conditions: np.ndarray | None = None
    condition_names: tuple[str, ...] = ()
    condition_means: np.ndarray | None = None
    condition_counts: np.ndarray | None = None
    condition_steps: np.ndarray | None = None

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
    def to_frame(self, *, conditions: bool = False):
        """Long table of the projected trajectories: index (sample, step), columns PC1..PCk.

        ``conditions=True`` gives the condition means instead: index (condition, step), with
        the step relative to the onset when onsets were given, and a column ``n`` (states
        averaged).
        """
        import pandas as pd

        if conditions:
            if self.condition_means is None:
                raise ValueError("this result has no condition means; pass labels= (one per "
                                 "sequence or per step) to pca_trajectories")
            C, L, k = self.condition_means.shape
            idx = pd.MultiIndex.from_product([list(self.condition_names),
                                              self.condition_steps.tolist()],
                                             names=["condition", "step"])
            df = pd.DataFrame(self.condition_means.reshape(C * L, k), index=idx,
                              columns=[f"PC{i + 1}" for i in range(k)])
            df["n"] = self.condition_counts.reshape(-1)
            return df
        B, T, k = self.projected.shape
        idx = pd.MultiIndex.from_product([range(B), range(T)], names=["sample", "step"])
        return pd.DataFrame(self.projected.reshape(B * T, k), index=idx,
                            columns=[f"PC{i + 1}" for i in range(k)])

    # ------------------------------------------------------------------ plots
    def axis_label(self, i: int) -> str:
        """``"PC1 (42.0%)"``: the label of component ``i`` (from 0) with its variance share."""
        return f"PC{i + 1} ({100 * self.explained_variance_ratio[i]:.1f}%)"

    def plot(self, ax: Any = None, *, dims: int = 2, color_by: Any = None, samples: Any = None,
             steps: slice | None = None, others: Any = None, conditions: bool | None = None,
             thin: int | None = None):
        """Draw the trajectories, or the condition means, in the plane (or space) of the
        leading components.

        Parameters
        ----------
        ax : matplotlib Axes, optional
            Where to draw (3-D axes for ``dims=3``); a new figure by default.
        dims : {2, 3}
        color_by : "time", "sample", "label" or array_like of shape (B,) or (B, T), optional
            How single trajectories are coloured: by step, each sample in its own colour, by
            the result's labels, or by labels given here. Categorical labels get the
            colour-blind-safe palette with a line style each and a legend; ordered (numeric)
            ones a colour map and a colour bar. Default: "label" when the result has labels,
            else "time".
        samples : int, sequence of int or slice, optional
            Which samples to draw (all by default). Over condition means, the chosen samples
            are drawn faintly behind the means, in their condition's colour.
        steps : slice, optional
            The time window drawn, in steps: ``slice(100, 300)`` draws steps 100 to 299, a
            slice step thins (``slice(0, None, 5)``). Over condition means aligned to onsets
            the steps count from the onset (``slice(-5, 40)``).
        others : Trace, sequence of Trace or mapping name -> Trace, optional
            Further traces of the same model, projected into this basis and drawn dashed.
        conditions : bool, optional
            Draw the condition means (one line per label value) instead of every trajectory.
            Default: True when the result has condition means and ``color_by`` is not given.
        thin : int, optional
            Draw every ``thin``-th step. Default: every step up to 400 drawn steps, beyond that
            the smallest stride that draws at most 400.

        Returns
        -------
        matplotlib Axes

        Notes
        -----
        Circles mark where each line starts, squares where it ends, triangles the onset of
        aligned condition means. The title says what is drawn: the window, the thinning and
        the steps the axes were fitted on.
        """
        from .._plotting.pca import draw_trajectories

        projected = [(label, self.project(tr)) for label, tr in _as_named_traces(others)]
        return draw_trajectories(self, ax, dims=dims, color_by=color_by, samples=samples,
                                 steps=steps, others=projected, conditions=conditions,
                                 thin=thin)

    def plot_variance(self, ax: Any = None, *, max_components: int = 30):
        """Draw the variance share of each component and the cumulative curve (90%/95% marked)."""
        from .._plotting.pca import draw_variance

        return draw_variance(self, ax, max_components=max_components)

    def __repr__(self) -> str:
        B, T, k = self.projected.shape
        extra = "" if self.conditions is None else f", conditions={len(self.conditions)}"
        if self.fit_description != "all steps":
            extra += f", fitted on {self.fit_description}"
        return (f"PCATrajectories(B={B}, T={T}, k={k}, D={self.columns.size}, "
                f"participation_ratio={self.participation_ratio:.3g}, "
                f"n_components_90={self.n_components_90}{extra})")


#: Most distinct label values that get condition means (more: label values are not repeated
#: enough to average; bin them first, e.g. with numpy.digitize).
MAX_CONDITIONS = 64
#: Most distinct integer values read as categories under ``label_kind="auto"`` (the size of the
#: colour-blind-safe palette); more are read as ordered values.
MAX_CATEGORIES = 8


@analysis("pca_trajectories")
def pca_trajectories(
    system: ModelLike | Trace,
    trace: Trace | None = None,
    *legacy: Any,
    k: int | None = None,
    parts: str | Sequence[str] | None = None,
    labels: Any = None,
    onsets: Any = None,
    fit_steps: Any = None,
    label_kind: str = "auto",
    svd_solver: str | None = None,
    seed: int | np.random.Generator = 0,
    threads: int | None = None,
    n_components: int | None = None,
) -> PCATrajectories:
    """Fit PCA to the recorded states and project the trajectories onto the leading components.

    Every (sample, step) state of the chosen parts is one observation: the (B, T, D) states are
    reshaped to (B * T, D) and fitted with :class:`sklearn.decomposition.PCA` in float64, on
    all states or on the window ``fit_steps``; every state is projected. With ``labels`` the
    result also holds the condition-averaged trajectories (one per label value), aligned to
    an event when ``onsets`` are given.

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
    labels : array_like of shape (B,) or (B, T), optional
        A label per sequence (the cue of each trial) or per step (the task period, a value
        that changes along the sequence): categories (str, bool, int) or ordered values
        (numbers). NaN marks a step without a label. The result then holds the mean
        trajectory of each label value (``condition_means``), and ``plot`` draws those means
        by default.
    onsets : array_like of int, shape (B,), optional
        The step of an event in each sequence (a cue's onset): condition means are aligned
        to it, over steps counted from the onset.
    fit_steps : slice, array_like of int, or bool array of shape (T,) or (B, T), optional
        The states the axes are fitted on: a window of steps (``slice(20, 60)``), a list of
        steps, or a mask (per step, or per sequence and step, e.g. a task period after each
        onset). Default: every state. The axes then describe that window; all states are
        projected into them.
    label_kind : {"auto", "categorical", "ordered"}, default "auto"
        How labels are read: "auto" takes floats as ordered, text and bools as categories,
        and integers as categories when there are at most 8 distinct values (ordered
        otherwise).
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
    With covariance eigenvalues λ_1 >= ... >= λ_D of the fitted states the participation ratio
    is PR = (Σ λ_i)² / Σ λ_i² (Gao et al. 2017; Litwin-Kumar et al. 2017): D for isotropic
    states, 1 when all variance lies along one axis. The axes of two fits are not comparable;
    project other traces with :meth:`PCATrajectories.project` to see them in one basis. The
    condition mean of label c at step t is the mean of the projected states x_(b,t) with label
    c at t (per-sequence labels: of the sequences with label c); aligned to onsets, t counts
    from each sequence's onset. Means hide the trial-to-trial spread around them.

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
    lab, kind = _check_labels(labels, B, T, label_kind)
    starts = _check_onsets(onsets, B, T)
    fit, fit_text = _fit_mask(fit_steps, B, T)  # (B, T)
    X = np.asarray(trace.states[:, :, cols], dtype=np.float64).reshape(B * T, cols.size)
    from .._core.record import valid_steps

    keep = valid_steps(trace)  # (B, T): padded steps of variable-length batches stay out
    real = np.ones((B, T), bool) if keep is None else keep
    fit &= real
    if fit_steps is not None and fit.sum() < 2:
        raise ValueError(f"fit_steps selects {int(fit.sum())} recorded state(s) ({fit_text}); "
                         "PCA needs at least two: choose a wider window")
    X_fit = X[fit.reshape(-1)]
    _check_data(X_fit, n_components)
    spectrum = _covariance_spectrum(X_fit)  # (D,)
    total = spectrum.sum()
    if not total > 0:
        raise ValueError("the selected states do not vary over samples and steps, so they have "
                         "no principal components; record longer or more varied inputs"
                         + ("" if fit_steps is None else " (or fit on a wider fit_steps)"))
    if svd_solver is None:
        svd_solver = "covariance_eigh" if _has_covariance_eigh() and \
            X_fit.shape[0] >= X_fit.shape[1] else "full"
    pca = PCA(n_components=n_components, svd_solver=svd_solver, random_state=seed).fit(X_fit)
    cumulative = np.minimum(np.cumsum(spectrum) / total, 1.0)  # (D,)
    projected = pca.transform(X).reshape(B, T, n_components)  # (B, T, k)
    captured = _captured(X[real.reshape(-1)], pca.components_)
    groups = _condition_means(projected, lab, kind, starts, real) if lab is not None else {}
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
        fit_mask=readonly(fit),
        fit_description=fit_text,
        variance_captured=captured,
        labels=None if lab is None else readonly(lab.copy()),
        onsets=None if starts is None else readonly(starts),
        label_kind=kind,
        **groups,
    )


@wraps_analysis(pca_trajectories, "targets", "onsets", "inputs")
def pca_analysis(system: Any, trace: Trace, *, targets: Any = None, onsets: Any = None,
                 **options: Any) -> PCATrajectories:
    """:func:`pca_trajectories` in the analysis form, with the task context of
    :func:`hiddenlens.run_analyses`: ``targets`` become the labels (unless ``labels=`` is
    given), ``onsets`` the alignment of the condition means.

    Targets that do not fit the trace (recorded on other trials) are not used; the result's
    ``metadata["labels_note"]`` says so.
    """
    note = None
    if options.get("labels") is None and targets is not None:
        B, T = trace.batch_size, trace.n_steps
        shape = np.shape(targets)
        fits = shape in ((B,), (B, T)) and (onsets is None or np.shape(onsets) == (B,))
        if fits:
            options["labels"] = targets
            if onsets is not None and options.get("onsets") is None:
                options["onsets"] = onsets
        else:
            note = (f"the task targets (shape {shape}) do not fit the {B} recorded sequences "
                    f"of {T} steps, so the trajectories are drawn without them")
    res = pca_trajectories(system, trace, **options)
    if note is None:
        return res
    import dataclasses

    return dataclasses.replace(res, metadata={**dict(res.metadata), "labels_note": note})



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


def _check_labels(labels: Any, B: int, T: int, kind: str
                  ) -> tuple[np.ndarray | None, str | None]:
    """The labels as an array of shape (B,) or (B, T), and how they are read."""
    if labels is None:
        return None, None
    if isinstance(labels, torch.Tensor):
        labels = labels.detach().cpu().numpy()
    lab = np.asarray(labels)
    if lab.shape not in ((B,), (B, T)):
        raise ValueError(f"labels must have shape ({B},), one per sequence, or ({B}, {T}), one "
                         f"per step, got shape {lab.shape}; pass e.g. the cue of each sequence")
    numeric = lab.dtype.kind in "iuf"
    if kind == "ordered" and not numeric:
        raise ValueError(f"label_kind='ordered' needs numeric labels, got {lab.dtype} values; "
                         "pass numbers or label_kind='categorical'")
    if lab.dtype.kind == "f" and np.isinf(lab).any():
        raise ValueError("labels contain Inf; mark steps without a label with NaN")
    if kind == "auto":
        if lab.dtype.kind == "f":
            kind = "ordered"
        elif lab.dtype.kind in "iu":
            kind = "categorical" if np.unique(lab).size <= MAX_CATEGORIES else "ordered"
        else:
            kind = "categorical"
    return lab, kind


def _check_onsets(onsets: Any, B: int, T: int) -> np.ndarray | None:
    if onsets is None:
        return None
    if isinstance(onsets, torch.Tensor):
        onsets = onsets.detach().cpu().numpy()
    arr = np.asarray(onsets)
    if arr.shape != (B,) or arr.dtype.kind not in "iu" and not (
            arr.dtype.kind == "f" and np.all(arr == np.round(arr))):
        raise ValueError(f"onsets must hold one integer step per sequence, shape ({B},), got "
                         f"shape {arr.shape} of {arr.dtype}; pass e.g. the step of each cue")
    arr = arr.astype(np.int64)
    if arr.size and (arr.min() < 0 or arr.max() >= T):
        raise ValueError(f"onsets must be steps from 0 to {T - 1} (the recorded steps), got "
                         f"values from {arr.min()} to {arr.max()}")
    return arr


def _fit_mask(fit_steps: Any, B: int, T: int) -> tuple[np.ndarray, str]:
    """The (B, T) mask of states to fit on, and the states in words."""
    if fit_steps is None:
        return np.ones((B, T), bool), "all steps"
    if isinstance(fit_steps, range):  # a window of steps, hashable (a widget's choice)
        fit_steps = slice(fit_steps.start, fit_steps.stop, fit_steps.step)
    if isinstance(fit_steps, slice):
        steps = np.arange(T)[fit_steps]
        if steps.size == 0:
            raise ValueError(f"fit_steps={fit_steps!r} selects none of the {T} steps; pass a "
                             "window inside them, e.g. slice(0, 50)")
        mask = np.zeros((B, T), bool)
        mask[:, steps] = True
        stride = "" if fit_steps.step in (None, 1) else f" (every {fit_steps.step}th)"
        return mask, f"steps {steps[0]} to {steps[-1]}{stride}"
    if isinstance(fit_steps, torch.Tensor):
        fit_steps = fit_steps.detach().cpu().numpy()
    arr = np.asarray(fit_steps)
    if arr.dtype == bool:
        if arr.shape == (T,):
            mask = np.broadcast_to(arr, (B, T)).copy()
            return mask, f"{int(arr.sum())} of {T} steps"
        if arr.shape == (B, T):
            return arr.copy(), f"a mask of {int(arr.sum())} of {B * T} states"
        raise ValueError(f"a fit_steps mask must have shape ({T},) or ({B}, {T}), got shape "
                         f"{arr.shape}")
    if arr.ndim == 1 and arr.size and arr.dtype.kind in "iu":
        if arr.min() < -T or arr.max() >= T:
            raise ValueError(f"fit_steps holds steps outside 0 to {T - 1}: {arr.min()} to "
                             f"{arr.max()}")
        mask = np.zeros((B, T), bool)
        mask[:, arr] = True
        return mask, f"{int(mask[0].sum())} chosen steps"
    raise ValueError("fit_steps must be a slice of steps (e.g. slice(20, 60)), a list of steps, "
                     f"or a bool mask of shape ({T},) or ({B}, {T}); got {type(fit_steps).__name__}"
                     f" of shape {arr.shape}")


def _captured(X: np.ndarray, components: np.ndarray) -> float:
    """Fraction of the variance of the states X (N, D) along the (orthonormal) components."""
    Xc = X - X.mean(axis=0)  # (N, D)
    total = float(np.sum(Xc**2))
    return float(np.sum((Xc @ components.T) ** 2) / total) if total > 0 else float("nan")


def _condition_means(projected: np.ndarray, lab: np.ndarray, kind: str | None,
                     onsets: np.ndarray | None, real: np.ndarray) -> dict[str, Any]:
    """Condition means (C, L, k) of the projected states, grouped by label and (aligned) step."""
    B, T, k = projected.shape
    per_step = np.broadcast_to(lab[:, None], (B, T)) if lab.ndim == 1 else lab  # (B, T)
    has = real.copy()
    if per_step.dtype.kind == "f":
        has &= ~np.isnan(per_step)
    values = np.unique(per_step[has])
    if values.size == 0 or values.size > MAX_CONDITIONS:
        return {}
    code = np.searchsorted(values, per_step[has])  # (n,)
    t = np.broadcast_to(np.arange(T), (B, T))
    rel = t - (onsets[:, None] if onsets is not None else 0)  # (B, T) steps from the event
    first = int(rel[has].min()) if onsets is not None else 0
    L = (int(rel[has].max()) - first + 1) if onsets is not None else T
    where = code * L + (rel[has] - first)  # (n,) one bin per (condition, step)
    C = values.size
    counts = np.bincount(where, minlength=C * L)  # (C*L,)
    P = projected[has]  # (n, k)
    sums = np.stack([np.bincount(where, weights=P[:, j], minlength=C * L) for j in range(k)],
                    axis=-1)  # (C*L, k)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = sums / counts[:, None]
    means[counts == 0] = np.nan
    names = tuple(_label_text(v) for v in values)
    return {"conditions": readonly(values), "condition_names": names,
            "condition_means": readonly(means.reshape(C, L, k)),  # (C, L, k)
            "condition_counts": readonly(counts.reshape(C, L)),
            "condition_steps": readonly(np.arange(first, first + L))}


def _label_text(v: Any) -> str:
    if isinstance(v, (float, np.floating)):
        return f"{float(v):g}"
    return str(v.item() if isinstance(v, np.generic) else v)


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

