"""The diagnosis line: task outcome read with the key figures, words, ranking within noise."""

from __future__ import annotations

import json
import math

import pytest

from hiddenlens._analyses.diagnosis import (
    LEVELS,
    TERMS,
    Diagnosis,
    describe_figure,
    diagnose,
    rank_runs,
    wilson_interval,
)

SOLVED_DELAY_TASK = {"accuracy": 0.999, "chance": 1 / 3, "horizon": 40}


def test_gradient_rate_read_against_the_horizon():
    # a rate r (natural log per step) falls 10x over ln(10)/|r| steps (common practice)
    r = -math.log(10.0) / 37.0
    d = diagnose({"gradient_rate": r}, horizon=40)
    assert "gradients fall 10x over 37 steps; the task needs 40: marginal" in d.text
    assert d.level == "marginal"
    assert diagnose({"gradient_rate": r}, horizon=10).level == "ok"
    assert diagnose({"gradient_rate": r}, horizon=200).level == "failing"
    assert diagnose({"gradient_rate": r}).level == "unknown"
    # a half-life h alone gives the rate -ln 2 / h (exponential decay, common practice)
    d = diagnose({"gradient_half_life": 37.0 * math.log10(2.0)}, horizon=40)
    assert "gradients fall 10x over 37 steps" in d.text
    assert diagnose({"gradient_half_life": math.inf}, horizon=40).level == "ok"


def test_probe_span_contradicting_a_solved_delay_task_warns_and_points_to_task_memory():
    figs = {"memory_span": 0.0, "memory_max_lag": 40.0, "gradient_rate": -0.0622,
            "gradient_verdict": "vanishing"}
    d = diagnose(figs, task=SOLVED_DELAY_TASK, name="gru")
    assert d.level == "ok"
    assert d.text.startswith("gru: ok: accuracy 99.9%")
    assert any("task_memory" in w and "does not measure" in w for w in d.warnings)
    assert "(1 caution)" in d.text


def test_task_memory_span_is_preferred_and_removes_the_contradiction():
    figs = {"memory_span": 0.0, "task_memory_span": 40.0, "memory_max_lag": 40.0}
    d = diagnose(figs, task=SOLVED_DELAY_TASK)
    assert not any("task_memory" in w for w in d.warnings)
    assert "task memory span" in d.text


def test_failing_run_gets_careful_suggestions():
    d = diagnose({"gradient_rate": 0.08, "lyapunov_max": 0.07},
                 task={"accuracy": 0.47, "chance": 1 / 3, "horizon": 40})
    assert d.level == "failing"
    assert any("clipping" in s and "may" in s for s in d.suggestions)
    assert "chaotic on these inputs" in d.text
    d = diagnose({"gradient_rate": -0.4}, task={"accuracy": 0.57, "chance": 1 / 3}, horizon=40)
    assert any("gated cell" in s for s in d.suggestions)


def test_failure_not_explained_by_the_dynamics_is_said():
    d = diagnose({"gradient_rate": -1e-3, "lyapunov_max": -0.2},
                 task={"accuracy": 0.35, "chance": 1 / 3}, horizon=40)
    assert any("do not explain the failure" in w for w in d.warnings)


def test_degenerate_settings_are_flagged():
    d = diagnose({"lyapunov_max": -0.1, "memory_max_lag": 10.0, "participation_ratio": math.nan},
                 horizon=40, settings={"lyapunov": {"warmup": 199, "n_steps": 200},
                                       "fixed_points": {"n_starts": 2}})
    text = " | ".join(d.warnings)
    assert "1 of 200 steps" in text and "warm-up of 199" in text
    assert "only up to 10 steps" in text
    assert "participation ratio could not be measured" in text
    assert "2 starts" in text


def test_unknown_without_anything_and_nan_rate():
    assert diagnose({}).level == "unknown"
    d = diagnose({"gradient_rate": math.nan, "gradient_verdict": "undetermined"}, horizon=40)
    assert d.level == "unknown"
    assert "nan" not in d.text.lower()


@pytest.mark.parametrize("key,value,expected", [
    ("gradient_half_life", math.inf, "no decay over the lags seen"),
    ("gradient_rate", 0.0, "no decay over the lags seen"),
    ("gradient_rate", -math.inf, "vanish within one step"),
    ("kaplan_yorke_dimension", 0.0, "no expanding direction"),
    ("fixed_point_norm", 0.0, "at the origin"),
    ("fixed_points_stable", 0, "none found"),
    ("memory_span", -1, "nothing decodable"),
    ("participation_ratio", 2.23, "participation ratio: 2.23"),
    ("lyapunov_max", 0.065, "chaotic on these inputs"),
    ("accuracy", 0.999, "99.9%"),
])
def test_describe_figure_reads_as_words(key, value, expected):
    text = describe_figure(key, value)
    assert expected in text
    for bad in ("inf", "nan", "= 0", "dimension 0", "+inf"):
        assert bad not in text


def test_describe_figure_interval_and_lower_bound():
    assert "95% interval 2.1 to 2.4" in describe_figure("participation_ratio", 2.2, (2.1, 2.4))
    assert "at least 40 steps" in describe_figure("memory_span", 40, limit=40)
    with pytest.raises(TypeError, match="key must be a str"):
        describe_figure(3, 1.0)


def test_one_term_per_quantity():
    assert len(set(TERMS.values())) == len(TERMS)


def test_wilson_interval_matches_scipy():
    # reference: scipy.stats.binomtest(...).proportion_ci(method="wilson") (Wilson 1927)
    stats = pytest.importorskip("scipy.stats")
    ci = stats.binomtest(937, 1000).proportion_ci(confidence_level=0.95, method="wilson")
    lo, hi = wilson_interval(937, 1000)
    assert lo == pytest.approx(ci.low, abs=1e-9) and hi == pytest.approx(ci.high, abs=1e-9)
    with pytest.raises(ValueError, match="n must be a positive"):
        wilson_interval(1, 0)


def test_rank_runs_never_ranks_within_noise():
    a = diagnose({}, task={"accuracy": 0.95, "n_eval": 100}, name="a")
    b = diagnose({}, task={"accuracy": 0.93, "n_eval": 100}, name="b")
    c = diagnose({}, task={"accuracy": 0.50, "n_eval": 100}, name="c")
    ranked = rank_runs([b, c, a])
    ranks = {d.name: r for r, d in ranked}
    assert ranks["a"] == ranks["b"] == 1  # 95% vs 93% of 100: overlapping Wilson intervals
    assert ranks["c"] == 3
    # without intervals a plainly higher score wins
    x = diagnose({}, task={"accuracy": 0.95}, name="x")
    y = diagnose({}, task={"accuracy": 0.93}, name="y")
    assert [d.name for _, d in rank_runs([y, x])] == ["x", "y"]
    u = diagnose({}, name="u")
    assert rank_runs([u, x])[-1] == (None, u)
    with pytest.raises(TypeError, match="Diagnosis"):
        rank_runs([{"accuracy": 1}])


def test_bad_input_is_named():
    with pytest.raises(TypeError, match="figures must be a mapping"):
        diagnose([1, 2])
    with pytest.raises(ValueError, match=r"task\['accuracy'\] must be a fraction"):
        diagnose({}, task={"accuracy": 99.9})
    with pytest.raises(ValueError, match="horizon must be a positive"):
        diagnose({}, horizon=0)


def test_result_is_frozen_and_json_ready():
    d = diagnose({"gradient_rate": -0.06}, task=SOLVED_DELAY_TASK, name="gru")
    assert isinstance(d, Diagnosis) and d.level in LEVELS
    with pytest.raises(AttributeError):
        d.level = "failing"
    with pytest.raises(TypeError):
        d.figures["gradient_rate"] = 0.0
    assert json.loads(json.dumps(d.to_dict()))["name"] == "gru"


def test_example_runs_ship_their_task_metrics():
    from example_models import list_runs, task_metrics

    for name in list_runs():
        metrics = task_metrics(name)
        assert metrics["horizon"] > 0 and "loss" in metrics
    gru = task_metrics("gru")
    assert gru["accuracy"] > 0.99 and gru["chance"] == pytest.approx(1 / 3)
    assert diagnose({}, task=gru, name="gru").level == "ok"
    assert diagnose({}, task=task_metrics("rnn-gain2.0")).level == "failing"
    assert "r2" in task_metrics("greenhouse-lstm")


def test_example_evaluation_count_matches_the_evaluation_set():
    from example_models import sorting_line, task_metrics

    data = sorting_line.make_dataset(256, 200, seed=1)  # the evaluation set of train.py
    n = int((data.targets != sorting_line.IGNORE).sum())
    for name in ("rnn-gain0.5", "rnn-gain1.0", "rnn-gain2.0", "gru"):
        m = task_metrics(name)
        assert m["n_eval"] == n
        assert abs(m["accuracy"] * n - round(m["accuracy"] * n)) < 1e-6  # whole decisions
    d = diagnose({}, task=task_metrics("gru"), name="gru")
    assert "accuracy 99.9% (99.7% to 100.0%)" in d.text
