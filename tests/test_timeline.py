"""Checkpoint timelines: ordering from names or stored steps, figures per checkpoint, the page."""

import numpy as np
import pytest
import torch

import hiddenlens as hl
from example_models import sorting_line as sl
from hiddenlens._faces.cli import main

FACTORY = "example_models.sorting_line:make_tanh_rnn"
FIGS = ["lyapunov_max", "participation_ratio"]


def _states():
    # three "checkpoints": the same net at recurrent gains 0.5, 1.0, 1.5
    return [sl.make_tanh_rnn(gain=g, seed=0).state_dict() for g in (0.5, 1.0, 1.5)]


def test_folder_ordered_by_names_and_stored_steps(tmp_path):
    s = _states()
    torch.save(s[2], tmp_path / "step_1200.pt")
    torch.save(s[0], tmp_path / "step_300.pt")
    # a framework-style checkpoint: weights under state_dict with an attribute prefix, the
    # step stored inside, and a name carrying epoch and step
    torch.save({"state_dict": {f"net.{k}": v for k, v in s[1].items()}, "global_step": 900,
                "epoch": 3}, tmp_path / "epoch=3-step=900.ckpt")
    (tmp_path / "notes.txt").write_text("not a checkpoint")
    x = sl.make_inputs(4, 60, seed=2)
    tl = hl.timeline(tmp_path, FACTORY, x, figures=FIGS, n_boot=20, progress=False)
    assert tl.checkpoints == ("step_300.pt", "epoch=3-step=900.ckpt", "step_1200.pt")
    np.testing.assert_array_equal(tl.steps, [300, 900, 1200])
    assert tl.epochs[1] == 3
    assert all(e is None for e in tl.errors)
    # oracle: the library's own Lyapunov estimate of each net, loaded by hand
    for row, st in zip(range(3), s):
        model = sl.make_tanh_rnn()
        model.load_state_dict(st)
        ref = hl.lyapunov_spectrum(model, hl.record(model, x), k=1, warmup=15,
                                   seed=0).exponents[0]
        np.testing.assert_allclose(tl.values[row, 0], ref, rtol=1e-5)
    assert tl.values[0, 0] < tl.values[2, 0]  # larger gain, larger exponent
    t = tl.table
    assert list(t.columns) == ["step", "epoch", "checkpoint", "figure", "value", "low", "high"]
    assert len(t) == 6
    import matplotlib.pyplot as plt

    tl.plot()
    plt.close("all")


def test_bad_checkpoint_reported_and_list_order_kept(tmp_path):
    bad = tmp_path / "step_5.pt"
    bad.write_bytes(b"not a torch file")
    s = _states()
    tl = hl.timeline([s[1], str(bad), s[0]], sl.make_tanh_rnn, sl.make_inputs(2, 40, seed=1),
                     figures=["participation_ratio"], order="given", progress=False)
    assert tl.errors[0] is None and "weights_only" in tl.errors[1]
    assert np.isnan(tl.values[1, 0]) and np.isfinite(tl.values[2, 0])
    with pytest.raises(ValueError, match="not a folder"):
        hl.timeline(tmp_path / "missing", FACTORY, np.zeros((1, 5, 3)))
    with pytest.raises(ValueError, match="order"):
        hl.timeline([s[0]], FACTORY, np.zeros((1, 5, 3)), order="time")


def test_cli_writes_an_escaped_self_contained_page(tmp_path, capsys):
    ck = tmp_path / "ck"
    ck.mkdir()
    for step, st in zip((10, 20), _states()):
        torch.save(st, ck / f"step_{step}<b>.pt")
    np.save(tmp_path / "x.npy", sl.make_inputs(2, 40, seed=1))
    out = tmp_path / "out"
    assert main(["timeline", "--model", FACTORY, "--checkpoints", str(ck), "--inputs",
                 str(tmp_path / "x.npy"), "-o", str(out), "-q"]) == 0
    page = (out / "timeline.html").read_text()
    assert "step_10&lt;b&gt;.pt" in page and "<b>.pt" not in page
    assert "<svg" in page and "http" not in page.replace("http://www.w3.org/2000/svg", "")
    assert main(["timeline", "--model", "no_such_mod:f", "--checkpoints", str(ck),
                 "--inputs", str(tmp_path / "x.npy")]) == 1
    assert "no_such_mod" in capsys.readouterr().err


def test_report_reads_a_checkpoint_folder_as_one_run_over_time(tmp_path, capsys):
    import json

    ck = tmp_path / "gru-run"
    ck.mkdir()
    s = _states()
    # saved out of order; the report must analyse the last in training order (gain 1.5)
    torch.save(s[2], ck / "step_300.pt")
    torch.save(s[0], ck / "step_100.pt")
    torch.save(s[1], ck / "step_200.pt")
    x = sl.make_inputs(4, 40, seed=1)
    np.save(tmp_path / "x.npy", x)
    out = tmp_path / "rep" / "report.html"
    assert main(["report", "--model", FACTORY, "--checkpoints", str(ck), "--inputs",
                 str(tmp_path / "x.npy"), "--analyses", "lyapunov", "-o", str(out), "-q"]) == 0
    page = out.read_text()
    assert 'id="over-training"' in page and 'href="#over-training"' in page
    section = page[page.index('id="over-training"'):]
    section = section[:section.index("</section>")]
    # the page of its own draws the same charts: the drawing is shared, not copied
    tl = hl.timeline(ck, FACTORY, x, progress=False)
    from hiddenlens._faces.timeline_report import timeline_section

    assert timeline_section(tl, heading=3) in section
    assert section.count("<svg") == len(tl.figures)
    assert "step_100.pt" in section and "do not cover a change of input distribution" in section
    doc = json.loads(out.with_suffix(".json").read_text())
    run = doc["runs"]["gru-run"]
    assert [r["step"] for r in run["timeline"]["rows"]][::len(tl.figures)] == [100, 200, 300]
    # the run analysed in full is the last checkpoint: the library's estimate of that net
    model = sl.make_tanh_rnn()
    model.load_state_dict(s[2])
    ref = hl.run_analyses(model, x, which=["lyapunov"])
    assert run["key_figures"]["lyapunov_max"] == pytest.approx(
        hl.key_figures(ref)["lyapunov_max"], rel=1e-6)
    assert main(["report", "--model", FACTORY, "--checkpoints", str(tmp_path / "none"),
                 "-o", str(tmp_path / "r2")]) == 1
    assert "not a folder" in capsys.readouterr().err
    with pytest.raises(SystemExit):  # argparse: one of --weights, --checkpoints
        main(["report", "--model", FACTORY, "--checkpoints", str(ck), "--weights", "a.pt"])
    assert "not allowed with" in capsys.readouterr().err
