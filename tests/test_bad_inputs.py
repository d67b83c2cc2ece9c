"""Every row of the bad-input table in docs/bad-inputs.md, called and checked against its message.

The tables headed ``| function | input | message |`` are read from the page; each row has a case
here (keyed by its function and input cells) that makes the call. A message of the form
``SomeError: text … more text`` must be raised (``SomeWarning: …`` warned) with the fragments
between the ellipses appearing in order; a message starting ``no error`` is a call that must
succeed, and its case checks what the page says of the result. Every public name of
``hiddenlens._LAZY`` must appear in a row's function cell, so a new public function or class
cannot be added without its row.
"""

from __future__ import annotations

import builtins
import functools
import math
import re
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._core.options import OptionError

DOC = Path(__file__).resolve().parents[1] / "docs" / "bad-inputs.md"
HEADER = "| function | input | message |"


def _doc_rows() -> list[tuple[str, str, str]]:
    rows, inside = [], False
    for line in DOC.read_text(encoding="utf-8").splitlines():
        if line.strip() == HEADER:
            inside = True
            continue
        if not inside:
            continue
        if not line.startswith("|"):
            inside = False
            continue
        if set(line) <= set("|- "):
            continue
        cells = [c.strip() for c in line.strip().strip("|").split(" | ")]
        assert len(cells) == 3, f"a row of the bad-input table needs 3 cells: {line!r}"
        rows.append(tuple(cells))
    return rows


ROWS = _doc_rows()


# ---------------------------------------------------------------------------- the objects used
def _seeded(module_fn, seed: int = 0):
    """A module built without touching torch's global RNG, weights from a local generator."""
    with torch.random.fork_rng(devices=[]):
        m = module_fn()
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for p in m.parameters():
            p.copy_((torch.rand(p.shape, generator=g) * 2 - 1) * 0.5)
    return m


@functools.cache
def gru() -> nn.GRU:
    return _seeded(lambda: nn.GRU(2, 4, batch_first=True))


@functools.cache
def inputs() -> np.ndarray:
    return np.random.default_rng(0).standard_normal((3, 30, 2)).astype(np.float32)


@functools.cache
def trace() -> hl.Trace:
    return hl.record(gru(), inputs())


@functools.cache
def results():
    # small budgets: the plot row only needs one result of each analysis
    return hl.run_analyses(gru(), inputs(), which=["spectra", "gradient_flow", "lyapunov", "pca",
                                                   "fixed_points", "memory"],
                           options={"fixed_points": {"n_starts": 8},
                                    "memory": {"max_lag": 5, "n_steps": 60}})


@functools.cache
def intervals():
    return hl.figure_intervals(results(), n_boot=10)


def noisy(s, x):
    return torch.tanh(s + x + 0.1 * torch.randn_like(s))


def calm(s, x):
    return torch.tanh(s + x)


@functools.cache
def foreign_trace() -> hl.Trace:
    """A trace recorded with a deterministic twin: the noisy step meets it only in the analysis."""
    x = np.random.default_rng(1).standard_normal((2, 12, 2)).astype(np.float32)
    return hl.record(hl.wrap(calm, state_size=2, input_size=2), x)


def noisy_system():
    return hl.wrap(noisy, state_size=2, input_size=2)


@functools.cache
def growing() -> nn.RNN:
    """A ReLU RNN whose states grow x3 per step on positive inputs (float32 overflows at ~t=81)."""
    with torch.random.fork_rng(devices=[]):
        m = nn.RNN(1, 8, nonlinearity="relu", batch_first=True)
    with torch.no_grad():
        m.weight_hh_l0.copy_(3 * torch.eye(8))
        m.weight_ih_l0.fill_(1.0)
        m.bias_hh_l0.zero_()
        m.bias_ih_l0.zero_()
    return m


@functools.cache
def grown_trace() -> hl.Trace:
    """100 steps of ``growing()``: float32 states overflow from about t=81."""
    with pytest.warns(hl.NonFiniteStateWarning):
        return hl.record(growing(), positive(100))


def positive(T: int, B: int = 4) -> np.ndarray:
    return np.abs(np.random.default_rng(0).standard_normal((B, T, 1))).astype(np.float32) + 0.1


def lorenz(s):
    # Lorenz (1963) with the classic sigma=10, rho=28, beta=8/3, one Euler step of 0.01
    x, y, z = s[..., 0:1], s[..., 1:2], s[..., 2:3]
    return s + 0.01 * torch.cat([10 * (y - x), x * (28 - z) - y, x * y - 8 / 3 * z], -1)


def with_states(states=None, initial=None, inputs_=None) -> hl.Trace:
    t = trace()
    return hl.Trace(np.array(t.states) if states is None else states,
                    np.array(t.initial) if initial is None else initial,
                    np.array(t.inputs) if inputs_ is None else inputs_, dict(t.parts), {})


def nan_at(b: int, t: int) -> hl.Trace:
    s = np.array(trace().states)
    s[b, t, 0] = np.nan
    return with_states(states=s)


def rng_kept(fn):
    """``fn`` with a check that torch's global RNG is exactly as before, error or not."""
    def call():
        before = torch.get_rng_state()
        try:
            return fn()
        finally:
            assert torch.equal(before, torch.get_rng_state()), "torch's global RNG changed"
    return call


def readonly_inputs() -> np.ndarray:
    x = inputs().copy()
    x.setflags(write=False)
    return x


# ---------------------------------------------------------------------------- no-error checks
def _overflow_verdict():
    r = hl.gradient_flow(growing(), grown_trace())
    assert r.verdict == "exploding"
    assert r.metadata["verdict_note"] == (
        "states overflowed to inf at t=81, sample 1; the rate is fitted on the finite part "
        "before it (end=80, lags 1..81)")
    assert r.rate == pytest.approx(math.log(3.0), rel=1e-6)  # J = 3 I on the finite part


def _one_sample_nan():
    r = hl.gradient_flow(gru(), nan_at(1, 5))
    assert "sample 1 excluded from the rate" in r.metadata["verdict_note"]


def _max_lag_one():
    r = hl.gradient_flow(gru(), trace(), max_lag=1)
    assert r.verdict == "undetermined"


def _few_lags():
    r = hl.gradient_flow(gru(), trace(), max_lag=14)
    assert "rate from only 14 lags (fewer than 20)" in r.metadata["verdict_note"]
    assert r.metadata["counted_lags"] == 14


def _probes_out_of_range():
    rnn = torch.nn.RNN(3, 8, batch_first=True)
    small = 0.01 * np.random.default_rng(0).standard_normal((4, 50, 3)).astype(np.float32)
    hl.memory_curve(rnn, None, max_lag=5, reference=hl.record(rnn, small), n_steps=300,
                    n_sequences=2)


def _few_counted_steps():
    r = hl.lyapunov_spectrum(gru(), trace(), warmup=7)
    assert r.n_steps == 23
    assert "from only 23 counted steps (fewer than 100)" in r.metadata["caution"]
    assert "not conclusive" in hl.summary_sentence(hl.key_figures({"lyapunov": r}))


def _growth_not_chaos():
    tr = hl.record(growing(), positive(40))
    r = hl.lyapunov_spectrum(growing(), tr)
    assert r.exponents[0] == pytest.approx(math.log(3.0), rel=1e-4)  # J = 3 I: ln 3 per step
    assert "the states grow without bound (about x3 per step" in r.metadata["caution"]
    f = hl.key_figures({"lyapunov": r})
    words = hl.summary_sentence(f)
    assert "divergence, not chaos" in words and "chaotic" not in words
    assert "chaotic" not in hl.diagnose(f).text


def _numpy_tol():
    r = hl.jacobian_spectra(gru(), trace(), tol=np.float32(1e-3), k=np.int64(2))
    assert r.singular_values.shape[-1] == 2


def _readonly_record():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        tr = hl.record(gru(), readonly_inputs())
    np.testing.assert_array_equal(tr.states, trace().states)


def _report_name(tmp="report_names"):
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        runs = {r"$\foo$": hl.run_analyses(gru(), inputs(), which=["pca"])}
        out = hl.write_report(runs, Path(d) / "r.html", json_path=False)
        assert r"$\foo$" in out.read_text(encoding="utf-8")


def _report_notes():
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        res = hl.run_analyses(gru(), inputs(), which=["pca"])
        text = hl.write_report(res, Path(d) / "r.html", notes="hello",
                               json_path=False).read_text(encoding="utf-8")
        assert text.count('<p class="note">') == 1 and '<p class="note">hello</p>' in text


def _report_one_step():
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        res = hl.run_analyses(gru(), inputs()[:, :1], which=["gradient_flow", "pca"])
        assert hl.write_report(res, Path(d) / "r.html", json_path=False).exists()


def _sweep_failing_run():
    bad = {"name": "broken", "factory": "torch.nn:GRU",
           "kwargs": {"input_size": 2, "hidden_size": 4, "batch_first": True},
           "weights": "/no/such/weights.pt"}
    r = hl.sweep([gru(), bad], inputs(), figures=["participation_ratio"], n_jobs=1,
                 n_boot=10, progress=False)
    assert r.errors[0] is None and np.isfinite(r.values[0, 0])
    assert r.errors[1].startswith("FileNotFoundError") and np.isnan(r.values[1, 0])


def _timeline_missing_checkpoint():
    t = hl.timeline(["/no/such/ckpt.pt"], lambda: nn.GRU(2, 4, batch_first=True), inputs(),
                    figures=["participation_ratio"], n_boot=10, progress=False)
    assert t.errors[0] is not None and "ckpt.pt" in t.errors[0]


def _monitor_resized():
    m = hl.Monitor(inputs(), figures=["participation_ratio"], n_boot=10)
    m.measure(gru(), 0)
    bigger = _seeded(lambda: nn.GRU(2, 6, batch_first=True))
    m.measure(bigger, 1)


def _plots():
    import matplotlib.pyplot as plt

    r = results()
    tm = hl.task_memory(trace(), np.random.default_rng(0).standard_normal((3, 30)), n_folds=3,
                        n_permutations=19)
    lg = hl.loss_gradient_norms(gru(), inputs(), lambda out: out[0].pow(2).sum())
    cmp = hl.compare_runs({"a": gru(), "b": gru()}, inputs(), which=["pca"])
    tl = hl.Timeline(checkpoints=("a",), steps=np.array([0]), epochs=np.array([0]),
                     figures=("participation_ratio",), values=np.ones((1, 1)),
                     low=np.ones((1, 1)), high=np.ones((1, 1)), errors=(None,), level=0.9)
    sw = hl.SweepResult(names=("a",), figures=("participation_ratio",), values=np.ones((1, 1)),
                        low=np.ones((1, 1)), high=np.ones((1, 1)), params={"p": (1,)},
                        errors=(None,), level=0.9, engine="local")
    calls = [lambda res=res: res.plot(ax="left") for res in r.values()]
    calls += [lambda: tm.plot(ax="left"), lambda: lg.plot(ax="left"),
              lambda: cmp.plot(ax="left"), lambda: intervals().plot(ax="left"),
              lambda: tl.plot(ax="left"), lambda: sw.plot("participation_ratio", "p", ax="left")]
    try:
        yield from calls
    finally:
        plt.close("all")


# ---------------------------------------------------------------------------- one case per row
CASES = {
    # systems and recording
    ("`wrap`", "something that is not a model"): lambda: hl.wrap("gru"),
    ("`wrap`", "`state_size=np.int64(3)`"): lambda: hl.wrap(calm, state_size=np.int64(2),
                                                         input_size=np.int64(2)),
    ("`RecurrentSystem`", "built by hand with no parts"): lambda: hl.RecurrentSystem(
        state_size=2, input_size=1, parts={}, dtype=torch.float32, kind="callable",
        source="f", fingerprint="", step_fn=calm),
    ("`LayerWeights`", "an unknown kind"): lambda: hl.LayerWeights(
        kind="nope", input_size=1, hidden_size=1, w_ih=torch.zeros(1, 1),
        w_hh=torch.zeros(1, 1), b_ih=None, b_hh=None, h=slice(0, 1), c=None),
    ("`leaky_rnn`", "a W that is not square"): lambda: hl.leaky_rnn(
        np.zeros((3, 2)), np.zeros((3, 1)), alpha=0.5),
    ("`leaky_rnn`", "no leak"): lambda: hl.leaky_rnn(np.zeros((3, 3)), np.zeros((3, 1))),
    ("`load_weights`", "a missing file"): lambda: hl.load_weights(gru(), "/no/such/w.pt"),
    ("`load_weights` (returns `LoadedWeights`)", "a state_dict of another model"):
        lambda: hl.load_weights(gru(), {"foo": torch.zeros(1)}),
    ("`record`", "integer inputs"): lambda: hl.record(gru(), np.zeros((2, 3, 2), np.int64)),
    ("`record`", "boolean inputs"): lambda: hl.record(gru(), np.zeros((2, 3, 2), bool)),
    ("`record`", "inputs of the wrong width"): lambda: hl.record(gru(), np.zeros((2, 3, 3),
                                                                             np.float32)),
    ("`record`", "NaN in inputs"): lambda: hl.record(
        gru(), np.where(np.arange(12).reshape(2, 3, 2) == 0, np.nan, 0.0)),
    ("`record`", "empty inputs (T = 0)"): lambda: hl.record(gru(), np.zeros((2, 0, 2),
                                                                            np.float32)),
    ("`record`", "a read-only or non-contiguous array"): _readonly_record,
    ("`record`", "an h0 of the wrong size"): lambda: hl.record(gru(), inputs(),
                                                               np.zeros((3, 5), np.float32)),
    ("`record` (`NonFiniteStateWarning`)", "states that overflow"):
        lambda: hl.record(growing(), positive(100)),
    ("`record`", "a step function that draws random numbers"):
        rng_kept(lambda: hl.record(noisy_system(), np.zeros((1, 3, 2), np.float32))),
    ("`Trace`", "int64 states"): lambda: hl.Trace(np.zeros((1, 2, 3), np.int64),
                                                  np.zeros((1, 3)), np.zeros((1, 2, 0)), {}, {}),
    ("`Trace`", "B = 0"): lambda: hl.Trace(np.zeros((0, 3, 4)), np.zeros((0, 4)),
                                           np.zeros((0, 3, 0)), {}, {}),
    ("`Trace.save`", "a folder"): lambda: trace().save(Path(__file__).parent),
    ("`load_trace`", "a number instead of a path"): lambda: hl.load_trace(3),
    ("`load_trace`", "a folder"): lambda: hl.load_trace(Path(__file__).parent),
    ("`load_trace`", "a missing path"): lambda: hl.load_trace("/no/such/trace.npz"),
    # analyses
    ("`jacobians`", "an array instead of a Trace"): lambda: hl.jacobians(gru(), inputs()),
    ("`jacobians`", "`wrt='x'`"): lambda: hl.jacobians(gru(), trace(), wrt="x"),
    ("`jacobians`", "a random step function on a trace recorded elsewhere"):
        rng_kept(lambda: hl.jacobians(noisy_system(), foreign_trace())),
    ("`jacobian_spectra`", "`k=0`"): lambda: hl.jacobian_spectra(gru(), trace(), k=0),
    ("`jacobian_spectra`", "`quantiles=(2,)`"): lambda: hl.jacobian_spectra(
        gru(), trace(), quantiles=(2,)),
    ("`jacobian_spectra`", "states NaN at one step"): lambda: hl.jacobian_spectra(
        gru(), nan_at(1, 5)),
    ("`jacobian_spectra`", "numpy scalars `tol=np.float32(1e-3)`, `k=np.int64(2)`"): _numpy_tol,
    ("`jacobian_spectra`", "a random step function on a trace recorded elsewhere"):
        rng_kept(lambda: hl.jacobian_spectra(noisy_system(), foreign_trace())),
    ("`gradient_flow`", "states that overflow at t=81"): _overflow_verdict,
    ("`gradient_flow`", "one sample NaN, others finite"): _one_sample_nan,
    ("`gradient_flow`", "states non-finite from t=0"): lambda: hl.gradient_flow(
        gru(), with_states(states=np.full((3, 30, 4), np.nan, np.float32))),
    ("`gradient_flow`", "NaN in the trace's inputs"): lambda: hl.gradient_flow(
        gru(), with_states(inputs_=np.full((3, 30, 2), np.nan, np.float32))),
    ("`gradient_flow`", "`max_lag=1`"): _max_lag_one,
    ("`gradient_flow`", "`max_lag=14` (fewer than 20 lags)"): _few_lags,
    ("`gradient_flow`", "`max_lag=10**9`"): lambda: hl.gradient_flow(gru(), trace(),
                                                                     max_lag=10**9),
    ("`gradient_flow`", "`tol=-1`"): lambda: hl.gradient_flow(gru(), trace(), tol=-1),
    ("`gradient_flow`", "`threshold=nan`"): lambda: hl.gradient_flow(gru(), trace(),
                                                                     threshold=math.nan),
    ("`gradient_flow`", "`samples=[7]` on B = 3"): lambda: hl.gradient_flow(gru(), trace(),
                                                                            samples=[7]),
    ("`gradient_flow`", "`parts=3`"): lambda: hl.gradient_flow(gru(), trace(), parts=3),
    ("`gradient_flow`", "`samples=[0, 0]`"): lambda: hl.gradient_flow(gru(), trace(),
                                                                      samples=[0, 0]),
    ("`gradient_flow`", "a random step function on a trace recorded elsewhere"):
        rng_kept(lambda: hl.gradient_flow(noisy_system(), foreign_trace())),
    ("`loss_gradient_norms`", "a loss that is not callable"): lambda: hl.loss_gradient_norms(
        gru(), inputs(), "mse"),
    ("`loss_gradient_norms`", "`steps=[99]` on T = 30"): lambda: hl.loss_gradient_norms(
        gru(), inputs(), lambda out, tgt: out[0].sum(), steps=[99]),
    ("`loss_gradient_norms`", "a function instead of a model"): lambda: hl.loss_gradient_norms(
        calm, inputs(), lambda out, tgt: out.sum()),
    ("`lyapunov_spectrum` (`StationaryTrajectoryWarning`)",
     "Lorenz from the default `h0` of zeros"):
        lambda: hl.lyapunov_spectrum(lorenz, 50, state_size=3),
    ("`lyapunov_spectrum` (`StationaryTrajectoryWarning`)", "a run decaying onto a fixed point"):
        lambda: hl.lyapunov_spectrum(lambda s: 0.1 * s, 400, state_size=2, dtype=torch.float64,
                                     h0=np.ones((1, 2))),
    ("`lyapunov_spectrum`", "23 counted steps"): _few_counted_steps,
    ("`memory_curve` (`MemoryRangeWarning`)",
     "probes far larger than the model's own inputs (`reference=` their trace)"):
        _probes_out_of_range,
    ("`lyapunov_spectrum`", "states growing x3 per step, still finite"): _growth_not_chaos,
    ("`lyapunov_spectrum`", "a number of steps for a driven system"):
        lambda: hl.lyapunov_spectrum(gru(), 20),
    ("`lyapunov_spectrum`", "both `inputs` and `steps=`"): lambda: hl.lyapunov_spectrum(
        lambda s: 0.5 * s, np.zeros((1, 5, 0)), steps=5, state_size=2),
    ("`lyapunov_spectrum`", "exploding states"): lambda: hl.lyapunov_spectrum(
        growing(), grown_trace()),
    ("`lyapunov_spectrum`", "NaN in a trace's initial states"): lambda: hl.lyapunov_spectrum(
        gru(), with_states(initial=np.full((3, 4), np.nan, np.float32))),
    ("`lyapunov_spectrum`", "a random step function on a trace recorded elsewhere"):
        rng_kept(lambda: hl.lyapunov_spectrum(noisy_system(), foreign_trace())),
    ("`kaplan_yorke_dimension`", "strings"): lambda: hl.kaplan_yorke_dimension(["a"]),
    ("`kaplan_yorke_dimension`", "a 2-D array"): lambda: hl.kaplan_yorke_dimension(
        np.zeros((2, 2))),
    ("`pca_trajectories`", "`parts=\"nope\"`"): lambda: hl.pca_trajectories(trace(),
                                                                          parts="nope"),
    ("`pca_trajectories`", "`k=99` on S = 4"): lambda: hl.pca_trajectories(trace(), k=99),
    ("`pca_trajectories`", "states that overflowed"): lambda: hl.pca_trajectories(
        nan_at(1, 5)),
    ("`task_memory`", "targets of the wrong shape"): lambda: hl.task_memory(trace(),
                                                                            np.zeros(5)),
    ("`task_memory`", "an array instead of a Trace"): lambda: hl.task_memory(
        inputs(), np.zeros((3, 30))),
    ("`task_memory`", "NaN targets"): lambda: hl.task_memory(trace(), np.full((3, 30), np.nan)),
    ("`task_memory`", "`max_lag=10**6`"): lambda: hl.task_memory(
        trace(), np.random.default_rng(0).standard_normal((3, 30)), max_lag=10**6),
    ("`task_memory`", "NaN states"): lambda: hl.task_memory(
        nan_at(1, 5), np.random.default_rng(0).standard_normal((3, 30)), n_folds=3),
    ("`find_fixed_points`", "`fixed_tol=-1e-9`"): lambda: hl.find_fixed_points(
        gru(), trace(), fixed_tol=-1e-9),
    ("`find_fixed_points`", "`marginal_tol=inf`"): lambda: hl.find_fixed_points(
        gru(), trace(), marginal_tol=math.inf),
    ("`find_fixed_points`", "`noise=-1`"): lambda: hl.find_fixed_points(gru(), trace(),
                                                                       noise=-1),
    ("`find_fixed_points`", "no trace and no starts"): lambda: hl.find_fixed_points(gru(), None),
    ("`find_fixed_points`", "NaN in starts"): lambda: hl.find_fixed_points(
        gru(), trace(), starts=np.full((2, 4), np.nan)),
    ("`find_fixed_points`", "starts of the wrong width"): lambda: hl.find_fixed_points(
        gru(), trace(), starts=np.zeros((2, 9))),
    ("`find_fixed_points`", "a random step function on a trace recorded elsewhere"):
        rng_kept(lambda: hl.find_fixed_points(noisy_system(), foreign_trace(), n_starts=4)),
    ("`memory_curve`", "data-mode inputs on which the states overflow"): lambda: hl.memory_curve(
        growing(), grown_trace(), max_lag=5, washout=2),
    ("`memory_curve`", "constant data-mode inputs"): lambda: hl.memory_curve(
        gru(), hl.record(gru(), np.ones((3, 60, 2), np.float32)), max_lag=5, washout=2),
    ("`memory_curve`", "`max_lag=-1`"): lambda: hl.memory_curve(gru(), max_lag=-1),
    ("`memory_curve`", "`method=\"x\"`"): lambda: hl.memory_curve(gru(), method="x"),
    ("`memory_curve`", "`threshold=2` with decoding"): lambda: hl.memory_curve(gru(),
                                                                               threshold=2),
    ("`memory_curve`", "NaN in the trace's inputs"): lambda: hl.memory_curve(
        gru(), with_states(inputs_=np.full((3, 30, 2), np.nan, np.float32)), max_lag=5,
        washout=2),
    ("`memory_curve`", "`max_lag=10**6` on 30 steps"): lambda: hl.memory_curve(
        gru(), trace(), max_lag=10**6),
    ("`memory_curve`", "a random step function on a trace recorded elsewhere"):
        rng_kept(lambda: hl.memory_curve(noisy_system(), foreign_trace(), max_lag=2, washout=1,
                                         method="sensitivity")),
    ("`linear_cka`", "different row counts"): lambda: hl.linear_cka(np.zeros((5, 2)),
                                                                    np.zeros((4, 2))),
    ("`linear_cka`", "NaN"): lambda: hl.linear_cka(np.full((5, 2), np.nan), np.zeros((5, 2))),
    ("`linear_cka`", "a constant representation"): lambda: hl.linear_cka(
        np.ones((5, 2)), np.random.default_rng(0).standard_normal((5, 2))),
    ("`compare_runs`", "a list of models"): lambda: hl.compare_runs([gru()], inputs()),
    ("`compare_runs`", "`cka_parts=\"zz\"`"): lambda: hl.compare_runs(
        {"a": gru(), "b": gru()}, inputs(), which=["pca"], cka_parts="zz"),
    ("`explore`", "inputs of the wrong width"): lambda: hl.explore(
        gru(), np.zeros((2, 3, 3), np.float32)),
    ("`compare`", "inputs of the wrong width"): lambda: hl.compare(
        {"a": gru()}, np.zeros((2, 3, 3), np.float32)),
    ("`write_report`", "a model instead of results"): lambda: hl.write_report(gru(), "r.html"),
    ("`write_report`", "a folder as the path"): lambda: hl.write_report(
        hl.run_analyses(gru(), inputs(), which=["pca"]), Path(__file__).parent),
    ("`write_report`", "`notes=3`"): lambda: hl.write_report(
        hl.run_analyses(gru(), inputs(), which=["pca"]), "r.html", notes=3),
    ("`write_report`", "a run named `$\\foo$`"): _report_name,
    ("`write_report`", "`notes=\"hello\"`"): _report_notes,
    ("`write_report`", "inputs of one step (T = 1)"): _report_one_step,
    # the registry and the runner
    ("`register_analysis`", "a name that is not an identifier"): lambda: hl.register_analysis(
        "my analysis", calm, title="x"),
    ("`register_analysis`", "a function that is not callable"): lambda: hl.register_analysis(
        "mine", 3, title="x"),
    ("`register_analysis`", "a built-in name"): lambda: hl.register_analysis(
        "pca", calm, title="x"),
    ("`AnalysisSpec`", "built by hand with an empty name"): lambda: hl.AnalysisSpec(
        name="", title="x", function=calm),
    ("`unregister_analysis`", "an unknown name"): lambda: hl.unregister_analysis("nope"),
    ("`analyses`", "an argument"): lambda: hl.analyses("pca"),
    ("`run_analyses`", "an unknown analysis in `which`"): lambda: hl.run_analyses(
        gru(), inputs(), which=["nope"]),
    ("`run_analyses`", "`options=[1]`"): lambda: hl.run_analyses(gru(), inputs(),
                                                                 which=["pca"], options=[1]),
    ("`run_analyses`", "`options={\"pca\": 3}`"): lambda: hl.run_analyses(
        gru(), inputs(), which=["pca"], options={"pca": 3}),
    ("`run_analyses`", "`options={\"pca\": {\"k\": \"2\"}}`"): lambda: hl.run_analyses(
        gru(), inputs(), which=["pca"], options={"pca": {"k": "2"}}),
    ("`run_analyses`", "`options={\"pca\": {\"zzz\": 1}}`"): lambda: hl.run_analyses(
        gru(), inputs(), which=["pca"], options={"pca": {"zzz": 1}}),
    ("`run_analyses`", "`options={\"task_memory\": {\"zzz\": 1}}` with task targets"):
        lambda: hl.run_analyses(gru(), inputs(), which=["task_memory"],
                                context={"targets": np.arange(len(inputs())) % 2},
                                options={"task_memory": {"zzz": 1}}),
    ("`run_analyses`", "`on_error=\"x\"`"): lambda: hl.run_analyses(gru(), inputs(),
                                                                   on_error="x"),
    ("`key_figures`", "a list"): lambda: hl.key_figures([1]),
    ("`key_figures`", "a str where a result belongs"): lambda: hl.key_figures(
        {"gradient_flow": "x"}),
    ("`summary_sentence`", "a list"): lambda: hl.summary_sentence([1]),
    ("`diagnose`", "a list"): lambda: hl.diagnose([1]),
    ("`diagnose`", "`horizon=-3`"): lambda: hl.diagnose({}, horizon=-3),
    ("`diagnose`", "`settings=3`"): lambda: hl.diagnose({}, settings=3),
    ("`rank_runs` (takes `Diagnosis`)", "numbers"): lambda: hl.rank_runs([1, 2]),
    ("`describe_figure`", "a key that is not a str"): lambda: hl.describe_figure(3, 1.0),
    ("`describe_figure`", "`interval=(1,)`"): lambda: hl.describe_figure(
        "gradient_rate", 0.1, interval=(1,)),
    # over training and across runs
    ("`Monitor`", "integer probe inputs"): lambda: hl.Monitor(np.zeros((2, 3, 2), np.int64)),
    ("`Monitor`", "empty probe inputs"): lambda: hl.Monitor(np.zeros((2, 0, 2), np.float32)),
    ("`Monitor`", "NaN in probe inputs"): lambda: hl.Monitor(np.full((2, 3, 2), np.nan)),
    ("`Monitor`", "an unknown figure"): lambda: hl.Monitor(inputs(), figures=["nope"]),
    ("`Monitor`", "`every=0`"): lambda: hl.Monitor(inputs(), every=0),
    ("`Monitor`", "a model whose hidden size changed between checks"): _monitor_resized,
    ("`timeline`", "no checkpoints"): lambda: hl.timeline([], gru, inputs()),
    ("`timeline`", "a factory that is not callable"): lambda: hl.timeline(["a.pt"], 3,
                                                                          inputs()),
    ("`timeline`", "`order=\"z\"`"): lambda: hl.timeline(["a.pt"], gru, inputs(), order="z"),
    ("`timeline`", "a missing checkpoint file"): _timeline_missing_checkpoint,
    ("`sweep`", "no runs"): lambda: hl.sweep([], inputs()),
    ("`sweep`", "`engine=\"zz\"`"): lambda: hl.sweep([gru()], inputs(), engine="zz"),
    ("`sweep`", "NaN in the probe batch"): lambda: hl.sweep([gru()], np.full((2, 3, 2), np.nan)),
    ("`sweep`", "a run that raises"): _sweep_failing_run,
    ("`bootstrap_figures`", "`n_boot=0`"): lambda: hl.bootstrap_figures(gru(), inputs(),
                                                                       n_boot=0),
    ("`bootstrap_figures`", "`results=3`"): lambda: hl.bootstrap_figures(gru(), inputs(),
                                                                        results=3),
    ("`bootstrap_figures`", "`level=2`"): lambda: hl.bootstrap_figures(gru(), inputs(), level=2),
    ("`figure_intervals`", "a list"): lambda: hl.figure_intervals([1]),
    ("`figure_intervals`", "`samples=[99]` on B = 3"): lambda: hl.figure_intervals(
        results(), samples=[99]),
    ("`within_noise`", "numbers instead of intervals"): lambda: hl.within_noise(
        1, 2, "gradient_rate"),
    ("`within_noise`", "an unknown figure"): lambda: hl.within_noise(intervals(), intervals(),
                                                                     "nope"),
    ("`within_noise`", "`method=\"zz\"`"): lambda: hl.within_noise(
        intervals(), intervals(), "participation_ratio", method="zz"),
    # the results' plots
    ("`JacobianSpectra.plot`, `GradientFlow.plot`, `LyapunovSpectrum.plot`, "
     "`PCATrajectories.plot`, `FixedPoints.plot`, `MemoryCurve.plot`, `TaskMemory.plot`, "
     "`LossGradientNorms.plot`, `RunComparison.plot`, `FigureIntervals.plot`, "
     "`Timeline.plot`, `SweepResult.plot`", "`ax=\"left\"`"): _plots,
}


# ---------------------------------------------------------------------------- the checks
_KINDS = {"OptionError": OptionError,
          "NonFiniteStateWarning": hl.NonFiniteStateWarning,
          "StationaryTrajectoryWarning": hl.StationaryTrajectoryWarning,
          "MemoryRangeWarning": hl.MemoryRangeWarning}


def _expected(message: str):
    """(exception or warning class or None, fragments that must appear in order)."""
    text = message.replace("`", "")
    m = re.match(r"(\w+(?:Error|Warning)): (.*)$", text)
    if m is None:
        assert text.startswith("no error"), \
            f"a message must name its error or say 'no error': {message!r}"
        return None, []
    kind = _KINDS.get(m[1]) or getattr(builtins, m[1])
    return kind, [f.strip() for f in m[2].split("…") if f.strip()]


def _in_order(actual: str, fragments: list[str]) -> None:
    pos = 0
    for frag in fragments:
        at = actual.find(frag, pos)
        assert at >= 0, f"{frag!r} not found (in order) in the message:\n{actual}"
        pos = at + len(frag)


@pytest.mark.parametrize("function, given, message", ROWS,
                         ids=[f"{f.strip('`').split('`')[0]}: {g}" for f, g, _ in ROWS])
def test_bad_input_row_gives_the_documented_message(function, given, message):
    case = CASES.get((function, given))
    assert case is not None, f"no case in tests/test_bad_inputs.py for the row {function} | {given}"
    kind, fragments = _expected(message)
    if kind is None:
        case()
        return
    calls = [case] if not _is_generator(case) else list(case())
    for call in calls:
        if issubclass(kind, Warning):
            with pytest.warns(kind, match=re.escape(fragments[0])) as record:
                call()
            _in_order(next(str(w.message) for w in record if fragments[0] in str(w.message)),
                      fragments)
        else:
            with pytest.raises(kind, match=re.escape(fragments[0])) as err:
                call()
            _in_order(str(err.value), fragments)


def _is_generator(fn) -> bool:
    import inspect

    return inspect.isgeneratorfunction(fn)


def test_every_case_has_its_row_on_the_page():
    documented = {(f, g) for f, g, _ in ROWS}
    assert not set(CASES) - documented, sorted(set(CASES) - documented)


def test_every_public_name_has_a_row():
    named = set()
    for function, _, _ in ROWS:
        named |= set(re.findall(r"`([A-Za-z_][A-Za-z_0-9]*)", function))
    missing = sorted(set(hl._LAZY) - named)
    assert not missing, f"public names without a row in docs/bad-inputs.md: {missing}"


# ---------------------------------------------------------------------------- named behaviours
@pytest.mark.parametrize("call", [
    lambda s, t: hl.jacobians(s, t),
    lambda s, t: hl.jacobians(s, t, wrt="input"),
    lambda s, t: hl.jacobian_spectra(s, t),
    lambda s, t: hl.gradient_flow(s, t),
    lambda s, t: hl.lyapunov_spectrum(s, t),
    lambda s, t: hl.find_fixed_points(s, t, n_starts=4),
    lambda s, t: hl.memory_curve(s, t, max_lag=2, washout=1, method="sensitivity"),
], ids=["jacobians", "input_jacobians", "jacobian_spectra", "gradient_flow", "lyapunov",
        "fixed_points", "memory_sensitivity"])
def test_random_step_on_a_foreign_trace_is_refused_like_record_and_rng_kept(call):
    # the message record gives (systems.random_step_message), never torch's vmap error
    system, tr = noisy_system(), foreign_trace()
    before = torch.get_rng_state()
    with pytest.raises(TypeError, match="draws random numbers from torch's global generator.*"
                                        "pass the noise as an input"):
        call(system, tr)
    assert torch.equal(before, torch.get_rng_state())


def test_line_attractor_verdicts_hold():
    # s' = A s + b x with eigenvalues (1, 0.5, 0.3, 0.2): one neutral direction (a line of fixed
    # points at x = 0) -- closed form: products of J = A keep norm 1, the largest Lyapunov
    # exponent is ln 1 = 0, and Kaplan-Yorke gives 1 + 0 / |ln 0.5| = 1 (Kaplan & Yorke 1979)
    A = torch.diag(torch.tensor([1.0, 0.5, 0.3, 0.2], dtype=torch.float64))

    def line(s, x):
        return s @ A.T + x @ torch.ones(1, 4, dtype=torch.float64)

    system = hl.wrap(line, state_size=4, input_size=1, dtype=torch.float64)
    x = np.random.default_rng(1).standard_normal((4, 200, 1))
    res = hl.run_analyses(system, x, which=["gradient_flow", "lyapunov", "fixed_points"],
                          options={"fixed_points": {"n_starts": 16}})
    f = hl.key_figures(res)
    assert f["gradient_verdict"] == "near-isometric"
    assert abs(f["lyapunov_max"]) < 1e-9 and f["kaplan_yorke_dimension"] == pytest.approx(1.0)
    assert f["fixed_points_marginal"] > 0 and f["slow_set_dimension"] == 1
    words = hl.summary_sentence(f)
    assert "chaotic" not in words and "grow without bound" not in words
    assert "the marginal points sample a continuum" in words
    assert hl.diagnose(f, horizon=50).level == "ok"


def test_growth_x3_is_exploding_in_every_verdict_never_vanishing_or_chaotic():
    # the x3 ReLU RNN, finite (40 steps) and overflowing (100 steps): J = 3 I on positive states
    finite = hl.run_analyses(growing(), positive(40), which=["gradient_flow", "lyapunov"])
    f = hl.key_figures(finite)
    assert f["gradient_verdict"] == "exploding"
    assert f["gradient_rate"] == pytest.approx(math.log(3.0), rel=1e-6)
    words, diag = hl.summary_sentence(f), hl.diagnose(f, horizon=20)
    assert "divergence, not chaos" in words and "chaotic" not in words + diag.text
    assert diag.level == "failing"
    with pytest.warns(hl.NonFiniteStateWarning):
        over = hl.run_analyses(growing(), positive(100), which=["gradient_flow", "lyapunov"],
                               on_error="skip")
    g = hl.key_figures(over)
    assert g["gradient_verdict"].startswith("exploding (states overflowed to inf at t=81")
    assert "vanish" not in hl.summary_sentence(g)
    assert "lyapunov" in over.skipped and "bounded trajectory" in over.skipped["lyapunov"]


def test_monitor_refuses_a_model_whose_hidden_size_changed():
    with pytest.raises(ValueError, match="sizes changed between checks: S=4, I=2 at step 0, "
                                         "S=6, I=2 at step 1"):
        _monitor_resized()


def test_numpy_scalar_options_are_numbers_everywhere():
    tr = trace()
    hl.jacobian_spectra(gru(), tr, tol=np.float32(1e-3), threads=np.int64(1))
    hl.gradient_flow(gru(), tr, max_iter=np.int64(5))
    hl.find_fixed_points(gru(), tr, n_starts=8, noise=np.float32(0.1))
    hl.diagnose({}, horizon=np.int64(5))
    hl.Monitor(inputs(), every=np.int64(5), figures=["participation_ratio"])
    assert hl.wrap(calm, state_size=np.int64(2), input_size=np.int64(2)).parts["state"] == \
        slice(0, 2)


def test_summary_says_so_when_no_figure_could_be_measured():
    # NaN in a recurrent weight: every state is NaN from t=0; the summary must not be empty
    m = _seeded(lambda: nn.GRU(2, 4, batch_first=True))
    with torch.no_grad():
        m.weight_hh_l0[0, 0] = float("nan")
    with pytest.warns(hl.NonFiniteStateWarning), pytest.warns(RuntimeWarning, match="non-finite"):
        res = hl.run_analyses(m, inputs(), which=["spectra", "gradient_flow"], on_error="skip")
    assert "before any finite lag" in res.skipped["gradient_flow"]
    words = hl.summary_sentence(hl.key_figures(res))
    assert words == "one-step stretch could not be measured (no step had finite states)"
    assert hl.summary_sentence({"participation_ratio": math.nan}).startswith(
        "no key figure could be measured")
