"""The user's own models through every face: record, every registered analysis, explore and the
command-line report.

Six kinds: a cell module of the user's own, a leaky RNN module, an LSTM with projection, one
direction of a bidirectional stack, a scripted (TorchScript) GRU and a GRU fed by an embedding of
token ids. Reference for the recorded states: each model's own forward (float32, 1e-6).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl

pytest.importorskip("ipywidgets")

B, T, I, H, VOCAB = 6, 30, 3, 4, 7


def _filled(module, seed=0, scale=0.6):
    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for p in module.parameters():
            p.copy_(torch.randn(p.shape, generator=gen) * scale)
    return module


class OwnCell(nn.Module):
    """A cell of the user's own in PyTorch's order, returning (output, hidden)."""

    def __init__(self):
        super().__init__()
        self.lin_x, self.lin_h = nn.Linear(I, H), nn.Linear(H, H)
        self.hidden_size, self.input_size = H, I

    def forward(self, input, hidden):
        h = torch.tanh(self.lin_x(input) + self.lin_h(hidden))
        return 2 * h, h


class Leaky(nn.Module):
    """h <- (1 - a) h + a tanh(W h + U x + b), weights exposed as hiddenlens recognises them."""

    def __init__(self):
        super().__init__()
        self.weight_hh = nn.Parameter(torch.zeros(H, H))
        self.weight_ih = nn.Parameter(torch.zeros(H, I))
        self.bias = nn.Parameter(torch.zeros(H))
        self.alpha = 0.3

    def forward(self, input, hidden):
        pre = hidden @ self.weight_hh.T + input @ self.weight_ih.T + self.bias
        return (1 - self.alpha) * hidden + self.alpha * torch.tanh(pre)


class Holder(nn.Module):
    def __init__(self, cell):
        super().__init__()
        self.cell = cell
        self.head = nn.Linear(H, 2)


class Tagger(nn.Module):
    def __init__(self):
        super().__init__()
        self.embed = nn.Embedding(VOCAB, I)
        self.rnn = nn.GRU(I, H, batch_first=True)
        self.head = nn.Linear(H, 2)


def _script(module):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # torch.jit.script's own deprecation notice
        return torch.jit.script(module)


# the factories the command line imports (test_user_models_faces:make_<kind>)
def make_cell():
    return Holder(OwnCell())


def make_leaky():
    return Holder(Leaky())


def make_lstm_proj():
    return nn.LSTM(I, H, proj_size=2, batch_first=True)


def make_bidirectional():
    return nn.GRU(I, H, num_layers=2, bidirectional=True, batch_first=True)


def make_scripted():
    return _script(nn.GRU(I, H, batch_first=True))


def make_embedding():
    return Tagger()


KINDS = {
    # kind: factory, wrap options, command-line flags, raw inputs are token ids
    "cell": (make_cell, {"cell": "cell"}, ["--cell", "cell"], False),
    "leaky": (make_leaky, {}, [], False),
    "lstm_proj": (make_lstm_proj, {}, [], False),
    "bidirectional": (make_bidirectional, {"direction": "backward"},
                      ["--direction", "backward"], False),
    "scripted": (make_scripted, {}, [], False),
    "embedding": (make_embedding, {"submodule": "rnn", "front": "embed"},
                  ["--submodule", "rnn", "--front", "embed"], True),
}

# small budgets: the faces, not the analyses, are under test here
OPTIONS = {"memory": {"max_lag": 5, "n_steps": 80}, "fixed_points": {"n_starts": 8},
           "lyapunov": {"warmup": 5}, "task_memory": {"max_lag": 5, "n_permutations": 3,
                                                      "level": 0.25, "n_folds": 2}}


def _inputs(ids: bool):
    rng = np.random.default_rng(0)
    if ids:
        return rng.integers(0, VOCAB, size=(B, T)).astype(np.int64)  # (B, T) token ids
    return rng.standard_normal((B, T, I)).astype(np.float32)  # (B, T, I)


def _own_states(kind, model, x):
    """The model's own forward: the states the recording must equal."""
    xt = torch.as_tensor(x)
    with torch.no_grad():
        if kind in ("cell", "leaky"):
            h, out = torch.zeros(B, H), []
            for t in range(T):
                r = model.cell(xt[:, t], h)
                h = r[1] if isinstance(r, tuple) else r
                out.append(h)
            return torch.stack(out, 1).numpy()
        if kind == "embedding":
            return model.rnn(model.embed(xt))[0].numpy()
        if kind == "bidirectional":
            return model(xt)[0][..., H:].flip(1).numpy()  # top layer, backward, its own time
        if kind == "scripted":
            # a scripted nn.GRU keeps no callable forward in torch 2.13 (overloads): the plain
            # module with the same weights computes the same map
            plain = nn.GRU(I, H, batch_first=True, device="meta").to_empty(device="cpu")
            plain.load_state_dict(model.state_dict())
            return plain(xt)[0].numpy()
        return model(xt)[0].numpy()


# Models behind a front end get probe-mode memory on their recurrent part, and untrained probes
# may leave the states' recorded range: that warning is the library's claim, not this test's
# subject (tests/test_memory.py checks it).
@pytest.mark.filterwarnings("ignore::hiddenlens.MemoryRangeWarning")
@pytest.mark.parametrize("kind", list(KINDS))
def test_user_model_through_every_face(kind, tmp_path, monkeypatch, capsys):
    factory, wrap_opts, flags, ids = KINDS[kind]
    model = _filled(factory()).eval()
    x = _inputs(ids)
    system = hl.wrap(model, **wrap_opts)

    # record: the model's own forward
    trace = hl.record(system, x)
    ref = _own_states(kind, model, x)
    assert np.abs(trace.part(system.output_part) - ref).max() <= 1e-6

    # every registered analysis, task memory included
    targets = np.arange(B) % 2
    res = hl.run_analyses(system, x, options=OPTIONS, context={"targets": targets})
    assert set(res) == set(hl.analyses()), res.skipped

    # explore: the widget and every one of its tabs
    from hiddenlens.widgets import explore

    view = explore(model, x, background=False, **wrap_opts)
    view.compute_all()
    for name in view._panels:
        view.select(name)
        assert not view._panels[name].message.value, (name, view._panels[name].message.value)
        assert view.images[name].startswith(b"\x89PNG"), name  # PNG signature (PNG spec 5.2)

    # the command-line report from a saved checkpoint
    from hiddenlens._faces import cli
    monkeypatch.syspath_prepend(str(__import__("pathlib").Path(__file__).parent))
    ckpt = tmp_path / "run.pt"
    torch.save({"state_dict": model.state_dict(), "epoch": 1}, ckpt)
    data = tmp_path / "inputs.npz"
    np.savez(data, x=x)
    np.save(tmp_path / "y.npy", targets)
    out = tmp_path / "report"
    argv = ["report", "--model", f"test_user_models_faces:make_{kind}", "--weights", str(ckpt),
            "--inputs", f"{data}:x", "--targets", str(tmp_path / "y.npy"), "-o", str(out), "-q",
            *flags]
    for a, opts in OPTIONS.items():
        argv += [arg for k, v in opts.items() for arg in ("--option", f"{a}.{k}={v!r}")]
    rc = cli.main(argv)
    assert rc == 0, capsys.readouterr().err
    html = (out / "report.html").read_text()
    import json

    figures = json.loads((out / "report.json").read_text())
    assert "Task-variable memory" in html and figures
