"""The task-memory tab of explore and compare, in plain pytest (controls moved by ``.value``)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

pytest.importorskip("ipywidgets")

import hiddenlens  # noqa: E402
from hiddenlens.widgets import compare, explore  # noqa: E402
from tests.conftest import cue_sequences  # noqa: E402

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
N_DELAY = 5


def shift_register(n):
    """A linear delay line holding its input exactly n steps (common practice; the delay-line
    reservoir of Jaeger 2001)."""

    def step(s, x):
        return torch.cat([x[..., :1], s[..., :-1]], dim=-1)

    return hiddenlens.wrap(step, state_size=n + 1, input_size=1, dtype=torch.float64)


def leaky(a):
    def step(s, x):
        return a * s + x[..., :1]

    return hiddenlens.wrap(step, state_size=1, input_size=1, dtype=torch.float64)


@pytest.fixture(scope="module")
def cues():
    return cue_sequences(60, 20, 5)


def test_targets_add_the_task_memory_tab(cues):
    x, colour, onset = cues
    system = shift_register(N_DELAY)
    plain = explore(system, x, background=False)
    assert "task_memory" not in plain._panels  # no targets: no tab
    view = explore(system, x, targets=colour, onsets=onset, background=False)
    assert "task_memory" in view._panels
    view.select("task_memory")
    png = view.images["task_memory"]
    assert png.startswith(PNG_MAGIC)
    res = view._results("task_memory", view.run)
    # a delay line of length N holds the cue for lags 0..N exactly (see tests/test_task_memory)
    assert res.span == N_DELAY
    # the tab runs the library function with its budget: the same result as a direct call
    panel = view._panels["task_memory"]
    direct = hiddenlens.task_memory(view.trace, colour, onsets=onset,
                                    max_lag=panel.options["max_lag"].value, n_folds=3,
                                    n_permutations=19, cross_temporal=False, max_iter=100)
    np.testing.assert_allclose(res.scores, direct.scores)
    assert "task variable decodable for 5 steps" in view._summary.value
    view.close()


def test_task_memory_controls_recompute_and_redraw(cues):
    x, colour, onset = cues
    view = explore(shift_register(N_DELAY), x, targets=colour, onsets=onset,
                   analyses=["task_memory"], background=False)
    panel = view._panels["task_memory"]
    assert panel.options["max_lag"].max == x.shape[1] - 1 - onset.max()
    first = view.computed["task_memory"]
    panel.options["max_lag"].value = 8
    assert view.computed["task_memory"] == first + 1
    assert view._results("task_memory", view.run).max_lag == 8
    panel.views["show"].value = "cross_temporal"  # no matrix yet: a note, no recompute
    assert view.computed["task_memory"] == first + 1
    assert bytes(panel.image.value).startswith(PNG_MAGIC)
    panel.options["cross_temporal"].value = True
    res = view._results("task_memory", view.run)
    assert res.cross_temporal.shape == (9, 9)
    # the shift register moves the cue one unit per step: a diagonal code (King & Dehaene 2014)
    assert np.diag(res.cross_temporal)[: N_DELAY + 1].min() > 0.9
    before = view.computed["task_memory"]
    panel.views["show"].value = "curve"  # a view control only redraws
    assert view.computed["task_memory"] == before
    view.close()


def test_compare_shows_each_runs_task_memory(cues):
    x, colour, onset = cues
    runs = {"delay line": shift_register(N_DELAY), "short line": shift_register(2)}
    view = compare(runs, x, targets=colour, onsets=onset, analyses=["task_memory"],
                   background=False)
    view.select("task_memory")
    assert view.images["task_memory"].startswith(PNG_MAGIC)
    spans = {n: view._results("task_memory", r).span for n, r in view._runs.items()}
    assert spans == {"delay line": N_DELAY, "short line": 2}
    view.select("Key figures")
    assert "task-variable span" in view._table.value
    view.close()


def test_continuous_per_step_targets(cues):
    # per-step targets (B, T): lag k reads y[t - k] from s[t]
    x = np.random.default_rng(1).standard_normal((12, 50, 1))
    view = explore(shift_register(3), x, targets=x[:, :, 0], analyses=["task_memory"],
                   background=False)
    res = view._results("task_memory", view.run)
    assert res.metadata["per_step"] and res.span == 3 and res.score_name == "test R²"
    view.close()


def test_bad_task_arguments_fail_clearly(cues):
    x, colour, onset = cues
    system = leaky(0.5)
    with pytest.raises(ValueError, match="needs targets"):
        explore(system, x, analyses=["task_memory"], background=False)
    with pytest.raises(ValueError, match="targets has shape"):
        explore(system, x, targets=colour[:7], background=False)
    with pytest.raises(ValueError, match="onsets must be integer"):
        explore(system, x, targets=colour, onsets=onset.astype(float), background=False)
    with pytest.raises(ValueError, match="onsets were given without targets"):
        compare({"a": system}, x, onsets=onset, background=False)
