"""run_analyses, key figures and the plain-words summary shared by report, comparison, widgets."""

import dataclasses
import math
from types import SimpleNamespace

import numpy as np
import pytest
import torch
from numpy.testing import assert_allclose

import hiddenlens
from hiddenlens._core.registry import analysis_spec
from hiddenlens._faces.summary import (
    ANALYSES,
    FIGURES,
    AnalysisResults,
    array_summaries,
    available_analyses,
    describe_inputs,
    format_figure,
    key_figures,
    run_analyses,
    summary_sentence,
)
from tests.conftest import gaussian_module

ALL = set(available_analyses()) == set(ANALYSES)


def _rnn(hidden=6, n_in=3, seed=0):
    return gaussian_module(torch.nn.RNN, n_in, hidden, seed=seed, std=0.4)


@pytest.fixture(scope="module")
def inputs():
    return np.random.default_rng(0).standard_normal((3, 40, 3)).astype(np.float32)  # (B, T, I)


def test_analysis_names_and_order():
    assert ANALYSES == ("spectra", "gradient_flow", "lyapunov", "pca", "fixed_points", "memory",
                        "task_memory")
    assert set(available_analyses()) <= set(ANALYSES)
    assert {a for _, _, a in FIGURES.values()} == set(ANALYSES)


def test_run_analyses_pca_matches_direct_call(inputs):
    model = _rnn()
    out = run_analyses(model, inputs, which=["pca"])
    assert isinstance(out, AnalysisResults) and isinstance(out, dict)
    assert list(out) == ["pca"]
    trace = hiddenlens.record(model, inputs)
    np.testing.assert_array_equal(out.trace.states, trace.states)
    direct = hiddenlens.pca_trajectories(trace, k=3)
    assert_allclose(out["pca"].explained_variance_ratio, direct.explained_variance_ratio)
    assert out.options["pca"] == {"k": 3}
    assert out.seconds["pca"] >= 0 and out.skipped == {}


def test_run_analyses_reuses_a_given_trace(inputs):
    model = _rnn()
    trace = hiddenlens.record(model, inputs)
    assert run_analyses(model, inputs, which="pca", trace=trace).trace is trace


def test_run_analyses_options_override_defaults(inputs):
    out = run_analyses(_rnn(), inputs, which=["pca"], options={"pca": {"k": 2}})
    assert out["pca"].projected.shape == (3, 40, 2)


def test_memory_in_data_mode_drops_the_probe_budget(inputs):
    if "memory" not in available_analyses():
        pytest.skip("memory_curve is not available")
    model = _rnn()
    trace = hiddenlens.record(model, inputs)
    out = run_analyses(model, inputs, which=["memory"],
                       options={"memory": {"mode": "data", "max_lag": 3}})  # the recording
    assert "n_steps" not in out.options["memory"]
    direct = hiddenlens.memory_curve(model, trace, max_lag=3, seed=0)
    assert out["memory"].mode == "data"
    assert_allclose(out["memory"].scores, direct.scores)


def test_run_analyses_refuses_bad_options(inputs):
    model = _rnn()
    with pytest.raises(ValueError, match="unknown analysis 'pcaa'"):
        run_analyses(model, inputs, which=["pcaa"])
    with pytest.raises(ValueError, match="not options of pca_trajectories"):
        run_analyses(model, inputs, which=["pca"], options={"pca": {"n_comp": 2}})
    with pytest.raises(ValueError, match="in options"):
        run_analyses(model, inputs, which=["pca"], options={"lyapunoff": {}})
    with pytest.raises(TypeError, match="mapping of keyword options"):
        run_analyses(model, inputs, which=["pca"], options={"pca": 3})
    with pytest.raises(ValueError, match="on_error"):
        run_analyses(model, inputs, which=["pca"], on_error="ignore")
    with pytest.raises(ValueError, match="features"):
        run_analyses(model, inputs[..., :2], which=["pca"])


def test_run_analyses_failure_raises_or_is_skipped(inputs):
    model = _rnn()
    bad = {"pca": {"k": 99}}
    with pytest.raises(ValueError, match="k"):
        run_analyses(model, inputs, which=["pca"], options=bad)
    out = run_analyses(model, inputs, which=["pca"], options=bad, on_error="skip")
    assert "pca" not in out and "k" in out.skipped["pca"]


def test_missing_analysis_is_skipped_with_a_note(monkeypatch, inputs):
    from hiddenlens._core import registry as _registry
    spec = _registry.analysis_spec("memory")
    monkeypatch.setitem(_registry._SPECS, "memory", dataclasses.replace(
        spec, function="hiddenlens._no_such_module:f"))
    assert "memory" not in available_analyses()
    out = run_analyses(_rnn(), inputs[:1, :20], progress=False, on_error="skip")
    assert "memory" not in out and "not available" in out.skipped["memory"]
    with pytest.raises(ValueError, match="not available"):
        run_analyses(_rnn(), inputs, which=["memory"])


def test_progress_callback_and_interrupt(inputs):
    calls = []
    run_analyses(_rnn(), inputs, which=["pca"], progress=lambda *a: calls.append(a))
    assert calls == [("pca", 0, 1), ("done", 1, 1)]

    def stop(*_):
        raise KeyboardInterrupt

    model = _rnn()
    before = {k: v.clone() for k, v in model.state_dict().items()}
    with pytest.raises(KeyboardInterrupt):
        run_analyses(model, inputs, which=["pca"], progress=stop)
    assert all(torch.equal(v, before[k]) for k, v in model.state_dict().items())


@pytest.mark.skipif(not ALL, reason="an analysis module is not available")
def test_every_analysis_runs_with_default_budgets_and_repeats(inputs):
    model = _rnn(hidden=8)
    model.train()
    before = {k: v.clone() for k, v in model.state_dict().items()}
    rng = torch.get_rng_state()
    opts = {"memory": {"max_lag": 5, "n_steps": 300}}
    a = run_analyses(model, inputs, options=opts)
    b = run_analyses(model, inputs, options=opts)
    # analyses that need context (task targets) are skipped, with the reason, without it
    assert list(a) == [n for n in ANALYSES if not analysis_spec(n).needs]
    assert all("needs" in a.skipped[n] for n in ANALYSES if analysis_spec(n).needs)
    assert key_figures(a) == key_figures(b)  # seeded: repeatable
    assert torch.equal(torch.get_rng_state(), rng) and model.training
    assert all(torch.equal(v, before[k]) for k, v in model.state_dict().items())
    figs = key_figures(a)
    assert set(figs) == {k for k, v in FIGURES.items() if not analysis_spec(v[2]).needs}
    # the figures are the results' own numbers
    assert figs["lyapunov_max"] == a["lyapunov"].exponents[0]
    assert figs["memory_span"] == a["memory"].span
    assert figs["participation_ratio"] == a["pca"].participation_ratio
    assert figs["gradient_verdict"] == a["gradient_flow"].verdict
    counts = {c: int(np.sum(a["fixed_points"].stability == c))
              for c in ("stable", "saddle", "unstable", "marginal")}
    assert {c: figs[f"fixed_points_{c}"] for c in counts} == counts
    assert_allclose(figs["top_singular_value_median"],
                    np.median(a["spectra"].singular_values[..., 0]))
    arrays = array_summaries(a)
    assert set(arrays) == {n for n in ANALYSES if not analysis_spec(n).needs}
    assert arrays["lyapunov"]["exponents"] == a["lyapunov"].exponents.tolist()


# ---------------------------------------------------------------------- key figures
def _fake_results():
    sv = np.random.default_rng(1).uniform(0.1, 2.0, (2, 30, 4))  # (B, T, k)
    sv = -np.sort(-sv, axis=-1)
    return {
        "spectra": SimpleNamespace(singular_values=sv, spectral_radius=np.full((2, 30), 0.7)),
        "gradient_flow": SimpleNamespace(lags=np.arange(5), norms=np.ones((2, 5)),
                                         rate=-math.log(10) / 23, half_life=23 * math.log10(2),
                                         verdict="vanishing"),
        "lyapunov": SimpleNamespace(exponents=np.array([0.05, -0.2]), kaplan_yorke=1.25),
        "pca": SimpleNamespace(participation_ratio=3.5, explained_variance_ratio=[0.5, 0.3]),
        "fixed_points": SimpleNamespace(
            stability=np.array(["stable", "saddle", "stable", "stable"]),
            eigenvalues=np.array([[0.5, 0.1], [1.5, 0.2], [0.9, 0.1], [0.3, 0.3]])),
        "memory": SimpleNamespace(lags=np.arange(61), scores=np.linspace(1, 0, 61),
                                  span=41, capacity=12.3),
    }


def test_key_figures_from_the_fixed_attribute_names():
    res = _fake_results()
    f = key_figures(res)
    assert list(f) == [k for k in FIGURES if k in f]  # ordered as FIGURES
    assert f["lyapunov_max"] == 0.05 and f["kaplan_yorke_dimension"] == 1.25
    assert_allclose(f["gradient_rate"], -math.log(10) / 23)
    assert f["gradient_verdict"] == "vanishing"
    assert f["memory_span"] == 41 and f["memory_capacity"] == 12.3
    assert f["memory_max_lag"] == 60
    assert f["participation_ratio"] == 3.5
    assert (f["fixed_points_stable"], f["fixed_points_saddle"], f["fixed_points_unstable"],
            f["fixed_points_marginal"]) == (3, 1, 0, 0)
    top = res["spectra"].singular_values[..., 0]
    assert_allclose(f["top_singular_value_median"], np.median(top))
    assert f["spectral_radius_median"] == 0.7
    assert key_figures({}) == {}
    only = key_figures({"memory": res["memory"]})
    assert set(only) == {"memory_span", "memory_capacity", "memory_max_lag"}


def test_summary_sentence_in_plain_words():
    f = key_figures(_fake_results())
    s = summary_sentence(f)
    assert "gradients shrink ~10x every 23 steps" in s
    assert "memory span 41 steps" in s
    assert "3 stable, 1 saddle fixed points" in s
    assert "largest Lyapunov exponent +0.05/step (chaotic on these inputs)" in s
    assert summary_sentence({}) == ""
    assert summary_sentence({"memory_span": 60, "memory_max_lag": 60}) == \
        "memory span at least 60 steps (the longest lag tried)"
    assert summary_sentence({"fixed_points_stable": 1, "fixed_points_saddle": 0}) == \
        "1 stable fixed point"
    assert summary_sentence({"gradient_rate": math.log(10) / 5}) == \
        "gradients grow ~10x every 5 steps"
    assert summary_sentence({"gradient_half_life": 10 * math.log10(2)}) == \
        "gradients shrink ~10x every 10 steps"
    assert summary_sentence({"top_singular_value_median": 1.5}) == \
        "one step stretches states by up to 1.5x (median)"


def test_format_figure_and_describe_inputs():
    assert format_figure("x", 3) == "3"
    assert format_figure("x", 0.123456) == "0.123"
    assert format_figure("x", float("inf")) == "inf"
    assert format_figure("x", float("nan")) == "n/a"
    assert format_figure("x", None) == "-"
    assert format_figure("x", "vanishing") == "vanishing"
    x = np.zeros((2, 7, 3), np.float32)
    assert describe_inputs(x, source="probe").startswith("2 sequences of 7 steps with 3 input")
    assert describe_inputs(x, source="probe").endswith("; probe")


def test_array_summaries_are_json_ready():
    import json

    arr = array_summaries(_fake_results())
    json.dumps(arr)
    assert arr["fixed_points"]["stability"] == ["stable", "saddle", "stable", "stable"]
    assert_allclose(arr["fixed_points"]["spectral_radius"], [0.5, 1.5, 0.9, 0.3])
    assert arr["gradient_flow"]["norms_median"] == [1.0] * 5
    assert len(arr["spectra"]["singular_values_median"]) == 4
