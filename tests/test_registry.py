"""The analysis registry: a registered analysis appears in every face with no change to them."""

from __future__ import annotations

import re
from dataclasses import dataclass

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
import pytest  # noqa: E402
import torch  # noqa: E402
from numpy.testing import assert_allclose  # noqa: E402

import hiddenlens  # noqa: E402
from hiddenlens._core import registry as _registry  # noqa: E402
from hiddenlens._faces import cli  # noqa: E402
from tests.conftest import gaussian_module  # noqa: E402

pytest.importorskip("ipywidgets")
PNG_MAGIC = b"\x89PNG"


@dataclass(frozen=True)
class StateSize:
    """Toy result: the mean absolute state at each step, (T,)."""

    level: np.ndarray

    def plot(self, ax=None):
        from hiddenlens._plotting.style import get_axes

        ax = get_axes(ax)
        ax.plot(np.arange(self.level.size), self.level, label="mean |s_t|")
        return ax

    def to_frame(self):
        import pandas as pd

        return pd.DataFrame({"mean_abs_state": self.level})


def state_size(system, trace, *, scale=1.0):
    return StateSize(scale * np.abs(trace.states).mean(axis=(0, 2)))  # (B, T, S) -> (T,)


def _figures(result):
    return {"mean_abs_state": float(result.level.mean())}


@pytest.fixture
def toy():
    spec = hiddenlens.register_analysis(
        "state_size", state_size, title="Size of the states", key_figures=_figures,
        caution="A toy figure: the size of the states says nothing about their use.",
        figures={"mean_abs_state": ("mean absolute state", "")})
    try:
        yield spec
    finally:
        hiddenlens.unregister_analysis("state_size")
    assert "state_size" not in hiddenlens.analyses()


def _rnn(seed):
    return gaussian_module(torch.nn.RNN, 5, 6, seed=seed, std=0.4)


@pytest.fixture(scope="module")
def inputs():
    return np.random.default_rng(0).standard_normal((2, 30, 5)).astype(np.float32)  # (B, T, I)


def test_register_and_unregister_keep_the_order(toy):
    names = hiddenlens.analyses()
    assert names[:6] == ("spectra", "gradient_flow", "lyapunov", "pca", "fixed_points", "memory")
    assert names[-1] == "state_size"
    with pytest.raises(ValueError, match="already registered"):
        hiddenlens.register_analysis("state_size", state_size, title="again")
    with pytest.raises(ValueError, match="identifier"):
        hiddenlens.register_analysis("state size", state_size, title="bad")
    with pytest.raises(ValueError, match="no analysis named"):
        hiddenlens.unregister_analysis("nothing_here")


def test_a_registered_analysis_appears_in_every_face(toy, inputs, tmp_path):
    from hiddenlens.widgets import compare, explore

    runs = {"a": _rnn(0), "b": _rnn(1)}
    # run_analyses and the key figure against numpy (common practice: mean of |s|)
    out = hiddenlens.run_analyses(runs["a"], inputs, which=["pca", "state_size"])
    trace = hiddenlens.record(runs["a"], inputs)
    assert_allclose(hiddenlens.key_figures(out)["mean_abs_state"],
                    np.abs(trace.states).mean())

    # 1. explore: a tab that draws
    view = explore(runs["a"], inputs, background=False)
    assert "state_size" in view._panels
    view.select("state_size")
    assert view.images["state_size"].startswith(PNG_MAGIC)
    assert "says nothing about their use" in view.show_static(compute=False).html

    # 2. compare: a tab, and a row of its key-figure table
    board = compare(runs, inputs, analyses=["state_size"], background=False)
    board.select("state_size")
    assert board.images["state_size"].startswith(PNG_MAGIC)
    board.select("Key figures")
    assert "mean absolute state" in board._table.value

    # 3. compare_runs: columns with the difference from the first run
    comp = hiddenlens.compare_runs(runs, inputs, which=["state_size"])
    t = comp.table
    assert_allclose(t.loc["b", "\u0394 mean_abs_state"],
                    t.loc["b", "mean_abs_state"] - t.loc["a", "mean_abs_state"])
    assert comp.plot("state_size", ax=matplotlib.figure.Figure().add_subplot()).has_data()

    # 4. write_report: a section with its figure and caution
    page = hiddenlens.write_report(comp, tmp_path / "r.html").read_text(encoding="utf-8")
    sections = dict(re.findall(r'<section id="analysis-(\w+)">(.*?)</section>', page, re.S))
    assert "Size of the states" in sections["state_size"]
    assert "says nothing about their use" in sections["state_size"]
    assert sections["state_size"].count("<img") == 1 + len(runs)  # overlay + one per run

    # 5. the command line accepts it and reports it
    weights = tmp_path / "w.pt"
    from hiddenlens.examples import sorting_line

    torch.save(sorting_line.make_tanh_rnn().state_dict(), weights)
    code = cli.main(["report", "--model", "hiddenlens.examples.sorting_line:make_tanh_rnn",
                     "--weights", str(weights), "--probe", "2,12", "--analyses", "state_size",
                     "-o", str(tmp_path / "cli"), "-q"])
    assert code == 0
    page = (tmp_path / "cli" / "report.html").read_text(encoding="utf-8")
    assert 'id="analysis-state_size"' in page and "mean absolute state" in page


def test_context_keys_are_passed_or_the_analysis_is_skipped(inputs):
    def scored(system, trace, *, targets):
        return StateSize(np.abs(trace.states).mean(axis=(0, 2)) - float(np.mean(targets)))

    with _registry.temporary_analysis("scored", scored, title="Scored", needs=("targets",)):
        out = hiddenlens.run_analyses(_rnn(0), inputs, which=["scored"])
        assert "scored" not in out and "targets" in out.skipped["scored"]
        out = hiddenlens.run_analyses(_rnn(0), inputs, which=["scored"],
                                      context={"targets": np.ones(3)})
        assert out.options["scored"]["targets"] is not None and "scored" in out
    assert "scored" not in hiddenlens.analyses()


def test_the_worked_example_of_the_docs_runs(tmp_path, monkeypatch, capsys):
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "docs" / "extending.md").read_text()
    code = re.search(r"```python\n(.+?)\n```", text, re.S).group(1)
    monkeypatch.chdir(tmp_path)
    exec(compile(code, "docs/extending.md", "exec"), {"__name__": "extending_example"})
    out = capsys.readouterr().out
    assert "the state moves" in out and "Δ step_length_median" in out
    page = (tmp_path / "extending-demo" / "report.html").read_text(encoding="utf-8")
    assert 'id="analysis-step_length"' in page and "median step length" in page
    assert "step_length" not in hiddenlens.analyses()


def test_task_memory_is_a_builtin_that_needs_targets():
    # a shift register (delay line) carries the cue exactly N steps: the state at lag k holds
    # the input of k steps ago while k < N (common practice: the linear delay line)
    n_cells = 6
    shift = torch.zeros(n_cells, n_cells, dtype=torch.float32)
    shift[1:, :-1] = torch.eye(n_cells - 1, dtype=torch.float32)
    feed = torch.zeros(n_cells, 1, dtype=torch.float32)
    feed[0, 0] = 1.0
    system = hiddenlens.wrap(lambda x, h: h @ shift.T + x @ feed.T, state_size=n_cells,
                             input_size=1)
    rng = np.random.default_rng(3)
    B, T = 40, 12
    colour = rng.integers(2, size=B)
    x = np.zeros((B, T, 1), dtype=np.float32)
    x[:, 0, 0] = 2.0 * colour - 1.0
    assert "task_memory" in hiddenlens.analyses()
    out = hiddenlens.run_analyses(system, x, which=["task_memory"])
    assert "task_memory" not in out and "targets" in out.skipped["task_memory"]
    out = hiddenlens.run_analyses(system, x, which=["task_memory"],
                                  context={"targets": colour, "onsets": np.zeros(B, int)})
    figs = hiddenlens.key_figures(out)
    # the pulse enters cell 0 at step 0 and leaves the last cell after step n_cells - 1
    assert figs["task_memory_span"] == n_cells - 1
    assert figs["task_memory_max_lag"] == T - 1
    assert out.options["task_memory"]["n_permutations"] == 19
    assert "task variable decodable for 5 steps" in hiddenlens.summary_sentence(figs)
