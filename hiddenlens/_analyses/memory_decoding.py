"""Memory by decoding: ridge (or logistic-score) read-outs of past inputs from the state,
cross-validated over folds of sequences or time blocks (the method="decoding" of memory_curve)."""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from .._core.options import progress_bar
from .._core.trace import Trace
from .memory import (
    MemoryCurve,
    MemoryRangeWarning,
    _lengths,
    _span,
)


# ====================================================================== decoding
def _decoding(trace: Trace, cols: np.ndarray, opts: dict[str, Any], meta: dict[str, Any],
              progress: bool | None) -> MemoryCurve:
    B, T_all = trace.batch_size, trace.n_steps
    n_b = _lengths(trace)  # (B,) real steps of each sequence
    T = int(n_b.max())
    K = opts["max_lag"]
    t_start = max(opts["washout"], K)
    if T - t_start < 2 * opts["n_folds"]:
        raise ValueError(
            f"sequences of {T} steps leave {max(T - t_start, 0)} usable steps after "
            f"max(washout, max_lag) = {t_start}; decoding needs at least {2 * opts['n_folds']}: "
            "pass longer sequences, a smaller max_lag or a smaller washout"
        )
    b_idx = np.repeat(np.arange(B), T - t_start)
    t_idx = np.tile(np.arange(t_start, T), B)
    keep = t_idx < n_b[b_idx]  # rows on real steps only
    b_idx, t_idx = b_idx[keep], t_idx[keep]
    X = trace.states[b_idx, t_idx][:, cols].astype(np.float64)  # (N, S)
    folds, split = _folds(b_idx, t_idx, B, t_start, T, opts["n_folds"], gap=K)
    inputs = trace.inputs.astype(np.float64)  # (B, T, I)
    span_real = (np.arange(T_all)[None, :] >= t_start - K) & (
        np.arange(T_all)[None, :] < n_b[:, None])  # (B, T) every target step
    categorical = bool(opts["categorical"])
    lags = np.arange(K + 1)
    chance = None
    if categorical:
        tokens = inputs.argmax(axis=2)  # (B, T)
        classes = np.unique(tokens[span_real])  # every target step
        target = _Targets(tokens, b_idx, t_idx, classes=classes)
        chance = 1.0 / classes.size
    else:
        target = _Targets(inputs, b_idx, t_idx)
    fold_scores, feature_scores, chosen = _ridge_cv(X, target, K, folds, opts["alphas"],
                                                    progress)
    scores = fold_scores.mean(axis=0)
    adjusted = scores if chance is None else (scores - chance) / (1.0 - chance)
    weighted = None
    if not categorical:
        var = inputs[span_real].var(axis=0)  # (I,) over every target step
        if var.sum() > 0:
            weighted = feature_scores @ var / var.sum()  # (K + 1,)
        if np.nanmin(scores) < -1:
            warnings.warn(
                f"the decoders score test R^2 down to {np.nanmin(scores):.3g} (below -1: "
                "worse than predicting the mean); the states may lie far outside what the "
                "readout saw in training (probe inputs pushing the state out of its usual "
                "range, or too few rows): decode the model's own inputs (mode='data') or "
                "lower scale", MemoryRangeWarning, stacklevel=4)
    base = base_spread = base_cap = None
    if opts["mode"] == "data":
        w = opts["baseline_window"]
        if w > t_start:
            raise ValueError(f"baseline_window={w} reaches before the first usable step "
                             f"{t_start}; pass baseline_window <= {t_start} or a larger washout")
        window = np.stack([inputs[b_idx, t_idx - j] for j in range(w + 1)], axis=1)
        base_folds, _, _ = _ridge_cv(window.reshape(len(b_idx), -1), target, K, folds,
                                     opts["alphas"], progress=False)
        base, base_spread = base_folds.mean(axis=0), base_folds.std(axis=0)
        base_adj = base if chance is None else (base - chance) / (1.0 - chance)
        base_cap = float(np.clip(base_adj, 0, None).sum())
    meta.update(split=split, n_folds=len(folds), n_rows=int(X.shape[0]), first_row_step=t_start,
                n_train=[int(len(tr)) for tr, _ in folds],
                baseline_window=opts["baseline_window"] if base is not None else None)
    return MemoryCurve(
        method="decoding", mode=opts["mode"], lags=lags, scores=scores,
        spread=fold_scores.std(axis=0), samples=fold_scores,
        capacity=float(np.clip(adjusted, 0, None).sum()),
        span=_span(adjusted, opts["threshold"]), threshold=opts["threshold"],
        score_name="balanced accuracy" if categorical else "test R²",
        baseline=base, baseline_spread=base_spread, baseline_capacity=base_cap, chance=chance,
        feature_scores=None if categorical else feature_scores, alphas=chosen,
        categorical=categorical, metadata=meta, weighted_scores=weighted,
    )


def _folds(b_idx: np.ndarray, t_idx: np.ndarray, B: int, t_start: int, T: int, n_folds: int,
           gap: int) -> tuple[list[tuple[np.ndarray, np.ndarray]], str]:
    """Contiguous test folds: whole sequences when there are enough, else blocks of time.

    Rows of a block split are neighbours in time of the held-out block; training rows within
    ``gap`` steps of it are dropped, so no state in training shares inputs of the last ``gap``
    steps with a held-out row.
    """
    folds = []
    if B >= n_folds:
        for group in np.array_split(np.arange(B), n_folds):
            test = np.isin(b_idx, group)
            folds.append((np.flatnonzero(~test), np.flatnonzero(test)))
        return folds, "sequences"
    for block in np.array_split(np.arange(t_start, T), n_folds):
        lo, hi = int(block[0]), int(block[-1])
        test = (t_idx >= lo) & (t_idx <= hi)
        train = (t_idx < lo - gap) | (t_idx > hi + gap)
        if train.sum() < 2:
            raise ValueError(
                f"too few steps for {n_folds} time-block folds with a gap of {gap} steps "
                f"({T - t_start} usable steps per sequence); pass more or longer sequences "
                f"(at least n_folds={n_folds} sequences split by sequence), fewer folds or a "
                "smaller max_lag"
            )
        folds.append((np.flatnonzero(train), np.flatnonzero(test)))
    return folds, "time blocks"


class _Targets:
    """Targets x_{t-k} of every row for a range of lags, built on demand (lag-major columns).

    Real-valued: I columns per lag. Categorical: one +-1 column per class per lag (the coding
    of scikit-learn's RidgeClassifier), the alpha chosen per lag.
    """

    def __init__(self, source: np.ndarray, b_idx: np.ndarray, t_idx: np.ndarray,
                 classes: np.ndarray | None = None) -> None:
        self.source, self.b, self.t, self.classes = source, b_idx, t_idx, classes
        self.width = source.shape[2] if classes is None else classes.size

    def block(self, lags: np.ndarray) -> np.ndarray:
        """(N, n_lags * width) targets for ``lags``."""
        vals = self.source[self.b[:, None], self.t[:, None] - lags[None, :]]  # (N, n_lags[, I])
        if self.classes is None:
            return vals.reshape(len(self.b), -1)
        onehot = vals[:, :, None] == self.classes[None, None, :]  # (N, n_lags, C)
        return (2.0 * onehot - 1.0).reshape(len(self.b), -1)

    def tokens(self, lags: np.ndarray) -> np.ndarray:
        return self.source[self.b[:, None], self.t[:, None] - lags[None, :]]  # (N, n_lags)


def _standardise(X_train: np.ndarray, X_test: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Scale by the training rows' mean and (population) std, as scikit-learn's StandardScaler;
    constant columns keep scale 1."""
    mu = X_train.mean(axis=0)
    sd = X_train.std(axis=0)
    sd[sd < 10 * np.finfo(float).eps * np.maximum(1.0, np.abs(mu))] = 1.0
    return (X_train - mu) / sd, (X_test - mu) / sd


def _ridge_cv(X: np.ndarray, target: _Targets, K: int,
              folds: list[tuple[np.ndarray, np.ndarray]], alphas: np.ndarray,
              progress: bool | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cross-validated ridge readouts for all lags 0..K at once.

    NOTE: [One factorisation for every lag and penalty]
    On standardised, centred training states Xc, the ridge solution for any target column y is
    W(a) = V diag(1 / (lam + a)) V^T Xc^T y with Xc^T Xc = V diag(lam) V^T, so one
    eigendecomposition per fold serves all lags, features and penalties. The exact
    leave-one-out residual (y_i - yhat_i) / (1 - h_ii), with h_ii = 1/n + sum_j P_ij^2 / (lam_j + a)
    and P = Xc V (the intercept is unpenalised), chooses the penalty per target as
    scikit-learn's RidgeCV does; for classes, the squared residuals of a lag's class columns
    are summed, as RidgeClassifierCV does.

    Returns
    -------
    fold_scores : (n_folds, K + 1) test R^2 (mean over features) or balanced accuracy
    feature_scores : (K + 1, I) R^2 per feature averaged over folds (categorical: NaN)
    chosen : (n_folds, K + 1) chosen penalty (mean over the lag's targets)
    """

    n_folds = len(folds)
    width = target.width
    categorical = target.classes is not None
    fold_scores = np.empty((n_folds, K + 1))
    feature = np.full((n_folds, K + 1, width), np.nan)
    chosen = np.empty((n_folds, K + 1))
    # lags per block: keep the (N, m) target blocks near 16 M numbers
    per_block = max(1, int(16e6 // max(1, X.shape[0] * width)))
    work = X.shape[0] * X.shape[1] * (K + 1) * width * len(alphas) * len(folds)
    show = progress if progress is not None else work > 5e10
    for f, (tr, te) in enumerate(progress_bar(progress, iterable=folds, total=len(folds),
                                              label="decoding folds", auto=bool(show))):
        Xtr, Xte = _standardise(X[tr], X[te])
        Xtr -= Xtr.mean(axis=0)  # exact centring after rounding
        lam, V = np.linalg.eigh(Xtr.T @ Xtr)
        lam = np.clip(lam, 0.0, None)
        P, Pte = Xtr @ V, Xte @ V  # (n, S), (n_te, S)
        P2 = P * P
        n = len(tr)
        for start in range(0, K + 1, per_block):
            lags = np.arange(start, min(K + 1, start + per_block))
            Y = target.block(lags)  # (N, m)
            Ytr, Yte = Y[tr], Y[te]
            ybar = Ytr.mean(axis=0)
            Yc = Ytr - ybar
            A = P.T @ Yc  # (S, m)
            best = np.full(Y.shape[1], np.inf)
            best_a = np.full(Y.shape[1], alphas.max())  # kept if every error is NaN
            for a in alphas:
                d = 1.0 / (lam + a)  # (S,)
                with np.errstate(divide="ignore"):  # h_ii = 1: that penalty is never chosen
                    inv = 1.0 / (1.0 - (1.0 / n + P2 @ d))  # 1 / (1 - h_ii), (n,)
                loo = P @ (d[:, None] * A)  # fitted values, (n, m)
                np.subtract(Yc, loo, out=loo)
                with np.errstate(invalid="ignore", over="ignore"):
                    loo *= inv[:, None]  # leave-one-out residuals
                    err = np.einsum("ij,ij->j", loo, loo)  # (m,)
                if categorical:  # one penalty per lag, shared by its class columns
                    err = np.repeat(err.reshape(len(lags), width).sum(axis=1), width)
                better = err < best
                best[better], best_a[better] = err[better], a
            coef = A / (lam[:, None] + best_a[None, :])  # (S, m), in the eigenbasis
            pred = Pte @ coef + ybar  # (n_te, m)
            chosen[f, lags] = best_a.reshape(len(lags), width).mean(axis=1)
            if categorical:
                fold_scores[f, lags] = _balanced_accuracy(
                    target.tokens(lags)[te], pred.reshape(len(te), len(lags), width),
                    target.classes, present=np.unique(target.tokens(lags)[tr]))
            else:
                r2 = _r2(Yte, pred).reshape(len(lags), width)
                feature[f, lags] = r2
                fold_scores[f, lags] = r2.mean(axis=1)
    return fold_scores, feature.mean(axis=0), chosen


def _r2(y: np.ndarray, pred: np.ndarray) -> np.ndarray:
    """Per-column R^2 on the test rows, with scikit-learn's r2_score conventions for constant
    targets (1 when predicted exactly, else 0)."""
    sse = ((y - pred) ** 2).sum(axis=0)
    sst = ((y - y.mean(axis=0)) ** 2).sum(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = 1.0 - sse / sst
    return np.where(sst > 0, r2, np.where(sse > 0, 0.0, 1.0))


def _balanced_accuracy(true: np.ndarray, decision: np.ndarray, classes: np.ndarray,
                       present: np.ndarray) -> np.ndarray:
    """Mean recall over the classes present in ``true``, per lag: (n_lags,).

    ``decision`` (n, n_lags, C); classes absent from the training rows are never predicted.
    """
    decision = np.where(np.isin(classes, present)[None, None, :], decision, -np.inf)
    pred = classes[decision.argmax(axis=2)]  # (n, n_lags)
    recalls = []
    for c in classes:
        is_c = true == c
        count = is_c.sum(axis=0)
        hits = (is_c & (pred == c)).sum(axis=0)
        recalls.append(np.where(count > 0, hits / np.maximum(count, 1), np.nan))
    return np.nanmean(np.stack(recalls), axis=0)
