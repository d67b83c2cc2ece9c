"""Tests of task_memory: decoding a task variable at each lag after its onset."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from sklearn.linear_model import LogisticRegression, RidgeCV
from sklearn.metrics import balanced_accuracy_score, r2_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

import hiddenlens
from hiddenlens._analyses.task_memory import (
    TaskMemory,
    task_memory,
    task_memory_analysis,
    task_memory_key_figures,
)
from tests.conftest import cue_sequences

N_DELAY = 6


def shift_register(n):
    """s_t = (x_t, s_{t-1}[0], ..., s_{t-1}[n-1]): a linear delay line holding x exactly n steps
    (common practice; the delay-line reservoir of Jaeger 2001)."""

    def step(s, x):
        return torch.cat([x[..., :1], s[..., :-1]], dim=-1)

    return hiddenlens.wrap(step, state_size=n + 1, input_size=1, dtype=torch.float64)


@pytest.fixture(scope="module")
def cue_data():
    x, cls, on = cue_sequences(90, 24, 8)
    trace = hiddenlens.record(shift_register(N_DELAY), x)
    return trace, cls, on


@pytest.fixture(scope="module")
def categorical_result(cue_data):
    trace, cls, on = cue_data
    return task_memory(trace, cls, onsets=on, max_lag=10, n_permutations=19, seed=1)


def test_delay_line_span_is_its_length(categorical_result):
    # a cue held exactly N steps by a shift register: decodable at lags 0..N, chance beyond
    r = categorical_result
    assert r.span == N_DELAY and r.first_lag == 0
    assert np.all(r.scores[: N_DELAY + 1] > 0.9)
    assert np.all(np.abs(r.scores[N_DELAY + 1:] - 1 / 3) < 0.2)
    assert np.all(r.scores[N_DELAY + 1:] <= r.band[N_DELAY + 1:] + 0.15)
    assert r.metadata["converged"]


def test_continuous_delay_line_span(cue_data):
    trace, cls, on = cue_data
    r = task_memory(trace, (cls - 1) * 2.0, onsets=on, max_lag=10, n_permutations=19)
    assert r.span == N_DELAY and r.score_name == "test R²"
    assert np.all(r.scores[: N_DELAY + 1] > 0.9) and np.all(r.scores[N_DELAY + 1:] < 0.1)


def _fold_rows(r, trace, on, lag):
    fold_of = np.asarray(r.metadata["fold_of"])
    X = trace.states[np.arange(trace.batch_size), on + lag]
    return X, fold_of


@pytest.mark.parametrize("lag", [0, 3, 8])
def test_logistic_scores_equal_scikit_learn(cue_data, categorical_result, lag):
    # reference: scikit-learn's StandardScaler + LogisticRegression(C=1) on the same folds
    trace, cls, on = cue_data
    r = categorical_result
    X, fold_of = _fold_rows(r, trace, on, lag)
    bal = []
    for f in range(r.metadata["n_folds"]):
        tr, te = fold_of != f, fold_of == f
        pipe = make_pipeline(StandardScaler(), LogisticRegression(C=1.0, max_iter=5000,
                                                                  tol=1e-10))
        pipe.fit(X[tr], cls[tr])
        bal.append(balanced_accuracy_score(cls[te], pipe.predict(X[te])))
    np.testing.assert_allclose(r.fold_scores[:, lag], bal, atol=1e-12)


def test_binary_logistic_equals_scikit_learn(cue_data):
    trace, cls, on = cue_data
    y = (cls > 0).astype(int)
    r = task_memory(trace, y, onsets=on, max_lag=4, n_permutations=0)
    X, fold_of = _fold_rows(r, trace, on, 2)
    acc = []
    for f in range(r.metadata["n_folds"]):
        tr, te = fold_of != f, fold_of == f
        pipe = make_pipeline(StandardScaler(), LogisticRegression(max_iter=5000, tol=1e-10))
        acc.append(np.mean(pipe.fit(X[tr], y[tr]).predict(X[te]) == y[te]))
    np.testing.assert_allclose(np.mean(acc), r.accuracy[2], atol=1e-12)


def test_ridge_scores_equal_scikit_learn_ridgecv():
    # reference: StandardScaler + RidgeCV (leave-one-out penalty choice) on the same folds
    rng = np.random.default_rng(3)
    B, T, S = 60, 12, 5
    states = rng.standard_normal((B, T, S))
    y = rng.standard_normal(B)
    states[:, :, 0] += y[:, None] * np.linspace(2, 0, T)[None]
    trace = hiddenlens.Trace(states, np.zeros((B, S)), np.zeros((B, T, 1)),
                             {"h": slice(0, S)}, {})
    alphas = np.logspace(-2, 3, 6)
    r = task_memory(trace, y, max_lag=T - 1, alphas=alphas, n_permutations=0,
                    cross_temporal=False)
    fold_of = np.asarray(r.metadata["fold_of"])
    for lag in (0, 5, 11):
        ref = []
        for f in range(5):
            tr, te = fold_of != f, fold_of == f
            pipe = make_pipeline(StandardScaler(), RidgeCV(alphas=alphas))
            pipe.fit(states[tr, lag], y[tr])
            ref.append(r2_score(y[te], pipe.predict(states[te, lag])))
        np.testing.assert_allclose(r.fold_scores[:, lag], ref, atol=1e-9)


def test_band_is_a_permutation_test(categorical_result):
    # p = (1 + #{null >= score}) / (P + 1), as sklearn.model_selection.permutation_test_score
    r = categorical_result
    P = r.null_scores.shape[0]
    p = (1 + (r.null_scores >= r.scores[None]).sum(axis=0)) / (P + 1)
    np.testing.assert_allclose(r.p_values, p)
    assert np.all((r.scores > r.band) == (r.p_values <= r.level))
    assert np.all(np.abs(r.chance - 1 / 3) < 0.1)  # permutation mean near 1 / K


def test_cross_temporal_of_a_rotating_code(categorical_result):
    # the shift register moves the cue to a new unit every step: a purely diagonal code
    # (King & Dehaene 2014, the "chain" pattern)
    ct = categorical_result.cross_temporal
    assert ct.shape == (11, 11)
    diag = np.diag(ct)[: N_DELAY + 1]
    off = ct[: N_DELAY + 1, : N_DELAY + 1][~np.eye(N_DELAY + 1, dtype=bool)]
    assert diag.min() > 0.9 and off.mean() < 0.6
    np.testing.assert_allclose(diag, categorical_result.scores[: N_DELAY + 1], atol=1e-9)
    assert categorical_result.drift[0] < 1 or categorical_result.drift[1] > 45


def test_per_step_targets():
    # per-step: lag k reads y_{t-k} from s_t; the shift register holds N_DELAY steps
    rng = np.random.default_rng(2)
    x = rng.standard_normal((12, 60, 1))
    trace = hiddenlens.record(shift_register(4), x)
    r = task_memory(trace, x[:, :, 0], max_lag=7, n_permutations=19, cross_temporal=False)
    assert r.span == 4 and r.metadata["per_step"]


def test_result_frozen_plot_frame_and_adapter(cue_data, categorical_result):
    import matplotlib.pyplot as plt

    r = categorical_result
    assert isinstance(r, TaskMemory) and isinstance(hiddenlens.TaskMemory, type)
    with pytest.raises(ValueError):
        r.scores[0] = 0
    frame = r.to_frame()
    assert list(frame.index) == list(range(11)) and frame.attrs["span"] == r.span
    fig, ax = plt.subplots()
    assert r.plot(ax=ax) is ax and r.plot(ax=ax, kind="cross_temporal") is ax
    plt.close("all")
    trace, cls, on = cue_data
    again = task_memory_analysis(None, trace, targets=cls, onsets=on, max_lag=10,
                                 n_permutations=19, seed=1)
    np.testing.assert_array_equal(again.scores, r.scores)  # repeatable under a seed
    figs = task_memory_key_figures(r)
    assert figs["task_span"] == N_DELAY and figs["task_peak_score"] > 0.9
    assert "lag 0 to lag 6" in r.statement


def test_bad_input(cue_data):
    trace, cls, on = cue_data
    with pytest.raises(ValueError, match="targets has shape"):
        task_memory(trace, cls[:5])
    with pytest.raises(ValueError, match="onsets must"):
        task_memory(trace, cls, onsets=on.astype(float))
    with pytest.raises(ValueError, match="cannot reach level"):
        task_memory(trace, cls, n_permutations=5)
    with pytest.raises(ValueError, match="single class"):
        task_memory(trace, np.zeros(trace.batch_size, dtype=int))
    with pytest.raises(TypeError, match="Trace"):
        task_memory(trace.states, cls)
