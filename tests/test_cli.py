"""The hiddenlens command: report and demo, progress, and one-line errors for bad arguments."""

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from numpy.testing import assert_allclose

import hiddenlens
from hiddenlens._faces import cli
from hiddenlens._faces.summary import ANALYSES, available_analyses

# float32 recordings agree within this across torch thread counts (docs/options.md): the CLI
# may run at another thread count than the test
THREAD_RTOL = 1e-5

ROOT = Path(__file__).resolve().parents[1]
IMG = '<img src="data:image/png;base64,'
# The report and this test may run at different torch thread counts: float32 recordings then
# differ by ~1e-7 relative, so analysis outputs are compared at the documented tolerance of
# thread-count invariance (relative 1e-5), not bit for bit.
THREAD_RTOL = 1e-5
FACTORY = "hiddenlens.examples.sorting_line:make_tanh_rnn"


def _python_m(*args, cwd=ROOT):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "hiddenlens", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=120)


def test_version_via_python_m():
    r = _python_m("--version")
    assert r.returncode == 0
    assert r.stdout.strip() == f"hiddenlens {hiddenlens.__version__}"


def test_console_script_points_at_main():
    tomllib = pytest.importorskip("tomllib")
    meta = tomllib.loads((ROOT / "pyproject.toml").read_text())
    assert meta["project"]["scripts"]["hiddenlens"] == "hiddenlens._faces.cli:main"


def test_no_command_prints_help(capsys):
    assert cli.main([]) == 2
    assert "report" in capsys.readouterr().err


@pytest.fixture(scope="module")
def weights(tmp_path_factory):
    from hiddenlens.examples import sorting_line

    d = tmp_path_factory.mktemp("weights")
    paths = {}
    for gain in (0.5, 2.0):
        model = sorting_line.make_tanh_rnn(gain=gain, seed=1)
        paths[gain] = d / f"gain{gain}.pt"
        torch.save(model.state_dict(), paths[gain])
    gru = sorting_line.make_gru(seed=1)
    paths["gru"] = d / "gru.pt"
    torch.save(gru.state_dict(), paths["gru"])
    x = sorting_line.make_inputs(2, 30, seed=3)  # (B, T, 5)
    np.save(d / "x.npy", x)
    np.savez(d / "xs.npz", a=x, b=x[:, :10])
    np.save(d / "x4.npy", x[..., :4])
    (d / "junk.pt").write_bytes(b"not a weights file")
    (d / "junk.npy").write_bytes(b"not an array")
    np.save(d / "ints.npy", np.zeros((2, 5, 5), dtype=np.int64))
    return d


def _error(capsys, argv):
    code = cli.main(argv)
    err = capsys.readouterr().err.strip()
    assert code != 0
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("hiddenlens: error: ")
    return lines[0]


def test_report_single_model_from_npz_key(weights, tmp_path, capsys):
    out = tmp_path / "one.html"
    code = cli.main(["report", "--model", FACTORY, "--weights", str(weights / "gain0.5.pt"),
                     "--inputs", f"{weights / 'xs.npz'}:a", "--analyses", "pca,lyapunov",
                     "-o", str(out)])
    cap = capsys.readouterr()
    assert code == 0
    assert cap.out.strip() == str(out)
    assert "gain0.5: pca" in cap.err and "writing the report" in cap.err  # progress lines
    page = out.read_text()
    assert 'id="analysis-pca"' in page and 'id="analysis-lyapunov"' in page
    assert 'id="analysis-memory"' not in page
    assert f"read from {weights / 'xs.npz'}:a" in page
    doc = json.loads(out.with_suffix(".json").read_text())
    assert list(doc["runs"]) == ["gain0.5"] and doc["analyses"] == ["lyapunov", "pca"]
    # the JSON equals the library's own results on the same model and inputs
    from hiddenlens.examples import sorting_line

    model = sorting_line.make_tanh_rnn(gain=0.5, seed=1)
    x = np.load(weights / "xs.npz")["a"]
    trace = hiddenlens.record(model, x)
    pca = hiddenlens.pca_trajectories(trace, k=3)
    assert_allclose(doc["runs"]["gain0.5"]["key_figures"]["participation_ratio"],
                    pca.participation_ratio, rtol=THREAD_RTOL)
    lyap_options = doc["runs"]["gain0.5"]["options"]["lyapunov"]
    lyap = hiddenlens.lyapunov_spectrum(model, trace, **lyap_options)
    assert_allclose(doc["runs"]["gain0.5"]["arrays"]["lyapunov"]["exponents"], lyap.exponents,
                    rtol=THREAD_RTOL)


def test_report_comparison_with_probe_and_names(weights, tmp_path, capsys):
    threads = torch.get_num_threads()
    code = cli.main(["report", "--model", FACTORY, "--weights", str(weights / "gain0.5.pt"),
                     str(weights / "gain2.0.pt"), "--names", "low", "high", "--probe", "2,25",
                     "--analyses", "pca", "--seed", "3", "-q", "--threads", "1",
                     "-o", str(tmp_path / "cmp")])
    cap = capsys.readouterr()
    assert code == 0 and cap.err == ""
    assert torch.get_num_threads() == threads  # restored for the calling process
    path = tmp_path / "cmp" / "report.html"
    assert cap.out.strip() == str(path)
    page = path.read_text()
    assert 'id="similarity"' in page and page.count(IMG) == 1 + 3
    assert "built-in probe: i.i.d. standard-normal inputs, 2 x 25 steps, seed 3" in page
    doc = json.loads((tmp_path / "cmp" / "report.json").read_text())
    assert doc["comparison"]["names"] == ["low", "high"] and doc["inputs"]["shape"] == [2, 25, 5]


@pytest.mark.parametrize("argv, reason", [
    (["--model", "no_colon"], "must look like package.module:function"),
    (["--model", "no_such_pkg.nets:make"], "cannot import module 'no_such_pkg.nets'"),
    (["--model", "hiddenlens.examples.sorting_line:nope"], "has no attribute 'nope'"),
    (["--model", "hiddenlens.examples.sorting_line:N_INPUTS"], "is not callable"),
    (["--model", "hiddenlens.examples.sorting_line:make_dataset"], "not a torch.nn.Module"),
    (["--weights", "{d}/missing.pt"], "weights file '{d}/missing.pt' not found"),
    (["--weights", "{d}/junk.pt"], "cannot read weights from '{d}/junk.pt'"),
    (["--weights", "{d}/gru.pt"], "do not fit the model"),
    (["--inputs", "{d}/nothing.npy"], "inputs file '{d}/nothing.npy' not found"),
    (["--inputs", "{d}/junk.npy"], "cannot read inputs from '{d}/junk.npy'"),
    (["--inputs", "{d}/ints.npy"], "expected floating-point numbers"),
    (["--inputs", "{d}/xs.npz"], "holds arrays a, b; pick one"),
    (["--inputs", "{d}/xs.npz:c"], "has no array 'c'"),
    (["--inputs", "{d}/x4.npy"], "have 4 features but the model expects 5"),
    (["--analyses", "pca,lyapunof"], "unknown analysis 'lyapunof'"),
    (["--names", "a", "b"], "--names has 2 names for 1 weights files"),
])
def test_report_bad_arguments_fail_with_one_line(weights, capsys, tmp_path, argv, reason):
    opts = {"--model": FACTORY, "--weights": str(weights / "gain0.5.pt"), "--probe": "2,10",
            "--analyses": "pca"}
    given = [a.format(d=weights) for a in argv]
    opts.update({given[0]: None})
    if given[0] == "--inputs":
        del opts["--probe"]
    args = [x for k, v in opts.items() if v is not None for x in (k, v)]
    line = _error(capsys, ["report", *args, *given, "-o", str(tmp_path / "r")])
    assert reason.format(d=weights) in line
    assert not (tmp_path / "r").exists()


def test_weights_mismatch_names_keys_and_shapes(weights, capsys, tmp_path):
    line = _error(capsys, ["report", "--model", FACTORY, "--weights", str(weights / "gru.pt"),
                           "--probe", "2,10", "-o", str(tmp_path)])
    assert "shape mismatch: rnn.weight_ih_l0 (96, 5) in the file vs (32, 5) in the model" in line
    sd = torch.load(weights / "gain0.5.pt", weights_only=True)
    sd["extra.weight"] = torch.zeros(2)
    del sd["readout.bias"]
    torch.save(sd, tmp_path / "odd.pt")
    line = _error(capsys, ["report", "--model", FACTORY, "--weights", str(tmp_path / "odd.pt"),
                           "--probe", "2,10", "-o", str(tmp_path)])
    assert "missing keys readout.bias" in line and "unexpected keys extra.weight" in line


def test_argparse_errors_exit_non_zero():
    r = _python_m("report", "--model", FACTORY)  # --weights missing
    assert r.returncode == 2 and "--weights" in r.stderr
    r = _python_m("report", "--model", FACTORY, "--weights", "w.pt", "--probe", "3")
    assert r.returncode == 2 and "expected N,T" in r.stderr


def test_bad_report_via_python_m_is_one_line(tmp_path):
    r = _python_m("report", "--model", "nowhere:make", "--weights", "w.pt")
    assert r.returncode == 1
    assert r.stderr.strip().splitlines() == [
        "hiddenlens: error: cannot import module 'nowhere' named in --model: No module named "
        "'nowhere'; check the spelling and that it is on the Python path"]


def _demo_weights_present():
    try:
        import hiddenlens.examples as example_models
    except ImportError:
        return False
    from hiddenlens.examples import sorting_line

    return all(example_models.weights_path(n).is_file()
               for n in example_models.list_runs(task=sorting_line))


@pytest.mark.slow
@pytest.mark.skipif(not _demo_weights_present(), reason="example weights not trained yet")
def test_demo_report_on_the_example_models(tmp_path, capsys):
    import hiddenlens.examples as example_models
    from hiddenlens.examples import sorting_line

    code = cli.main(["demo", "-o", str(tmp_path / "demo")])
    cap = capsys.readouterr()
    assert code == 0
    path = tmp_path / "demo" / "report.html"
    assert cap.out.strip() == str(path)
    page = path.read_text(encoding="utf-8")
    doc = json.loads(path.with_suffix(".json").read_text())
    names = example_models.list_runs(task=sorting_line)
    assert doc["comparison"]["names"] == names
    assert "http://" not in page and "https://" not in page and "<script" not in page
    sections = dict(re.findall(r'<section id="analysis-(\w+)">(.*?)</section>', page, re.S))
    present = available_analyses()
    for a in ANALYSES:
        if a in present:
            assert sections[a].count(IMG) == 1 + len(names), a  # overlay + one per run
        else:
            assert "Skipped" in sections[a]
    assert page.count(IMG) == 1 + len(present) * (1 + len(names))
    for n in names:
        assert f"<b>{n}</b>" in page
        # the diagnosis reads the shipped training record (example_models/weights)
        assert doc["runs"][n]["diagnosis"]["task"]["loss"] == \
            example_models.task_metrics(n)["loss"]
    assert page.index('id="diagnosis"') < page.index('id="summary"')
    # the JSON equals the library's results: recompute one run with the public functions
    n = "gru" if "gru" in names else names[-1]
    run = doc["runs"][n]
    model = example_models.load_run(n)
    n_seq, n_steps = cli.DEMO_PROBE
    x = sorting_line.make_inputs(n_seq, n_steps, seed=0)
    trace = hiddenlens.record(model, x)
    opts = run["options"]
    if "pca" in present:
        # the PCA is fitted on the one-crate trials, labelled by tag colour and aligned to the
        # flash (the trials of the task-memory analysis)
        trials = sorting_line.make_trials(*cli.DEMO_TRIALS, seed=0)
        pca = hiddenlens.pca_trajectories(hiddenlens.record(model, trials.inputs),
                                          k=opts["pca"]["k"], labels=trials.colour,
                                          onsets=trials.onset)
        assert_allclose(run["key_figures"]["participation_ratio"], pca.participation_ratio,
                        rtol=THREAD_RTOL)
        assert run["arrays"]["pca"]["conditions"] == ["0", "1", "2"]
        assert "mean trajectories of 3 conditions" in sections["pca"]
    if "lyapunov" in present:
        lyap = hiddenlens.lyapunov_spectrum(model, trace, **opts["lyapunov"])
        assert_allclose(run["arrays"]["lyapunov"]["exponents"], lyap.exponents, rtol=THREAD_RTOL)
        assert_allclose(run["key_figures"]["lyapunov_max"], lyap.exponents[0], rtol=THREAD_RTOL)
    if "memory" in present:
        # data mode by default: the memory of the demo's own inputs, on the recorded trace
        assert opts["memory"]["mode"] == "data"
        mem = hiddenlens.memory_curve(model, trace, **opts["memory"])
        assert run["key_figures"]["memory_span"] == mem.span
        assert_allclose(run["arrays"]["memory"]["scores"], mem.scores, rtol=THREAD_RTOL)
    if "fixed_points" in present:
        fp = hiddenlens.find_fixed_points(model, trace, **opts["fixed_points"])
        assert run["arrays"]["fixed_points"]["stability"] == fp.stability.tolist()
    if "task_memory" in present and "gru" in names:
        # the shipped GRU was trained to hold a tag 20-40 steps (example_models/train.py): it
        # must keep the colour well past the shortest delay
        assert doc["runs"]["gru"]["key_figures"]["task_memory_span"] >= 30
        assert "task variable" in page


def test_report_damaged_inputs_fail_with_one_line(weights, capsys, tmp_path):
    import os

    np.savez(tmp_path / "x.npz", a=np.load(weights / "x.npy"))
    data = (tmp_path / "x.npz").read_bytes()
    (tmp_path / "cut.npz").write_bytes(data[: len(data) // 2])
    flipped = bytearray(data)
    flipped[200] ^= 0xFF
    (tmp_path / "flip.npz").write_bytes(bytes(flipped))
    os.mkfifo(tmp_path / "pipe.npy")
    base = ["report", "--model", FACTORY, "--weights", str(weights / "gain0.5.pt"),
            "--analyses", "pca", "-o", str(tmp_path / "r")]
    for name, reason in (("cut.npz", "cannot read inputs"), ("flip.npz", "damaged"),
                         ("pipe.npy", "not a regular file")):
        line = _error(capsys, [*base, "--inputs", str(tmp_path / name)])
        assert reason in line and name in line
    assert not (tmp_path / "r").exists()


def test_report_refuses_to_overwrite_without_force(weights, capsys, tmp_path):
    out = tmp_path / "r.html"
    argv = ["report", "--model", FACTORY, "--weights", str(weights / "gain0.5.pt"),
            "--probe", "2,10", "--analyses", "pca", "-q", "-o", str(out)]
    assert cli.main(argv) == 0
    first = out.read_text()
    capsys.readouterr()
    line = _error(capsys, argv)
    assert "a report already exists" in line and "--force" in line
    assert out.read_text() == first
    assert cli.main([*argv, "--force"]) == 0


def test_model_factory_import_leaves_sys_path_alone(tmp_path, monkeypatch):
    import sys

    (tmp_path / "my_factory_mod.py").write_text("def make():\n    return None\n")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(sys, "path", [p for p in sys.path if p not in ("", str(tmp_path))])
    before = list(sys.path)
    assert cli.load_factory("my_factory_mod:make")() is None  # found in the working folder
    assert sys.path == before  # and the folder is off the path again
    monkeypatch.delitem(sys.modules, "my_factory_mod")


def test_progress_label_never_passes_the_total(capsys):
    say = cli._Progress(quiet=False)
    say("pca done", 6, 6)
    say("pca", 5, 6)
    err = capsys.readouterr().err
    assert "[6/6] pca done" in err and "[7/6]" not in err and "[6/6] pca\n" in err


def test_report_takes_targets_and_onsets(weights, tmp_path, capsys):
    B, T = 12, 20
    rng = np.random.default_rng(1)
    np.save(tmp_path / "x.npy", rng.standard_normal((B, T, 5)).astype(np.float32))
    np.savez(tmp_path / "y.npz", colour=rng.integers(2, size=B), onset=rng.integers(0, 4, B))
    base = ["report", "--model", FACTORY, "--weights", str(weights / "gain0.5.pt"),
            "--inputs", str(tmp_path / "x.npy"), "-q", "--analyses", "task_memory"]
    code = cli.main([*base, "--targets", f"{tmp_path / 'y.npz'}:colour",
                     "--onsets", f"{tmp_path / 'y.npz'}:onset", "-o", str(tmp_path / "r")])
    assert code == 0, capsys.readouterr().err
    doc = json.loads((tmp_path / "r" / "report.json").read_text())
    run = next(iter(doc["runs"].values()))
    assert "task_memory_span" in run["key_figures"]
    code = cli.main([*base, "--targets", str(tmp_path / "y.npz"), "-o", str(tmp_path / "s")])
    assert code == 1 and "pick one with --targets" in capsys.readouterr().err


@pytest.mark.slow
@pytest.mark.skipif(not _demo_weights_present(), reason="example weights not trained yet")
def test_demo_of_the_greenhouse_decodes_the_weather(tmp_path, capsys):
    code = cli.main(["demo", "--task", "greenhouse", "--analyses", "pca", "task_memory",
                     "-o", str(tmp_path / "gh"), "-q"])
    assert code == 0
    doc = json.loads((tmp_path / "gh" / "report.json").read_text())
    figs = doc["runs"]["greenhouse-lstm"]["key_figures"]
    # the day's weather stays decodable into the night (tests/test_example_models.py)
    assert figs["task_memory_span"] >= 20 and figs["task_memory_score"] == "balanced accuracy"
    assert "weather decoded at each step after sunset" in doc["inputs"]["description"]
