"""The user's own recurrent models: cells in PyTorch's order, leaky RNNs, snapshots, checkpoints.

References: each module's own forward (float32, 1e-6), torch.func.jacrev (float64, 1e-10) and an
independent numpy implementation of a GRU written in another framework's convention.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn
from torch.func import jacrev, vmap

import hiddenlens as hl
from hiddenlens._core.jacobians import _per_sample, input_jacobians, step_jacobians


def randn(gen, *shape, dtype=torch.float32, scale=1.0):
    return torch.randn(*shape, generator=gen, dtype=dtype) * scale


def fill(module, gen, scale=0.5):
    with torch.no_grad():
        for p in module.parameters():
            p.copy_(randn(gen, *p.shape, dtype=p.dtype, scale=scale))
    return module


class LeakyCell(nn.Module):
    """A user's continuous-time cell, h <- (1 - a) h + a tanh(W h + U x + b), PyTorch's order."""

    def __init__(self, n_in, n_hidden, alpha=0.2, nonlinearity="tanh", noise=0.0):
        super().__init__()
        self.weight_hh = nn.Parameter(torch.zeros(n_hidden, n_hidden))
        self.weight_ih = nn.Parameter(torch.zeros(n_hidden, n_in))
        self.bias = nn.Parameter(torch.zeros(n_hidden))
        self.alpha = alpha
        self.nonlinearity = nonlinearity
        self.noise = noise
        self.hidden_size, self.input_size = n_hidden, n_in

    def forward(self, input, hidden):
        pre = hidden @ self.weight_hh.T + input @ self.weight_ih.T + self.bias
        if self.training and self.noise:
            pre = pre + self.noise * torch.randn_like(pre)
        f = {"tanh": torch.tanh, "relu": torch.relu,
             "softplus": nn.functional.softplus}[self.nonlinearity]
        return (1 - self.alpha) * hidden + self.alpha * f(pre)


class PlainCell(nn.Module):
    """A cell of the user's own that is not a leaky RNN: returns (output, hidden)."""

    def __init__(self, n_in, n_hidden):
        super().__init__()
        self.lin_x = nn.Linear(n_in, n_hidden)
        self.lin_h = nn.Linear(n_hidden, n_hidden)

    def forward(self, a, b):  # neutral names: the order must come from sizes or order=
        h = torch.tanh(self.lin_x(a) + self.lin_h(b))
        return h * 2, h


class Holder(nn.Module):
    def __init__(self, cell, n_out=2):
        super().__init__()
        self.cell = cell
        self.readout = nn.Linear(cell.lin_h.out_features if hasattr(cell, "lin_h")
                                 else cell.hidden_size, n_out)


def own_run(cell, x, h, order="input_first"):
    """The cell's own forward, step by step (the reference)."""
    out = []
    with torch.no_grad():
        for t in range(x.shape[1]):
            r = cell(x[:, t], h) if order == "input_first" else cell(h, x[:, t])
            h = r[1] if isinstance(r, tuple) else r
            out.append(h)
    return torch.stack(out, 1)


# ---------------------------------------------------------------------- cells, order=
def test_plain_cell_in_pytorch_order_matches_its_forward(gen):
    # reference: the module's own forward (float32 1e-6)
    cell = fill(PlainCell(3, 5), gen).eval()
    sys = hl.wrap(cell, state_size=5, input_size=3)  # sizes differ: the probe decides
    assert sys.order == "input_first"
    x = randn(gen, 4, 9, 3)
    tr = hl.record(sys, x)
    ref = own_run(cell, x, torch.zeros(4, 5))
    assert np.abs(tr.states - ref.numpy()).max() <= 1e-6


def test_equal_sizes_with_neutral_names_ask_for_order(gen):
    cell = fill(PlainCell(4, 4), gen)
    with pytest.raises(ValueError, match="cannot tell the argument order.*order='input_first'"):
        hl.wrap(cell, state_size=4, input_size=4)
    sys = hl.wrap(cell, state_size=4, input_size=4, order="input_first")
    x = randn(gen, 2, 6, 4)
    ref = own_run(cell, x, torch.zeros(2, 4))
    assert np.abs(hl.record(sys, x).states - ref.numpy()).max() <= 1e-6
    with pytest.raises(ValueError, match="order must be 'input_first'"):
        hl.wrap(cell, state_size=4, input_size=4, order="backwards")


def test_argument_names_decide_order_for_equal_sizes(gen):
    # a leaky cell (input, hidden) with I == S: named arguments decide, never a silent swap
    cell = fill(LeakyCell(4, 4), gen)
    sys = hl.wrap(cell, state_size=4, input_size=4)
    assert sys.order == "input_first"
    x = randn(gen, 2, 7, 4)
    ref = own_run(cell, x, torch.zeros(2, 4))
    assert np.abs(hl.record(sys, x).states - ref.numpy()).max() <= 1e-6


def test_model_holding_a_cell_by_name(gen):
    model = Holder(fill(PlainCell(3, 5), gen))
    sys = hl.wrap(model, cell="cell", input_size=3, state_size=5)
    x = randn(gen, 2, 5, 3)
    ref = own_run(model.cell, x, torch.zeros(2, 5))
    assert np.abs(hl.record(sys, x).states - ref.numpy()).max() <= 1e-6
    with pytest.raises(ValueError, match="no submodule named 'core'.*'cell'"):
        hl.wrap(model, cell="core")


def test_cell_snapshot_and_fingerprints(gen, snapshot):
    cell = fill(PlainCell(3, 5), gen).train()
    snap = snapshot(cell)
    sys = hl.wrap(cell, state_size=5, input_size=3)
    x = randn(gen, 2, 4, 3)
    before = hl.record(sys, x).states.copy()
    snap.assert_unchanged()
    with torch.no_grad():
        cell.lin_h.weight.add_(1.0)  # training after wrap does not reach the system
    assert np.array_equal(hl.record(sys, x).states, before)
    assert hl.wrap(cell, state_size=5, input_size=3).fingerprint != sys.fingerprint


def test_closure_over_different_nets_gets_different_fingerprints(gen):
    def via(net):
        def step(state, x):
            return torch.tanh(net(torch.cat([state, x], dim=-1)))
        return step

    a, b = fill(nn.Linear(5, 3), gen), fill(nn.Linear(5, 3), gen)
    sa = hl.wrap(via(a), state_size=3, input_size=2)
    sb = hl.wrap(via(b), state_size=3, input_size=2)
    assert sa.fingerprint != sb.fingerprint
    x = randn(gen, 1, 3, 2)
    first = hl.record(sa, x).states.copy()
    with torch.no_grad():
        a.weight.mul_(3.0)
    assert np.array_equal(hl.record(sa, x).states, first)  # the closure's net was copied


# ---------------------------------------------------------------------- leaky RNNs
@pytest.mark.parametrize("nl", ["tanh", "relu", "softplus"])
@pytest.mark.parametrize("per_unit", [False, True])
def test_leaky_closed_form_equals_jacrev(gen, nl, per_unit):
    # reference: torch.func.jacrev of the same step (float64, 1e-10)
    H, I = 7, 3
    alpha = (torch.rand(H, generator=gen, dtype=torch.float64) * 0.9 + 0.05) if per_unit else 0.3
    sys = hl.leaky_rnn(randn(gen, H, H, dtype=torch.float64), randn(gen, H, I, dtype=torch.float64),
                       randn(gen, H, dtype=torch.float64), alpha=alpha, nonlinearity=nl,
                       dtype=torch.float64)
    s, x = randn(gen, 16, H, dtype=torch.float64), randn(gen, 16, I, dtype=torch.float64)
    J = step_jacobians(sys, s, x)
    K = input_jacobians(sys, s, x)
    Jr = vmap(jacrev(_per_sample(sys), argnums=0))(s, x)
    Kr = vmap(jacrev(_per_sample(sys), argnums=1))(s, x)
    assert (J - Jr).abs().max() <= 1e-10
    assert (K - Kr).abs().max() <= 1e-10


@pytest.mark.parametrize("nl", ["tanh", "relu", "softplus"])
def test_leaky_module_recognised_and_matches_forward(gen, nl, snapshot):
    # reference: the module's own forward (float32, 1e-6); its noise is off in eval and analysis
    cell = fill(LeakyCell(3, 6, alpha=0.25, nonlinearity=nl, noise=0.5), gen).train()
    snap = snapshot(cell)
    sys = hl.wrap(cell)
    assert sys.kind == "leaky" and sys.is_module
    x = randn(gen, 3, 12, 3)
    ref = own_run(cell.eval(), x, torch.zeros(3, 6))
    cell.train()
    assert np.abs(hl.record(sys, x).states - ref.numpy()).max() <= 1e-6
    snap.assert_unchanged()


def test_leaky_module_with_wrong_nonlinearity_is_refused(gen):
    cell = fill(LeakyCell(3, 6, nonlinearity="relu"), gen)
    cell.nonlinearity = "tanh"  # what it says differs from what forward does
    cell.forward = lambda input, hidden: (1 - 0.2) * hidden + 0.2 * torch.relu(
        hidden @ cell.weight_hh.T + input @ cell.weight_ih.T + cell.bias)
    with pytest.raises(ValueError, match="forward\\(input, hidden\\) differs"):
        hl.wrap(cell)


def test_leaky_from_arrays_dt_and_errors(gen):
    W, U = np.eye(4) * 0.5, np.ones((4, 2))
    sys = hl.leaky_rnn(W, U, dt=0.01, tau=0.1)
    assert sys.dt == 0.01
    assert np.allclose(sys.layers[0].alpha.numpy(), 0.1)
    tr = hl.record(sys, np.zeros((1, 5, 2)))
    assert tr.metadata["dt"] == 0.01
    with pytest.raises(ValueError, match=r"alpha = dt / tau must lie in \(0, 1\]"):
        hl.leaky_rnn(W, U, alpha=1.5)
    with pytest.raises(ValueError, match="needs the leak"):
        hl.leaky_rnn(W, U)
    with pytest.raises(ValueError, match="W must be square"):
        hl.leaky_rnn(np.ones((4, 3)), U, alpha=0.1)
    with pytest.raises(ValueError, match="nonlinearity must be one of"):
        hl.leaky_rnn(W, U, alpha=0.1, nonlinearity="sigmoid")


def test_leaky_lyapunov_per_unit_time(gen):
    # a linear leaky unit: h <- (1 - a) h + a * relu(w h) with w > 0 keeps pre > 0, so the map is
    # h <- (1 - a + a w) h and the exponent per step is log(1 - a + a w) (worked example)
    a, w, dt = 0.1, 0.5, 0.02
    sys = hl.leaky_rnn(np.array([[w]]), np.zeros((1, 1)), alpha=a, dt=dt, nonlinearity="relu",
                       dtype=torch.float64)
    res = hl.lyapunov_spectrum(sys, hl.record(sys, np.zeros((1, 200, 1)), np.array([[1.0]])),
                               warmup=0)
    per_step = np.log(1 - a + a * w)
    assert abs(float(np.ravel(res.exponents)[0]) - per_step) < 1e-6
    assert res.metadata["dt"] == dt


# ---------------------------------------------------------------------- outside conventions
def test_gru_from_reset_after_convention_matches_numpy(gen):
    """A GRU from another framework's convention, loaded into nn.GRUCell, equals numpy.

    The other convention (Keras' "reset_after=True" layout, from memory): kernel (I, 3H) and
    recurrent kernel (H, 3H) with gates ordered z, r, h, two bias rows, and the reset gate applied
    after the recurrent matmul: h~ = tanh(x W_h + b_ih_h + r * (h U_h + b_hh_h)),
    h' = z h + (1 - z) h~. That is PyTorch's GRU with gates reordered r, z, n.
    """
    rng = np.random.default_rng(0)
    I, H, B, T = 3, 4, 2, 6
    kernel, rec = rng.normal(size=(I, 3 * H)) * 0.5, rng.normal(size=(H, 3 * H)) * 0.5
    bias = rng.normal(size=(2, 3 * H)) * 0.1
    x = rng.normal(size=(B, T, I))

    def sig(v):
        return 1 / (1 + np.exp(-v))

    # independent numpy reference in the other convention
    h = np.zeros((B, H))
    ref = []
    for t in range(T):
        xk = x[:, t] @ kernel + bias[0]
        hk = h @ rec + bias[1]
        z = sig(xk[:, :H] + hk[:, :H])
        r = sig(xk[:, H:2 * H] + hk[:, H:2 * H])
        cand = np.tanh(xk[:, 2 * H:] + r * hk[:, 2 * H:])
        h = z * h + (1 - z) * cand
        ref.append(h)
    ref = np.stack(ref, 1)

    def reorder(m):  # columns z, r, h -> rows r, z, n
        z_, r_, n_ = np.split(m, 3, axis=-1)
        return np.concatenate([r_, z_, n_], axis=-1)

    cell = nn.GRUCell(I, H, dtype=torch.float64, device="meta").to_empty(device="cpu")
    with torch.no_grad():
        cell.weight_ih.copy_(torch.from_numpy(reorder(kernel).T))
        cell.weight_hh.copy_(torch.from_numpy(reorder(rec).T))
        cell.bias_ih.copy_(torch.from_numpy(reorder(bias[0])))
        cell.bias_hh.copy_(torch.from_numpy(reorder(bias[1])))
    tr = hl.record(hl.wrap(cell, dtype=torch.float64), x)
    assert np.abs(tr.states - ref).max() <= 1e-12


# ---------------------------------------------------------------------- checkpoints
class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.rnn = nn.GRU(3, 5, batch_first=True)
        self.readout = nn.Linear(5, 2)

    def forward(self, x):
        return self.readout(self.rnn(x)[0])


def test_load_weights_nested_prefixed_with_extras(gen, tmp_path, snapshot):
    src = fill(Net(), gen)
    state = {f"module.{k}": v for k, v in src.state_dict().items()}
    state["module.head2.weight"] = torch.zeros(1)
    path = tmp_path / "ckpt.pt"
    torch.save({"epoch": 3, "state_dict": state}, path)
    fresh = Net()
    snap = snapshot(fresh)
    got = hl.load_weights(fresh, path)
    snap.assert_unchanged()  # loaded into a copy
    assert got.nested_key == "state_dict" and got.prefix == "module."
    assert got.extra_keys == ("head2.weight",)
    for k, v in src.state_dict().items():
        assert torch.equal(got.model.state_dict()[k], v)


def test_load_weights_refusals(gen, tmp_path):
    src = fill(Net(), gen)
    partial = {k: v for k, v in src.state_dict().items() if not k.startswith("readout")}
    with pytest.raises(ValueError, match="missing keys readout.weight, readout.bias"):
        hl.load_weights(Net(), partial)
    npz = tmp_path / "w.npz"
    np.savez(npz, a=np.zeros(2))
    with pytest.raises(ValueError, match="NumPy .npz archive, not a PyTorch checkpoint"):
        hl.load_weights(Net(), npz)
    bad = dict(src.state_dict())
    bad["readout.bias"] = torch.zeros(3)
    with pytest.raises(ValueError,
                       match=r"shape mismatch: readout.bias \(3,\) in the file vs \(2,\)"):
        hl.load_weights(Net(), bad)


# ---------------------------------------------------------------------- loss gradients
def test_loss_gradient_norms_steps_out_of_range_and_attributes(gen, snapshot):
    class Keeps(Net):
        def forward(self, x):
            out, h = self.rnn(x)
            self.last = h  # a forward that assigns an attribute
            return self.readout(out)

    model = fill(Keeps(), gen)
    snap = snapshot(model)
    x = randn(gen, 2, 30, 3)
    with pytest.raises(ValueError, match=r"steps \[99\] lie outside the model's 30 output steps"):
        hl.loss_gradient_norms(model, x, lambda out: out.pow(2).sum(), steps=[99])
    res = hl.loss_gradient_norms(model, x, lambda out: out.pow(2).sum(), steps=[29])
    assert res.norms.shape == (2, 30)
    assert not hasattr(model, "last")
    snap.assert_unchanged()


# ---------------------------------------------------------------------- variable lengths
def test_lengths_saved_and_padding_left_out_of_pca(gen, tmp_path):
    from sklearn.decomposition import PCA

    gru = fill(nn.GRU(3, 6, batch_first=True), gen)
    x = randn(gen, 3, 10, 3)
    lengths = [10, 4, 7]
    for b, n in enumerate(lengths):
        x[b, n:] = 0.0  # padding
    tr = hl.record(gru, x, lengths=lengths)
    path = tmp_path / "t.npz"
    tr.save(path)
    assert hl.load_trace(path).metadata["lengths"] == lengths
    # reference: scikit-learn PCA fitted on the real steps only
    real = np.concatenate([tr.states[b, :n] for b, n in enumerate(lengths)]).astype(np.float64)
    ref = PCA(n_components=2).fit(real)
    res = hl.pca_trajectories(tr, k=2)
    assert np.allclose(res.explained_variance, ref.explained_variance_, rtol=1e-8)
    assert np.allclose(np.abs(res.components), np.abs(ref.components_), atol=1e-8)
    mask = np.arange(10)[None] < np.array(lengths)[:, None]
    assert hl.record(gru, x, mask=mask).metadata["lengths"] == lengths
    assert tr.select(samples=[1, 2], steps=slice(2, 8)).metadata["lengths"] == [2, 5]
    with pytest.raises(ValueError, match="lengths must lie in 1 .. 10"):
        hl.record(gru, x, lengths=[11, 1, 1])
    bad = mask.copy()
    bad[0, 3] = False
    with pytest.raises(ValueError, match="mask must mark a prefix"):
        hl.record(gru, x, mask=bad)


# ---------------------------------------------------------------------- TorchScript
class TwoRates(nn.Module):
    """A scripted model holding one LSTMCell per sample rate (two copies of the same layout)."""

    def __init__(self):
        super().__init__()
        self.cell_8k = nn.LSTMCell(3, 5)
        self.cell_16k = nn.LSTMCell(3, 5)

    def forward(self, x: torch.Tensor, h: tuple[torch.Tensor, torch.Tensor]):
        return self.cell_8k(x, h)


def _script(module):
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # torch.jit.script's own deprecation notice
        return torch.jit.script(module)


@pytest.mark.parametrize("cls", [nn.GRU, nn.LSTM, nn.RNN])
def test_scripted_modules_use_closed_forms_and_match_forward(gen, cls):
    # reference: the scripted module's own forward (float32, 1e-6)
    plain = fill(cls(3, 5, batch_first=True), gen)
    m = _script(plain)
    sys = hl.wrap(m)
    assert sys.is_module and sys.fingerprint == hl.wrap(plain).fingerprint
    x = randn(gen, 2, 8, 3)
    with torch.no_grad():
        # a scripted nn.GRU/LSTM keeps no callable forward in torch 2.13 (overloads); the module
        # it was scripted from computes the same map from the same weights
        out = m.forward_tensor(x)[0] if hasattr(m, "forward_tensor") else plain(x)[0]
    tr = hl.record(sys, x)
    assert np.abs(tr.part("layer0.h") - out.numpy()).max() <= 1e-6


def test_scripted_model_with_two_cells_lists_them(gen):
    model = _script(fill(TwoRates(), gen))
    with pytest.raises(ValueError, match="2 recurrent submodules \\('cell_8k', 'cell_16k'\\)"):
        hl.wrap(model)
    sys = hl.wrap(model, submodule="cell_16k")
    assert sys.kind == "lstm"
    cell = model.cell_16k
    x = randn(gen, 2, 6, 3)
    h, c = torch.zeros(2, 5), torch.zeros(2, 5)
    ref = []
    with torch.no_grad():
        for t in range(6):
            h, c = cell(x[:, t], (h, c))
            ref.append(h)
    assert np.abs(hl.record(sys, x).part("layer0.h") - torch.stack(ref, 1).numpy()).max() <= 1e-6


# ---------------------------------------------------------------------- front ends
class Tagger(nn.Module):
    """Token ids -> embedding -> GRU -> readout."""

    def __init__(self):
        super().__init__()
        self.embed = nn.Embedding(11, 4)
        self.rnn = nn.GRU(4, 6, batch_first=True)
        self.head = nn.Linear(6, 3)

    def forward(self, ids):
        return self.head(self.rnn(self.embed(ids))[0])


def test_embedding_front_end_records_from_token_ids(gen, snapshot):
    # reference: the model's own embedding and GRU (float32, 1e-6)
    model = fill(Tagger(), gen)
    snap = snapshot(model)
    ids = torch.randint(0, 11, (3, 9), generator=gen)
    tr = hl.record(model, ids, submodule="rnn", front="embed")
    with torch.no_grad():
        ref = model.rnn(model.embed(ids))[0]
    assert np.abs(tr.part("layer0.h") - ref.numpy()).max() <= 1e-6
    assert tr.metadata["front"] == "embed" and tr.input_size == 4
    assert hl.pca_trajectories(tr, k=2).projected.shape == (3, 9, 2)
    snap.assert_unchanged()
    with pytest.raises(ValueError, match="no submodule named 'embedding' to use as front end"):
        hl.wrap(model, front="embedding")


# ---------------------------------------------------------------------- LSTM with proj_size
@pytest.mark.parametrize("L", [1, 2])
def test_lstm_proj_size_matches_forward_and_jacrev(gen, L):
    # references: the module's own forward (float32, 1e-6); torch.func.jacrev (float64, 1e-10)
    m = fill(nn.LSTM(3, 6, num_layers=L, proj_size=4, batch_first=True), gen)
    x = randn(gen, 2, 9, 3)
    h0, c0 = randn(gen, L, 2, 4, scale=0.3), randn(gen, L, 2, 6, scale=0.3)
    tr = hl.record(m, x, h0=(h0, c0))
    with torch.no_grad():
        out, (hn, cn) = m(x, (h0, c0))
    assert tr.state_size == L * 10
    assert np.abs(tr.part(f"layer{L - 1}.h") - out.numpy()).max() <= 1e-6
    assert np.abs(tr.states[:, -1, tr.parts[f"layer{L - 1}.c"]] - cn[-1].numpy()).max() <= 1e-6
    sys = hl.wrap(m, dtype=torch.float64)
    S = sys.state_size
    s, u = randn(gen, 6, S, dtype=torch.float64), randn(gen, 6, 3, dtype=torch.float64)
    Jr = vmap(jacrev(_per_sample(sys), argnums=0))(s, u)
    Kr = vmap(jacrev(_per_sample(sys), argnums=1))(s, u)
    assert (step_jacobians(sys, s, u) - Jr).abs().max() <= 1e-10
    assert (input_jacobians(sys, s, u) - Kr).abs().max() <= 1e-10
    from hiddenlens._core.jacobians import linearize

    lin = linearize(sys, s, u)
    V = randn(gen, 6, S, 3, dtype=torch.float64)
    assert (lin.jvp(V) - Jr @ V).abs().max() <= 1e-10
    assert (lin.vjp(V) - Jr.transpose(1, 2) @ V).abs().max() <= 1e-10


# ---------------------------------------------------------------------- loss gradients, systems
def test_loss_gradient_norms_of_a_system_equal_module_route(gen):
    # reference: the module route (hooks + closed-form adjoint) on the same GRU, and a
    # leaky RNN's gradient by hand at the last step (dL/ds_T = 2 s_T for L = sum s_T^2)
    class Model(nn.Module):
        def __init__(self):
            super().__init__()
            self.rnn = nn.GRU(3, 5, batch_first=True)

        def forward(self, x):
            return self.rnn(x)[0]

    model = fill(Model(), gen)
    x = randn(gen, 2, 12, 3)
    a = hl.loss_gradient_norms(model, x, lambda out: out.pow(2).sum(), steps=[11])
    b = hl.loss_gradient_norms(hl.wrap(model), x, lambda s: s.pow(2).sum(), steps=[11])
    # the module route reads the loss gradient off the model's own float32 forward
    assert np.allclose(a.norms, b.norms, rtol=1e-5, atol=1e-9)
    f64 = torch.float64
    leaky = hl.leaky_rnn(randn(gen, 4, 4, dtype=f64), randn(gen, 4, 3, dtype=f64), alpha=0.3,
                         dtype=f64)
    res = hl.loss_gradient_norms(leaky, x.double(), lambda s: s.pow(2).sum(), steps=[-1])
    last = hl.record(leaky, x.double()).states[:, -1]
    assert np.allclose(res.norms[:, -1], np.linalg.norm(2 * last, axis=1), rtol=1e-12)
    assert (res.norms[:, :-1] > 0).all()


# ---------------------------------------------------------------------- command line
class Seq2Seq(nn.Module):
    """Two recurrent submodules: the CLI needs --submodule."""

    def __init__(self):
        super().__init__()
        self.encoder = nn.GRU(3, 5, batch_first=True)
        self.decoder = nn.GRU(5, 5, batch_first=True)
        self.readout = nn.Linear(5, 2)


def make_seq2seq():
    return Seq2Seq()


def test_cli_submodule_option_lengths_and_nested_checkpoint(gen, tmp_path, capsys):
    from hiddenlens._faces import cli
    src = fill(Seq2Seq(), gen)
    state = {f"model.{k}": v for k, v in src.state_dict().items()}
    state["model.extra_head.weight"] = torch.zeros(2)
    ckpt = tmp_path / "run.ckpt"
    torch.save({"state_dict": state, "epoch": 7}, ckpt)
    x = np.random.default_rng(0).normal(size=(3, 10, 3)).astype(np.float32)
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "n.npy", np.array([10, 6, 8]))
    out = tmp_path / "rep"
    rc = cli.main(["report", "--model", "test_user_models:make_seq2seq", "--weights", str(ckpt),
                   "--submodule", "encoder", "--inputs", str(tmp_path / "x.npy"),
                   "--lengths", str(tmp_path / "n.npy"), "--analyses", "pca",
                   "--option", "pca.k=2", "-o", str(out), "-q"])
    assert rc == 0
    assert "extra_head.weight" not in capsys.readouterr().err  # -q: no notes
    assert any(out.iterdir())
    rc = cli.main(["report", "--model", "test_user_models:make_seq2seq", "--weights", str(ckpt),
                   "--probe", "2,10", "--analyses", "pca", "-o", str(tmp_path / "r2")])
    assert rc != 0
    assert "pick one with wrap(model, submodule='encoder')" in capsys.readouterr().err
    rc = cli.main(["report", "--model", "test_user_models:make_seq2seq", "--weights", str(ckpt),
                   "--submodule", "encoder", "--probe", "2,10", "--option", "pca.k",
                   "-o", str(tmp_path / "r3")])
    assert rc != 0 and "must read ANALYSIS.KEY=VALUE" in capsys.readouterr().err


def test_leaky_cell_inside_a_model_by_name_uses_the_closed_form(gen):
    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.core = fill(LeakyCell(3, 4), gen)
            self.head = nn.Linear(4, 1)

    model = Net()
    sys = hl.wrap(model, cell="core")
    assert sys.kind == "leaky"
    plain = fill(PlainCell(3, 5), gen)
    plain.hidden_size, plain.input_size = 5, 3
    assert hl.wrap(plain, order="input_first").order == "input_first"


# ---------------------------------------------------------------------- bidirectional stacks
@pytest.mark.parametrize("cls, kw", [(nn.GRU, {}), (nn.LSTM, {}), (nn.LSTM, {"proj_size": 3}),
                                     (nn.RNN, {"nonlinearity": "relu"})])
def test_bidirectional_stack_one_layer_one_direction(gen, cls, kw, snapshot):
    # references: the module's own forward (float32, 1e-6; a stack of the first l + 1 layers
    # for lower layers) and torch.func.jacrev (float64, 1e-10)
    m = fill(cls(3, 5, num_layers=3, bidirectional=True, batch_first=True, **kw), gen)
    snap = snapshot(m)
    x = randn(gen, 2, 7, 3)
    for layer in range(3):
        sub = cls(3, 5, num_layers=layer + 1, bidirectional=True, batch_first=True,
                  device="meta", **kw).to_empty(device="cpu")  # no draw from the global RNG
        sub.load_state_dict({k: v for k, v in m.state_dict().items()
                             if int(k.split("_l")[1][0]) <= layer})
        with torch.no_grad():
            out = sub(x)[0]
        H = out.shape[-1] // 2
        for d in ("forward", "backward"):
            sys = hl.wrap(m, direction=d, layer=layer)
            h = hl.record(sys, x).part(f"layer{layer}.h")
            ref = out[..., :H] if d == "forward" else out[..., H:].flip(1)
            assert np.abs(h - ref.numpy()).max() <= 1e-6
            s64 = hl.wrap(m, direction=d, layer=layer, dtype=torch.float64)
            s = randn(gen, 4, s64.state_size, dtype=torch.float64)
            u = randn(gen, 4, s64.input_size, dtype=torch.float64)
            Jr = vmap(jacrev(_per_sample(s64), argnums=0))(s, u)
            Kr = vmap(jacrev(_per_sample(s64), argnums=1))(s, u)
            assert (step_jacobians(s64, s, u) - Jr).abs().max() <= 1e-10
            assert (input_jacobians(s64, s, u) - Kr).abs().max() <= 1e-10
    snap.assert_unchanged()


def test_bidirectional_stack_with_lengths_equals_packed_forward(gen):
    # reference: the module's own forward on a packed batch (float32, 1e-6); the backward
    # direction reads each sequence from its own last real step
    m = fill(nn.LSTM(3, 5, num_layers=2, bidirectional=True, batch_first=True), gen)
    x = randn(gen, 3, 8, 3)
    n = [8, 3, 5]
    packed = nn.utils.rnn.pack_padded_sequence(x, torch.tensor(n), batch_first=True,
                                               enforce_sorted=False)
    with torch.no_grad():
        out = nn.utils.rnn.pad_packed_sequence(m(packed)[0], batch_first=True)[0]
    for d in ("forward", "backward"):
        tr = hl.record(m, x, lengths=n, direction=d)
        assert tr.metadata["direction"] == d and tr.metadata["layer"] == 1
        h = tr.part("layer1.h")
        for b, nb in enumerate(n):
            mine = h[b, :nb] if d == "forward" else h[b, :nb][::-1]
            ref = out[b, :nb, :5] if d == "forward" else out[b, :nb, 5:]
            assert np.abs(mine - ref.numpy()).max() <= 1e-6


def test_embedding_into_bidirectional_stack(gen):
    # reference: the model's own embedding and stack (float32, 1e-6)
    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.embed = nn.Embedding(9, 4)
            self.rnn = nn.GRU(4, 5, num_layers=2, bidirectional=True, batch_first=True)

    model = fill(Net(), gen)
    ids = torch.randint(0, 9, (2, 6), generator=gen)
    tr = hl.record(model, ids, front="embed", direction="backward")
    with torch.no_grad():
        ref = model.rnn(model.embed(ids))[0][..., 5:].flip(1)
    assert np.abs(tr.part("layer1.h") - ref.numpy()).max() <= 1e-6
    assert tr.metadata["front"].startswith("embed + layers 0..0")


def test_cli_token_ids_need_the_front_end(tmp_path):
    from hiddenlens._faces import cli
    path = tmp_path / "ids.npz"
    np.savez(path, tokens=np.zeros((2, 5), dtype=np.int64))
    with pytest.raises(cli.CommandError, match="integer token ids are read with --front"):
        cli.load_inputs(f"{path}:tokens")
    assert cli.load_inputs(f"{path}:tokens", raw=True).shape == (2, 5)
    with pytest.raises(cli.CommandError, match=r"expected \(B, T\) or \(T,\) integers"):
        np.save(tmp_path / "bad.npy", np.zeros((2, 5, 1), dtype=np.int64))
        cli.load_inputs(str(tmp_path / "bad.npy"), raw=True)


def test_loss_gradient_norms_through_the_lower_layers(gen):
    # reference by hand: for L = sum of the top backward layer's final state squared,
    # dL/ds_T = 2 s_T at the last step (raw inputs pass through the lower layers first)
    m = fill(nn.GRU(3, 4, num_layers=2, bidirectional=True, batch_first=True), gen)
    sys = hl.wrap(m, direction="backward")
    x = randn(gen, 2, 6, 3)
    res = hl.loss_gradient_norms(sys, x, lambda s: s.pow(2).sum(), steps=[-1])
    last = hl.record(sys, x).states[:, -1]  # the backward state after reading x[:, 0]
    assert np.allclose(res.norms[:, -1], np.linalg.norm(2 * last, axis=1), rtol=1e-6)
