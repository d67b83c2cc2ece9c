"""Task-variable memory: how long after an event the state still holds a task variable.

A cross-validated linear decoder reads the task variable (a cue's identity, a remembered value)
from the state at each lag after the event; a permutation baseline gives the chance band, and
the cross-temporal matrix (train at one lag, test at another) tells a stable code from a
rotating one (King & Dehaene 2014). See docs/task_memory.md.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

from .._core.registry import wraps_analysis
from .._core.results import frozen_mapping, readonly
from .._core.threads import single_thread
from .._core.trace import Trace
from .memory import check_alphas

__all__ = ["TaskMemory", "task_memory", "task_memory_analysis", "task_memory_key_figures"]

DEFAULT_ALPHAS = tuple(float(a) for a in np.logspace(-3, 5, 9))
_F64 = torch.float64


# ====================================================================== result
@dataclass(frozen=True, eq=False)
class TaskMemory:
    """Decoding of a task variable at each lag after its event, from :func:`task_memory`.

    Attributes
    ----------
    lags : ndarray of shape (L,)
        0, 1, ..., max_lag (steps after the onset).
    scores : ndarray of shape (L,)
        Cross-validated test score per lag, the mean over folds: balanced accuracy for
        categorical targets, R^2 for continuous ones.
    spread : ndarray of shape (L,)
        Standard deviation of the score over the folds.
    fold_scores : ndarray of shape (n_folds, L)
    accuracy : ndarray of shape (L,) or None
        Categorical targets: plain accuracy (fraction of test rows decoded right).
    chance : ndarray of shape (L,)
        Mean score of the decoder refitted on permuted targets (the permutation baseline).
    band : ndarray of shape (L,)
        Upper edge of the chance band: a score above it has permutation p-value <= ``level``.
    null_scores : ndarray of shape (n_permutations, L)
        Scores of the decoders fitted on permuted targets.
    p_values : ndarray of shape (L,)
        (1 + #{null scores >= score}) / (n_permutations + 1), per lag (not corrected for the
        number of lags).
    span : int
        The last lag of the first run of lags decoded above ``band`` (counted from
        ``first_lag``); -1 when no lag is. ``max_lag`` means the run did not end: raise
        ``max_lag``.
    first_lag : int
        The first lag above the band (-1 when none).
    level : float
        Significance level of the band (confidence ``1 - level``).
    cross_temporal : ndarray of shape (L, L) or None
        Score of the decoder trained at lag i (rows) tested at lag j (columns), mean over folds.
        A stable code fills a square; a rotating code keeps to the diagonal.
    weight_similarity : ndarray of shape (L, L)
        |cosine| between the decoders' weight vectors (in state units) at lags i and j, mean over
        folds.
    drift : ndarray of shape (L,)
        Angle in degrees between the decoder at each lag and the decoder at the best lag.
    slope : float
        Least-squares slope of ``scores`` over the lags ``first_lag..span`` (score per step; NaN
        when the run has fewer than two lags).
    categorical : bool
    classes : ndarray or None
        The class labels (categorical targets).
    score_name : str
    n_rows : ndarray of shape (L,)
        Number of (sequence, step) rows decoded at each lag.
    metadata : Mapping[str, Any]
        Folds (``fold_of``: the fold of each sequence), permutations, seed, penalties and sizes.

    Notes
    -----
    Linear decoding gives a lower bound on what the state holds about the variable; the band is
    estimated from a finite number of permutations and is per lag, so a few lags past the span
    may cross it by chance.
    """

    lags: np.ndarray
    scores: np.ndarray
    spread: np.ndarray
    fold_scores: np.ndarray
    accuracy: np.ndarray | None
    chance: np.ndarray
    band: np.ndarray
    null_scores: np.ndarray
    p_values: np.ndarray
    span: int
    first_lag: int
    level: float
    cross_temporal: np.ndarray | None
    weight_similarity: np.ndarray
    drift: np.ndarray
    slope: float
    categorical: bool
    classes: np.ndarray | None
    score_name: str
    n_rows: np.ndarray
    metadata: Mapping[str, Any] | None = None

    def __post_init__(self) -> None:
        for name in ("lags", "scores", "spread", "fold_scores", "accuracy", "chance", "band",
                     "null_scores", "p_values", "cross_temporal", "weight_similarity", "drift",
                     "classes", "n_rows"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, readonly(value))
        object.__setattr__(self, "metadata", frozen_mapping(self.metadata))

    @property
    def max_lag(self) -> int:
        return int(self.lags[-1])

    @property
    def peak_score(self) -> float:
        """The best score over the lags (NaN when no lag could be scored)."""
        finite = self.scores[np.isfinite(self.scores)]
        return float(finite.max()) if finite.size else math.nan

    @property
    def statement(self) -> str:
        """The span in plain words, with the confidence it is stated at."""
        P = self.null_scores.shape[0]
        conf = f"{100 * (1 - self.level):.0f}%"
        if self.span < 0:
            return (f"no lag decoded above the {conf} chance band ({P} permutations); the "
                    "linear decoder finds no trace of the variable")
        end = "" if self.span < self.max_lag else f" (up to max_lag={self.max_lag}: raise it)"
        return (f"decoded above the {conf} chance band ({P} permutations, per lag) from lag "
                f"{self.first_lag} to lag {self.span}{end}; peak {self.score_name} "
                f"{self.peak_score:.3g}")

    def to_frame(self):
        """Table with one row per lag: score, spread, accuracy, chance, band, p-value, drift."""
        import pandas as pd

        cols = {"score": self.scores, "spread": self.spread}
        if self.accuracy is not None:
            cols["accuracy"] = self.accuracy
        cols.update(chance=self.chance, band=self.band, p_value=self.p_values,
                    drift_deg=self.drift, n_rows=self.n_rows)
        frame = pd.DataFrame(cols, index=pd.Index(self.lags, name="lag"))
        frame.attrs.update(span=self.span, first_lag=self.first_lag, level=self.level,
                           score_name=self.score_name, slope=self.slope)
        return frame

    def plot(self, ax: Any = None, *, kind: str = "curve", **kw: Any):
        """Draw the score curve with its chance band (``kind="curve"``) or the cross-temporal
        matrix (``kind="cross_temporal"``).

        Returns
        -------
        matplotlib Axes
        """
        from .._plotting.task_memory import draw_task_memory

        return draw_task_memory(self, ax, kind=kind, **kw)

    def __repr__(self) -> str:
        return (f"TaskMemory(max_lag={self.max_lag}, span={self.span}, "
                f"peak={self.peak_score:.3g}, score={self.score_name!r})")


# ====================================================================== entry point
def task_memory(
    trace: Trace,
    targets: Any,
    *,
    onsets: Any = None,
    max_lag: int | None = None,
    categorical: bool | None = None,
    parts: str | Sequence[str] | None = None,
    n_folds: int = 5,
    n_permutations: int = 20,
    level: float = 0.05,
    alphas: float | Sequence[float] | None = None,
    C: float = 1.0,
    cross_temporal: bool = True,
    max_rows: int = 20000,
    max_iter: int = 300,
    seed: int = 0,
) -> TaskMemory:
    """Decode a task variable from the state at each lag after its onset.

    Parameters
    ----------
    trace : Trace
        Recorded states (B, T, S).
    targets : array_like of shape (B,) or (B, T)
        Per sequence (B,): one value per sequence (a cue's identity); lag k reads it from the
        state ``s[b, onsets[b] + k]``. Per step (B, T): lag k reads ``targets[b, t - k]`` from
        ``s[b, t]``, pooled over the steps ``t >= onsets[b] + max_lag`` (the same rows at every
        lag). Integers, booleans and strings are categories; floats are continuous.
    onsets : array_like of int, shape (B,), optional
        The event step of each sequence that lags count from (default 0, the first step).
    max_lag : int, optional
        The largest lag. Default: per-sequence targets ``min(100, T - 1 - max(onsets))``;
        per-step targets ``min(50, (T - max(onsets)) // 2)``.
    categorical : bool, optional
        Force the kind of target; default from the dtype.
    parts : str or list of str, optional
        Named parts of the state to decode from (default: the whole state).
    n_folds : int, default 5
        Cross-validation folds; whole sequences are held out (a seeded shuffle assigns them, see
        ``metadata["fold_of"]``).
    n_permutations : int, default 20
        Refits on targets permuted across sequences, for the chance band (categories: a
        closed-form ridge classifier with penalty 1 / C; continuous: the ridge decoder).
    level : float, default 0.05
        Per-lag significance of the band; needs ``n_permutations >= 1 / level - 1``.
    alphas : float or sequence of float, optional
        Continuous targets: ridge penalties on standardised states; each fold chooses one per lag
        by exact leave-one-out error on its training rows, as scikit-learn's ``RidgeCV``.
        Default 1e-3..1e5.
    C : float, default 1.0
        Categorical targets: inverse L2 penalty of the logistic decoder on standardised states,
        as scikit-learn's ``LogisticRegression(C=C)`` (sigmoid for two classes, softmax for more).
    cross_temporal : bool, default True
        Also score every lag's decoder at every other lag.
    max_rows : int, default 20000
        Per-step targets: at most this many (sequence, step) rows, a seeded draw.
    max_iter : int, default 300
        Iterations of the batched Newton (small decoders) or L-BFGS fit of the logistic
        decoders.
    seed : int, default 0
        Seed of the local generator for the folds, the permutations and the row draw.

    Returns
    -------
    TaskMemory

    Notes
    -----
    All lags (and all permutations) are fitted together: the ridge decoders of a fold share one
    batched eigendecomposition per lag, and the logistic decoders of the unpermuted targets are
    one batched L-BFGS problem. The categorical chance band comes from a ridge classifier
    (least squares on one-hot targets, one Cholesky factor per lag for every permutation), a
    linear decoder at chance on permuted targets as the logistic one is, but not the same
    estimator. Cautions: linear decoding is a lower bound; the chance band is finite-sample and
    per lag; targets permuted across sequences keep each sequence's time structure.

    References
    ----------
    J.-R. King, S. Dehaene (2014). Characterizing the dynamics of mental representations: the
    temporal generalization method. Trends in Cognitive Sciences 18(4), 203-210.
    M. Ojala, G. C. Garriga (2010). Permutation tests for studying classifier performance.
    Journal of Machine Learning Research 11, 1833-1863.
    """
    if not isinstance(trace, Trace):
        raise TypeError(f"trace must be a hiddenlens Trace, got {type(trace).__name__}; record "
                        "one with hiddenlens.record(model, inputs) (with a system first, call "
                        "task_memory_analysis(system, trace, targets=...))")
    opts = _check(trace, targets, onsets, max_lag, categorical, parts, n_folds, n_permutations,
                  level, alphas, C, max_rows, max_iter, seed)
    rng = np.random.default_rng(seed)
    B = trace.batch_size
    L = opts["max_lag"] + 1
    cols = trace.columns(opts["parts"])
    fold_of = np.empty(B, dtype=np.int64)
    for f, group in enumerate(np.array_split(rng.permutation(B), opts["n_folds"])):
        fold_of[group] = f
    perms = np.stack([np.arange(B)] + [rng.permutation(B) for _ in range(n_permutations)])
    X, Y, M, row_seq = _rows(trace, cols, opts, perms, rng)
    # X (G, N, S); Y (G, N, L_or_1, R) codes or values; M (G, N) row present; G = L or 1
    fit = _fit_ridge if not opts["categorical"] else _fit_logistic
    n_f = opts["n_folds"]
    R = perms.shape[0]
    fold_scores = np.full((n_f, L, R), np.nan)
    fold_acc = np.full((n_f, L, R), np.nan) if opts["categorical"] else None
    cross = np.full((n_f, L, L), np.nan) if cross_temporal else None
    weights = []
    chosen = []
    # one thread for small batched work: on a busy machine a second thread waiting for a core
    # turns each small product into milliseconds (see hiddenlens._core.threads)
    # the logistic fits too, whatever their size: L-BFGS's two-loop recursion is thousands of
    # vector products and updates of the flat parameters, each a few microseconds on one
    # thread and 3 ms on two under load (measured: 97 of 174 s of an H=256, 101-lag fit)
    small = X.shape[0] * X.shape[1] * X.shape[2] < 4_000_000 or opts["categorical"]
    for f in range(n_f):
        train = torch.as_tensor(fold_of[row_seq] != f)
        tr_m, te_m = M & train[None], M & ~train[None]
        with single_thread(small):
            if opts["categorical"]:
                # logistic for the reported scores; the permutation null from the closed-form
                # ridge classifier (least squares on one-hot targets), see docs/task_memory.md
                out = fit(X, Y[..., :1], tr_m, te_m, opts, cross_temporal)
                if R > 1:
                    out["score"] = np.concatenate(
                        [out["score"], _null_ridge_classifier(X, Y[..., 1:], tr_m, te_m, opts)],
                        axis=1)
            else:
                out = fit(X, Y, tr_m, te_m, opts, cross_temporal)
        fold_scores[f] = out["score"]
        if fold_acc is not None:
            fold_acc[f] = out["accuracy"]
        if cross is not None:
            cross[f] = out["cross"]
        weights.append(out["weights"])
        chosen.append(out["chosen"])
    with np.errstate(all="ignore"), _quiet():
        scores_all = np.nanmean(fold_scores, axis=0)  # (L, R)
        scores, null = scores_all[:, 0], scores_all[:, 1:].T  # (L,), (P, L)
        spread = np.nanstd(fold_scores[:, :, 0], axis=0)
        accuracy = None if fold_acc is None else np.nanmean(fold_acc[:, :, 0], axis=0)
        chance = np.nanmean(null, axis=0) if R > 1 else np.full(L, np.nan)
        cross_mean = None if cross is None else np.nanmean(cross, axis=0)
    band, p_values = _band(scores, null, level)
    first, span = _span(scores > band)
    similarity, drift = _similarity(np.stack(weights), scores)
    slope = math.nan
    if first >= 0 and span > first:
        lags_run = np.arange(first, span + 1)
        good = np.isfinite(scores[lags_run])
        if good.sum() >= 2:
            slope = float(np.polyfit(lags_run[good], scores[lags_run][good], 1)[0])
    n_rows = M.sum(dim=1).numpy() if M.shape[0] == L else np.full(L, int(M.sum()))
    meta = {
        "fold_of": fold_of.tolist(), "n_folds": n_f, "n_permutations": n_permutations,
        "seed": seed, "per_step": opts["per_step"], "state_columns": int(len(cols)),
        "parts": opts["parts"], "onsets_given": onsets is not None,
        "decoder": "logistic" if opts["categorical"] else "ridge",
        "C": opts["C"] if opts["categorical"] else None,
        "alphas": np.stack(chosen).tolist() if not opts["categorical"] else None,
        "converged": bool(all(np.all(c) for c in chosen)) if opts["categorical"] else None,
    }
    return TaskMemory(
        lags=np.arange(L), scores=scores, spread=spread, fold_scores=fold_scores[:, :, 0],
        accuracy=accuracy, chance=chance, band=band, null_scores=null, p_values=p_values,
        span=span, first_lag=first, level=float(level), cross_temporal=cross_mean,
        weight_similarity=similarity, drift=drift, slope=slope,
        categorical=opts["categorical"], classes=opts["classes"],
        score_name="balanced accuracy" if opts["categorical"] else "test R²",
        n_rows=n_rows, metadata=meta,
    )


@wraps_analysis(task_memory, "inputs")
def task_memory_analysis(system: Any, trace: Trace, *, targets: Any, onsets: Any = None,
                         **options: Any) -> TaskMemory:
    """:func:`task_memory` in the analysis form ``function(system, trace, **options)``.

    The system is not needed (decoding reads the recorded states only); it is accepted so the
    analysis runs beside the others.
    """
    return task_memory(trace, targets, onsets=onsets, **options)


def task_memory_key_figures(result: TaskMemory) -> dict[str, Any]:
    """The headline numbers of a :class:`TaskMemory`: span, peak score and chance at the peak."""
    scores = np.where(np.isfinite(result.scores), result.scores, -np.inf)
    peak = int(np.argmax(scores))
    return {
        "task_span": int(result.span),
        "task_peak_score": result.peak_score,
        "task_chance": float(result.chance[peak]),
        "task_score_name": result.score_name,
        "task_confidence": 1.0 - result.level,
    }


# ====================================================================== options
class _quiet:
    """Silence numpy's 'mean of empty slice' warnings for lags without rows."""

    def __enter__(self):
        import warnings

        self._w = warnings.catch_warnings()
        self._w.__enter__()
        warnings.simplefilter("ignore", RuntimeWarning)
        return self

    def __exit__(self, *exc):
        self._w.__exit__(*exc)
        return False


def _int(name: str, value: Any, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise ValueError(f"{name} must be an integer >= {low}, got {value!r}")
    return int(value)


def _check(trace: Trace, targets: Any, onsets: Any, max_lag: Any, categorical: Any, parts: Any,
           n_folds: Any, n_permutations: Any, level: Any, alphas: Any, C: Any, max_rows: Any,
           max_iter: Any, seed: Any) -> dict[str, Any]:
    B, T = trace.batch_size, trace.n_steps
    if hasattr(targets, "detach"):
        targets = targets.detach().cpu().numpy()
    y = np.asarray(targets)
    if y.ndim == 2 and y.shape == (B, 1):
        y = y[:, 0]
    if y.shape not in ((B,), (B, T)):
        raise ValueError(f"targets has shape {y.shape} but the trace has B={B} sequences of T={T}"
                         f" steps; pass one value per sequence (shape ({B},)) or per step "
                         f"(shape ({B}, {T}))")
    per_step = y.ndim == 2
    if categorical not in (None, True, False):
        raise ValueError(f"categorical must be True, False or None (from the dtype), got "
                         f"{categorical!r}")
    if categorical is None:
        categorical = y.dtype.kind in "biuUSO"
    if not categorical:
        if y.dtype.kind not in "biuf":
            raise TypeError(f"continuous targets must be numbers, got dtype {y.dtype}; pass "
                            "categorical=True for labels")
        y = y.astype(np.float64)
        if not np.all(np.isfinite(y)):
            raise ValueError("targets hold NaN or inf; drop those sequences or pass finite "
                             "values")
        classes, codes = None, y
    else:
        classes, codes = np.unique(y, return_inverse=True)
        codes = codes.reshape(y.shape)
        if classes.size < 2:
            raise ValueError(f"targets hold a single class ({classes[0]!r}); decoding needs at "
                             "least two")
    if onsets is None:
        on = np.zeros(B, dtype=np.int64)
    else:
        if hasattr(onsets, "detach"):
            onsets = onsets.detach().cpu().numpy()
        on = np.asarray(onsets)
        if on.shape != (B,) or on.dtype.kind not in "iu":
            raise ValueError(f"onsets must be integer steps of shape ({B},), got "
                             f"{on.dtype} of shape {on.shape}; pass the event step of each "
                             "sequence")
        if on.min() < 0 or on.max() >= T:
            raise ValueError(f"onsets must lie in 0..{T - 1} (the recorded steps), got "
                             f"{int(on.min())}..{int(on.max())}")
        on = on.astype(np.int64)
    room = T - 1 - int(on.max())
    if max_lag is None:
        max_lag = min(100, room) if not per_step else min(50, (T - int(on.max())) // 2)
    max_lag = _int("max_lag", max_lag, 0)
    if per_step and int(on.max()) + max_lag >= T:
        raise ValueError(f"per-step targets with max_lag={max_lag} leave no rows: the latest "
                         f"onset is {int(on.max())} of {T} steps; pass a smaller max_lag")
    n_folds = _int("n_folds", n_folds, 2)
    if B < n_folds:
        raise ValueError(f"{B} sequences cannot be split into n_folds={n_folds} folds of whole "
                         "sequences; pass more sequences or fewer folds")
    n_permutations = _int("n_permutations", n_permutations, 0)
    if isinstance(level, bool) or not isinstance(level, (int, float, np.number)) \
            or not 0 < level < 1:
        raise ValueError(f"level must be a number in (0, 1), got {level!r}")
    if n_permutations and (n_permutations + 1) * level < 1:
        need = math.ceil(1 / level - 1)
        raise ValueError(f"{n_permutations} permutations cannot reach level={level} (the "
                         f"smallest p-value is 1/{n_permutations + 1}); pass n_permutations >= "
                         f"{need} or a larger level")
    alphas = check_alphas(alphas, DEFAULT_ALPHAS)
    if isinstance(C, bool) or not isinstance(C, (int, float, np.number)) \
            or not math.isfinite(C) or C <= 0:
        raise ValueError(f"C must be a positive finite number, got {C!r}")
    if parts is not None:
        names = [parts] if isinstance(parts, str) else list(parts)
        for n in names:
            trace.columns(n)  # KeyError naming the parts
        parts = names
    from .._core.record import valid_steps

    real = valid_steps(trace)
    n_real = np.full(B, T) if real is None else real.sum(axis=1)  # (B,) real steps
    if real is not None and np.any(on >= n_real):
        b = int(np.flatnonzero(on >= n_real)[0])
        raise ValueError(f"onset {int(on[b])} of sequence {b} lies in its padding (its length "
                         f"is {int(n_real[b])}); pass onsets inside each sequence")
    st = trace.states[..., trace.columns(parts)]
    if not np.all(np.isfinite(st if real is None else st[real])):
        raise ValueError("the trace holds NaN or inf states; decode a finite window "
                         "(trace.select(steps=...)) or fix the recording")
    return {"codes": codes, "classes": classes, "categorical": bool(categorical),
            "per_step": per_step, "onsets": on, "max_lag": max_lag, "n_folds": n_folds,
            "alphas": alphas, "C": float(C), "parts": parts,
            "max_rows": _int("max_rows", max_rows, 2 * n_folds),
            "max_iter": _int("max_iter", max_iter, 1), "seed": seed, "lengths": n_real}


def _rows(trace: Trace, cols: np.ndarray, opts: dict[str, Any], perms: np.ndarray,
          rng: np.random.Generator):
    """Design rows for every lag.

    Per-sequence targets: X (L, B, S), one row per sequence per lag, Y (L, B, 1, R) with R =
    1 + n_permutations target columns. Per-step targets: X (1, N, S) shared by the lags,
    Y (1, N, L, R). M marks rows that exist (a lag past the end of a sequence has none).
    """
    B, T = trace.batch_size, trace.n_steps
    L = opts["max_lag"] + 1
    on = opts["onsets"]
    states = trace.states[:, :, cols]  # (B, T, S)
    codes = opts["codes"]
    if not opts["per_step"]:
        t = on[None, :] + np.arange(L)[:, None]  # (L, B)
        present = t < opts["lengths"][None, :]  # a lag past a sequence's real end: no row
        X = states[np.arange(B)[None, :], np.minimum(t, T - 1)]  # (L, B, S)
        Y = codes[perms].T  # (B, R)
        Y = np.broadcast_to(Y[None, :, None, :], (L, B, 1, Y.shape[1]))
        return (torch.as_tensor(X, dtype=_F64), torch.as_tensor(np.ascontiguousarray(Y)),
                torch.as_tensor(present), np.arange(B))
    b_idx, t_idx = [], []
    for b in range(B):
        ts = np.arange(on[b] + L - 1, opts["lengths"][b])  # real steps only
        b_idx.append(np.full(ts.size, b))
        t_idx.append(ts)
    b_idx, t_idx = np.concatenate(b_idx), np.concatenate(t_idx)
    if b_idx.size > opts["max_rows"]:
        keep = np.sort(rng.choice(b_idx.size, opts["max_rows"], replace=False))
        b_idx, t_idx = b_idx[keep], t_idx[keep]
    X = states[b_idx, t_idx][None]  # (1, N, S)
    # targets[perm[b], t - k]: a permutation moves whole target sequences between sequences
    lagged_t = t_idx[:, None] - np.arange(L)[None, :]  # (N, L)
    Y = codes[perms.T[b_idx][:, None, :], lagged_t[:, :, None]]  # (N, L, R)
    return (torch.as_tensor(X, dtype=_F64), torch.as_tensor(np.ascontiguousarray(Y[None])),
            torch.ones(1, b_idx.size, dtype=torch.bool), b_idx)


# ====================================================================== fits
def _standardise(X: torch.Tensor, w: torch.Tensor):
    """Mean and (population) std of the rows marked by w, per group: (G, 1, S) each; constant
    columns keep scale 1 (scikit-learn's StandardScaler)."""
    wf = w.to(_F64)[..., None]  # (G, N, 1)
    n = wf.sum(dim=1, keepdim=True).clamp(min=1)
    mu = (X * wf).sum(dim=1, keepdim=True) / n
    var = (((X - mu) ** 2) * wf).sum(dim=1, keepdim=True) / n
    sd = var.sqrt()
    tiny = 10 * torch.finfo(_F64).eps * torch.clamp(mu.abs(), min=1.0)
    sd = torch.where(sd < tiny, torch.ones_like(sd), sd)
    return mu, sd


def _fit_ridge(X, Y, train, test, opts, want_cross):
    """Ridge decoders for every lag and permutation of one fold.

    NOTE: [One eigendecomposition per lag serves every penalty and permutation]
    With standardised, centred training rows Xc = V diag(lam) V^T (Gram), the ridge solution for
    any target y is V diag(1 / (lam + a)) V^T Xc^T y, and the exact leave-one-out residual is
    (y_i - yhat_i) / (1 - h_ii), h_ii = 1/n + sum_j P_ij^2 / (lam_j + a), P = Xc V (intercept
    unpenalised), which chooses the penalty per target as scikit-learn's RidgeCV does.
    """
    G, N, S = X.shape
    _, _, Lq, R = Y.shape
    Yf = Y.to(_F64).reshape(G, N, Lq * R)
    mu, sd = _standardise(X, train)
    Xs = (X - mu) / sd  # (G, N, S)
    wt = train.to(_F64)[..., None]  # (G, N, 1)
    n = wt.sum(dim=1)  # (G, 1)
    Xc = (Xs - (Xs * wt).sum(dim=1, keepdim=True) / n[..., None]) * wt
    ybar = (Yf * wt).sum(dim=1, keepdim=True) / n[..., None]  # (G, 1, Q)
    Yc = (Yf - ybar) * wt
    lam, V = torch.linalg.eigh(Xc.transpose(1, 2) @ Xc)  # (G, S), (G, S, S)
    lam = lam.clamp(min=0.0)
    P = Xc @ V  # (G, N, S)
    A = P.transpose(1, 2) @ Yc  # (G, S, Q)
    P2 = P * P
    best = torch.full((G, A.shape[2]), math.inf, dtype=_F64)
    best_a = torch.full_like(best, float(opts["alphas"].max()))
    for a in opts["alphas"]:
        d = 1.0 / (lam + a)  # (G, S)
        h = 1.0 / n + (P2 @ d[..., None])[..., 0]  # (G, N)
        fitted = P @ (d[..., None] * A)  # (G, N, Q)
        res = (Yc - fitted * wt) / (1.0 - h)[..., None].clamp(min=1e-12)
        err = (res * res * wt).sum(dim=1)  # (G, Q)
        better = err < best
        best = torch.where(better, err, best)
        best_a = torch.where(better, torch.full_like(best_a, float(a)), best_a)
    coef = A / (lam[..., None] + best_a[:, None, :])  # (G, S, Q) in the eigenbasis
    beta = V @ coef  # (G, S, Q) in standardised units
    pred = Xs @ beta + ybar  # (G, N, Q)
    pred = pred.reshape(G, N, Lq, R)
    Yf = Yf.reshape(G, N, Lq, R)
    if G > 1:  # per-sequence: lag = group
        score = _r2(Yf[:, :, 0], pred[:, :, 0], test)  # (L, R)
    else:  # per-step: lag = target column
        score = _r2(Yf[0].transpose(0, 1), pred[0].transpose(0, 1), test.expand(Lq, N))
    # effective weights in state units for the unpermuted targets, (L, S), and bias (L,)
    beta0 = beta.reshape(G, S, Lq, R)[..., 0]  # (G, S, Lq)
    w_eff = beta0 / sd.transpose(1, 2)  # (G, S, Lq)
    c_eff = ybar.reshape(G, Lq, R)[..., 0] - ((mu / sd) @ beta0)[:, 0, :]  # (G, Lq)
    if G > 1:
        W, c = w_eff[:, :, 0], c_eff[:, 0]  # (L, S), (L,)
    else:
        W, c = w_eff[0].T, c_eff[0]  # (L, S), (L,)
    cross = None
    if want_cross:
        L = W.shape[0]
        Xt = X if G > 1 else X.expand(L, N, S)
        cp = torch.einsum("jns,is->ijn", Xt, W) + c[:, None, None]  # (L_i, L_j, N)
        yt = (Yf[:, :, 0, 0] if G > 1 else Yf[0, :, :, 0].T)  # (L_j, N)
        tm = test if G > 1 else test.expand(L, N)
        cross = _r2(yt[None].expand(L, L, N).reshape(L * L, N).T,
                    cp.reshape(L * L, N).T, tm[None].expand(L, L, N).reshape(L * L, N).T,
                    rows_first=True).reshape(L, L).numpy()
    return {"score": score.numpy(), "cross": cross, "weights": W.numpy(),
            "chosen": best_a.reshape(G, Lq, R)[..., 0].reshape(-1).numpy()}


def _r2(y, pred, mask, rows_first: bool = False):
    """R^2 per column over the rows in mask, scikit-learn's r2_score conventions for constant
    targets. Shapes (G, N, R) with mask (G, N); or rows_first (N, Q) with mask (N, Q)."""
    if rows_first:
        m = mask.to(_F64)
        n = m.sum(dim=0).clamp(min=1)
        ybar = (y * m).sum(dim=0) / n
        sse = (((y - pred) ** 2) * m).sum(dim=0)
        sst = (((y - ybar) ** 2) * m).sum(dim=0)
        empty = mask.sum(dim=0) < 2
    else:
        m = mask.to(_F64)[..., None]  # (G, N, 1)
        n = m.sum(dim=1).clamp(min=1)
        ybar = (y * m).sum(dim=1) / n
        sse = (((y - pred) ** 2) * m).sum(dim=1)
        sst = (((y - ybar[:, None]) ** 2) * m).sum(dim=1)
        empty = (mask.sum(dim=1) < 2)[:, None].expand_as(sse)
    r2 = 1.0 - sse / torch.where(sst > 0, sst, torch.ones_like(sst))
    r2 = torch.where(sst > 0, r2, torch.where(sse > 0, 0.0, 1.0).to(_F64))
    return torch.where(empty, torch.full_like(r2, math.nan), r2)


def _fit_logistic(X, Y, train, test, opts, want_cross):
    """L2-penalised logistic decoders for every lag and permutation of one fold, as one batched
    L-BFGS problem (the problems are independent, so the minimiser of their sum is each one's
    minimiser). Objective per problem: sum_i loss_i + ||W||^2 / (2 C), intercept unpenalised,
    which has the minimiser of scikit-learn's LogisticRegression(C=C)."""
    G, N, S = X.shape
    _, _, Lq, R = Y.shape
    K = opts["classes"].size
    out_dim = 1 if K == 2 else K
    mu, sd = _standardise(X, train)
    Xs = (X - mu) / sd  # (G, N, S)
    Yl = Y.to(torch.long)  # (G, N, Lq, R)
    wt = train.to(_F64)[:, :, None, None]  # (G, N, 1, 1)
    Q = Lq * R * out_dim
    W = torch.zeros(G, S, Q, dtype=_F64)
    b = torch.zeros(G, 1, Q, dtype=_F64)
    pen = 0.5 / opts["C"]
    onehot = None if out_dim == 1 else torch.nn.functional.one_hot(Yl, K).to(_F64)
    XsT = Xs.transpose(1, 2)

    def logits_of(W, b):
        return (Xs @ W + b).reshape(G, N, Lq, R, out_dim)

    def loss_and_grad(W, b):
        # analytic gradient: X^T (p - y) w + W / C; cheaper than autograd on these shapes
        z = logits_of(W, b)
        if out_dim == 1:
            z0, y = z[..., 0], Yl.to(_F64)
            per = torch.nn.functional.softplus(z0) - z0 * y
            resid = (torch.sigmoid(z0) - y)[..., None]
        else:
            lse = torch.logsumexp(z, dim=-1, keepdim=True)
            per = (lse - (z * onehot).sum(dim=-1, keepdim=True))[..., 0]
            resid = torch.exp(z - lse) - onehot
        resid = (resid * wt[..., None]).reshape(G, N, Q)
        loss = (per * wt).sum() + pen * (W * W).sum()
        return loss, XsT @ resid + 2 * pen * W, resid.sum(dim=1, keepdim=True)

    D = (S + 1) * out_dim
    # Newton up to a few hundred parameters per decoder (the shipped 32-unit GRU's three-class
    # decoders have 99: 1.3 s for 51 lags against 5.6 s by L-BFGS); bounded work per iteration
    newton = D <= 400 and G * N * Lq * R * D * D <= 2e8
    if newton:
        W, b = _newton_logistic(Xs, Yl.reshape(G, N, Lq * R), train.to(_F64), K, out_dim,
                                2 * pen, opts["max_iter"])
    else:
        # built only when used: the first torch optimiser of a process imports torch's
        # compiler stack (about 800 modules, seconds on a busy machine)
        W.grad, b.grad = torch.zeros_like(W), torch.zeros_like(b)
        opt = torch.optim.LBFGS([W, b], lr=1.0, max_iter=opts["max_iter"], history_size=30,
                                tolerance_grad=1e-7, tolerance_change=1e-12,
                                line_search_fn="strong_wolfe")

        def closure():
            loss, gW, gb = loss_and_grad(W, b)
            W.grad.copy_(gW)
            b.grad.copy_(gb)
            return loss

        with torch.no_grad():
            opt.step(closure)
    with torch.no_grad():
        _, gW, gb = loss_and_grad(W, b)
    # a problem converged when its gradient is small against its number of rows
    gmax = torch.maximum(gW.abs().amax(dim=1), gb.abs().amax(dim=1))  # (G, Q)
    converged = (gmax.reshape(G, Lq, R, out_dim).amax(dim=-1) < 1e-4 * max(N, 1)).numpy()
    z = logits_of(W, b)
    pred = (z[..., 0] > 0).to(torch.long) if out_dim == 1 else z.argmax(dim=-1)  # (G, N, Lq, R)
    if G > 1:
        bal, acc = _class_scores(Yl[:, :, 0], pred[:, :, 0], test[:, :, None], K)  # (L, R)
    else:
        bal, acc = _class_scores(Yl[0].transpose(0, 1), pred[0].transpose(0, 1),
                                 test.expand(Lq, N)[:, :, None], K)
    # effective weights in state units for the unpermuted targets
    Wr = W.reshape(G, S, Lq, R, out_dim)[:, :, :, 0]  # (G, S, Lq, out)
    br = b.reshape(G, 1, Lq, R, out_dim)[:, 0, :, 0]  # (G, Lq, out)
    Weff = Wr / sd.transpose(1, 2)[..., None]  # (G, S, Lq, out)
    beff = br - torch.einsum("gs,gsqo->gqo", (mu / sd)[:, 0], Wr)
    if G > 1:
        We, be = Weff[:, :, 0], beff[:, 0]  # (L, S, out), (L, out)
    else:
        We, be = Weff[0].permute(1, 0, 2), beff[0]
    cross = None
    L = We.shape[0]
    if want_cross:
        Xt = X if G > 1 else X.expand(L, N, S)
        z = torch.einsum("jns,iso->ijno", Xt, We) + be[:, None, None, :]  # (L, L, N, out)
        cp = (z[..., 0] > 0).to(torch.long) if out_dim == 1 else z.argmax(dim=-1)
        yt = Yl[:, :, 0, 0] if G > 1 else Yl[0, :, :, 0].T  # (L_j, N)
        tm = test if G > 1 else test.expand(L, N)
        bal_x, _ = _class_scores(yt[None].expand(L, L, N).reshape(L * L, N),
                                 cp.reshape(L * L, N),
                                 tm[None].expand(L, L, N).reshape(L * L, N)[:, :, None], K,
                                 single=True)
        cross = bal_x.reshape(L, L)
    Wflat = We - We.mean(dim=-1, keepdim=True) if out_dim > 1 else We
    return {"score": bal, "accuracy": acc, "cross": cross,
            "weights": Wflat.reshape(L, -1).numpy() if out_dim == 1 else
            Wflat.permute(0, 2, 1).reshape(L, -1).numpy(),
            "chosen": converged.reshape(-1)}


def _newton_logistic(Xs, Yl, w, K, out_dim, lam, max_iter):
    """Newton's method with step halving for small batched logistic problems.

    Xs (G, N, S) standardised rows, Yl (G, N, Q) class codes, w (G, N) training-row weights;
    objective sum_i w_i loss_i + lam ||W||^2 / 2 (intercept unpenalised). Returns W (G, S,
    Q * out_dim) and b (G, 1, Q * out_dim) in the layout of :func:`_fit_logistic`."""
    G, N, S = Xs.shape
    Q = Yl.shape[2]
    A = S + 1
    Xa = torch.cat([Xs, torch.ones(G, N, 1, dtype=_F64)], dim=2)  # (G, N, A)
    pen = torch.ones(A, dtype=_F64)
    pen[-1] = 0.0
    if out_dim == 1:
        Yt = Yl.to(_F64)[..., None]  # (G, N, Q, 1)
    else:
        Yt = torch.nn.functional.one_hot(Yl, K).to(_F64)  # (G, N, Q, K)
    theta = torch.zeros(G, Q, A, out_dim, dtype=_F64)
    wn = w[:, :, None]  # (G, N, 1)

    def objective(th):  # (..., G, Q, A, out) -> (..., G, Q)
        z = torch.einsum("gna,...gqao->...gnqo", Xa, th)
        if out_dim == 1:
            per = torch.nn.functional.softplus(z[..., 0]) - z[..., 0] * Yt[..., 0]
        else:
            per = torch.logsumexp(z, dim=-1) - (z * Yt).sum(dim=-1)
        return (per * wn).sum(dim=-2) + 0.5 * lam * (th * th * pen[:, None]).sum(dim=(-2, -1))

    steps = torch.tensor([0.5 ** i for i in range(12)], dtype=_F64)
    eye = torch.eye(A * out_dim, dtype=_F64)
    for _ in range(max_iter):
        z = torch.einsum("gna,gqao->gnqo", Xa, theta)
        if out_dim == 1:
            p = torch.sigmoid(z)
            c = (p * (1 - p) * wn[..., None])[..., None]  # (G, N, Q, 1, 1)
        else:
            p = torch.softmax(z, dim=-1)
            c = (torch.diag_embed(p) - p[..., :, None] * p[..., None, :]) * wn[..., None, None]
        grad = torch.einsum("gna,gnqo->gqao", Xa, (p - Yt) * wn[..., None]) \
            + lam * theta * pen[:, None]
        hess = torch.einsum("gna,gnqkl,gnb->gqkalb", Xa, c, Xa).reshape(G, Q, A * out_dim,
                                                                        A * out_dim)
        hess = hess + torch.diag_embed((lam * pen).repeat(out_dim)) + 1e-9 * (N + 1) * eye
        g = grad.permute(0, 1, 3, 2).reshape(G, Q, A * out_dim)
        step = torch.linalg.solve(hess, g[..., None])[..., 0]
        step = step.reshape(G, Q, out_dim, A).permute(0, 1, 3, 2)
        if float(g.abs().max()) < 1e-10 * max(N, 1):
            break
        f0 = objective(theta)
        trial = theta[None] - steps[:, None, None, None, None] * step[None]
        ft = objective(trial)  # (n_steps, G, Q)
        ok = ft <= f0[None]
        first = torch.where(ok.any(dim=0), ok.to(torch.int64).argmax(dim=0),
                            torch.full_like(f0, len(steps) - 1, dtype=torch.int64))
        theta = theta - steps[first][..., None, None] * step
    W = theta[:, :, :S, :].permute(0, 2, 1, 3).reshape(G, S, Q * out_dim)
    b = theta[:, :, S, :].reshape(G, 1, Q * out_dim)
    return W.contiguous(), b.contiguous()


def _null_ridge_classifier(X, Y, train, test, opts):
    """Balanced accuracy of ridge classifiers fitted to permuted targets, for the chance band.

    Least squares on one-hot targets of the standardised, centred training rows with penalty
    1 / C (scikit-learn's RidgeClassifier, multi-output): one Cholesky factor of the fold's Gram
    per lag serves every permutation, and the class of a row is the largest output. Returns
    (L, P)."""
    G, N, S = X.shape
    _, _, Lq, P = Y.shape
    K = opts["classes"].size
    mu, sd = _standardise(X, train)
    Xs = (X - mu) / sd
    wt = train.to(_F64)[..., None]  # (G, N, 1)
    n = wt.sum(dim=1, keepdim=True).clamp(min=1)  # (G, 1, 1)
    Yl = Y.to(torch.long)
    Yo = torch.nn.functional.one_hot(Yl, K).to(_F64).reshape(G, N, Lq * P * K)
    xbar = (Xs * wt).sum(dim=1, keepdim=True) / n
    ybar = (Yo * wt).sum(dim=1, keepdim=True) / n
    Xc = (Xs - xbar) * wt
    gram = Xc.transpose(1, 2) @ Xc + (1.0 / opts["C"]) * torch.eye(S, dtype=_F64)
    chol = torch.linalg.cholesky(gram)
    beta = torch.cholesky_solve(Xc.transpose(1, 2) @ (Yo - ybar), chol)  # (G, S, Q)
    z = ((Xs - xbar) @ beta + ybar).reshape(G, N, Lq, P, K)
    pred = z.argmax(dim=-1)  # (G, N, Lq, P)
    if G > 1:
        bal, _ = _class_scores(Yl[:, :, 0], pred[:, :, 0], test[:, :, None], K)
    else:
        bal, _ = _class_scores(Yl[0].transpose(0, 1), pred[0].transpose(0, 1),
                               test.expand(Lq, N)[:, :, None], K)
    return bal


def _class_scores(y, pred, mask, K, single: bool = False):
    """Balanced accuracy (mean recall over classes present) and accuracy over masked rows.

    y, pred (G, N, R) and mask (G, N, 1); or with ``single`` y, pred (G, N), mask (G, N, 1).
    Returns numpy arrays (G, R) (or (G,) with ``single``)."""
    if single:
        y, pred = y[..., None], pred[..., None]
    m = mask.expand_as(y)
    hit = (y == pred) & m
    n = m.sum(dim=1).to(_F64)  # (G, R)
    acc = hit.sum(dim=1).to(_F64) / n.clamp(min=1)
    recalls, present = [], []
    for k in range(K):
        is_k = (y == k) & m
        cnt = is_k.sum(dim=1).to(_F64)
        recalls.append((hit & is_k).sum(dim=1).to(_F64) / cnt.clamp(min=1))
        present.append(cnt > 0)
    rec, pres = torch.stack(recalls), torch.stack(present).to(_F64)
    bal = (rec * pres).sum(dim=0) / pres.sum(dim=0).clamp(min=1)
    nan = torch.full_like(bal, math.nan)
    bal, acc = torch.where(n > 0, bal, nan), torch.where(n > 0, acc, nan)
    if single:
        bal, acc = bal[..., 0], acc[..., 0]
    return bal.numpy(), acc.numpy()


# ====================================================================== band and span
def _band(scores: np.ndarray, null: np.ndarray, level: float):
    """Upper edge of the chance band and per-lag permutation p-values.

    p = (1 + #{null >= score}) / (P + 1) (Ojala & Garriga 2010; scikit-learn's
    permutation_test_score); p <= level exactly when the score beats the (m + 1)-th largest null
    score, m = floor(level (P + 1) - 1), which is the band.
    """
    P, L = null.shape
    if P == 0:
        return np.full(L, -np.inf), np.full(L, np.nan)
    ordered = -np.sort(-np.where(np.isfinite(null), null, -np.inf), axis=0)  # descending
    m = int(math.floor(level * (P + 1) - 1 + 1e-9))
    band = ordered[min(m, P - 1)]
    with np.errstate(invalid="ignore"):
        p = (1 + (null >= scores[None]).sum(axis=0)) / (P + 1)
    p = np.where(np.isfinite(scores), p, np.nan)
    return band, p


def _span(above: np.ndarray) -> tuple[int, int]:
    idx = np.flatnonzero(above)
    if idx.size == 0:
        return -1, -1
    first = int(idx[0])
    below = np.flatnonzero(~above[first:])
    return first, first + (int(below[0]) - 1 if below.size else int(above.size - first - 1))


def _similarity(weights: np.ndarray, scores: np.ndarray):
    """|cos| between the decoders' weight vectors at every pair of lags (mean over folds), and
    the angle of each lag's decoder to the best lag's."""
    norms = np.linalg.norm(weights, axis=2, keepdims=True)  # (F, L, 1)
    unit = weights / np.where(norms > 0, norms, 1.0)
    sim = np.abs(np.einsum("fis,fjs->fij", unit, unit)).mean(axis=0)  # (L, L)
    best = int(np.argmax(np.where(np.isfinite(scores), scores, -np.inf)))
    drift = np.degrees(np.arccos(np.clip(sim[best], 0.0, 1.0)))
    return sim, drift
