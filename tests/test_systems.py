"""Wrapping recurrent modules and step functions; torch's own modules are the reference."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from torch import nn

import hiddenlens as hl
from hiddenlens._core.systems import fingerprint

KINDS = {
    "rnn_tanh": (nn.RNN, {"nonlinearity": "tanh"}),
    "rnn_relu": (nn.RNN, {"nonlinearity": "relu"}),
    "gru": (nn.GRU, {}),
    "lstm": (nn.LSTM, {}),
}
CELLS = {
    "rnn_tanh": (nn.RNNCell, {"nonlinearity": "tanh"}),
    "rnn_relu": (nn.RNNCell, {"nonlinearity": "relu"}),
    "gru": (nn.GRUCell, {}),
    "lstm": (nn.LSTMCell, {}),
}
ATOL32 = 1e-6  # float32 agreement asked of the fused path (torch computes the same kernels)


def module(make, gen, kind, I=5, H=7, L=1, **kw):
    cls, extra = KINDS[kind]
    return make(cls, I, H, L, gen=gen, **extra, **kw)


def torch_forward(m, x_bf, h0=None):
    """The module's own output (batch first) and final states: the reference."""
    x = x_bf if m.batch_first else x_bf.transpose(0, 1)
    with torch.no_grad():
        out, hn = m(x) if h0 is None else m(x, h0)
    return (out if m.batch_first else out.transpose(0, 1)), hn


def assert_matches_module(trace, m, x, h0=None, atol=ATOL32):
    """Top layer h == output sequence; every layer's final h (and c) == h_n (and c_n)."""
    out, hn = torch_forward(m, x, h0)
    L = m.num_layers
    np.testing.assert_allclose(trace.part(f"layer{L - 1}.h"), out.numpy(), rtol=0, atol=atol)
    h_n, c_n = hn if isinstance(hn, tuple) else (hn, None)
    for k in range(L):
        np.testing.assert_allclose(trace.part(f"layer{k}.h")[:, -1], h_n[k].numpy(),
                                   rtol=0, atol=atol)
        if c_n is not None:
            np.testing.assert_allclose(trace.part(f"layer{k}.c")[:, -1], c_n[k].numpy(),
                                       rtol=0, atol=atol)


# ---------------------------------------------------------------------------- nn.RNN/GRU/LSTM
@pytest.mark.parametrize("kind", list(KINDS))
@pytest.mark.parametrize("num_layers", [1, 2, 3])
@pytest.mark.parametrize("bias", [True, False])
@pytest.mark.parametrize("batch_first", [True, False])
def test_module_matches_torch(make, gen, kind, num_layers, bias, batch_first):
    # reference: torch.nn.RNN/GRU/LSTM forward itself
    m = module(make, gen, kind, L=num_layers, bias=bias, batch_first=batch_first)
    x = torch.randn(3, 13, 5, generator=gen)
    trace = hl.record(m, x)
    assert_matches_module(trace, m, x)
    H = 7
    expected = [f"layer{k}.{p}" for k in range(num_layers)
                for p in (("h", "c") if kind == "lstm" else ("h",))]
    assert list(trace.parts) == expected
    assert trace.states.shape == (3, 13, H * len(expected))
    assert trace.states.dtype == np.float32
    system = hl.wrap(m)
    assert system.kind == kind and system.output_part == f"layer{num_layers - 1}.h"
    assert system.state_size == H * len(expected) and system.input_size == 5


@pytest.mark.parametrize("kind", list(KINDS))
def test_module_matches_torch_with_native_h0(make, gen, kind):
    # reference: torch forward with its own (L, B, H) / (h0, c0) initial states
    m = module(make, gen, kind, L=2, batch_first=True)
    x = torch.randn(4, 9, 5, generator=gen)
    h0 = torch.randn(2, 4, 7, generator=gen)
    native = (h0, torch.randn(2, 4, 7, generator=gen)) if kind == "lstm" else h0
    assert_matches_module(hl.record(m, x, native), m, x, native)


@pytest.mark.parametrize("kind", list(KINDS))
def test_float64_matches_double_module(make, gen, kind):
    # reference: the module converted to float64 by torch
    m = module(make, gen, kind, L=2, batch_first=True)
    x = torch.randn(2, 11, 5, generator=gen, dtype=torch.float64)
    trace = hl.record(m, x, dtype=torch.float64)
    assert trace.states.dtype == np.float64 and trace.inputs.dtype == np.float64
    assert trace.metadata["dtype"] == "float64"
    assert_matches_module(trace, m.double(), x, atol=1e-12)


@pytest.mark.parametrize("kind", list(KINDS))
def test_step_agrees_with_run(make, gen, kind):
    # the single step (used for Jacobians) and the fused run are the same map
    system = hl.wrap(module(make, gen, kind, L=3))
    x = torch.randn(2, 6, 5, generator=gen)
    s = torch.randn(2, system.state_size, generator=gen) * 0.5
    states = system.run(x, s)
    for t in range(6):
        s = system.step(s, x[:, t])
        torch.testing.assert_close(states[:, t], s, rtol=0, atol=ATOL32)


def test_long_lstm_sequence_matches_torch(make, gen):
    # the cell-state rebuild works in blocks of time steps: cross several block edges
    m = module(make, gen, "lstm", L=2, batch_first=True)
    x = torch.randn(2, 150, 5, generator=gen)
    h0 = (torch.randn(2, 2, 7, generator=gen), torch.randn(2, 2, 7, generator=gen))
    assert_matches_module(hl.record(m, x, h0), m, x, h0)


# ---------------------------------------------------------------------------- cells
@pytest.mark.parametrize("kind", list(CELLS))
@pytest.mark.parametrize("bias", [True, False])
def test_cell_matches_stepping_the_cell(make, gen, kind, bias):
    # reference: calling torch's cell once per step
    cls, extra = CELLS[kind]
    cell = make(cls, 4, 6, bias=bias, gen=gen, **extra)
    x = torch.randn(3, 10, 4, generator=gen)
    h = torch.randn(3, 6, generator=gen) * 0.5
    c = torch.randn(3, 6, generator=gen) * 0.5
    h0 = (h, c) if kind == "lstm" else h
    trace = hl.record(cell, x, h0)
    with torch.no_grad():
        for t in range(10):
            if kind == "lstm":
                h, c = cell(x[:, t], (h, c))
                np.testing.assert_allclose(trace.part("layer0.c")[:, t], c.numpy(), atol=ATOL32)
            else:
                h = cell(x[:, t], h)
            np.testing.assert_allclose(trace.part("layer0.h")[:, t], h.numpy(), atol=ATOL32)


@pytest.mark.parametrize("kind", list(CELLS))
def test_step_jacobian_matches_autograd_on_cell(make, gen, kind):
    # reference: torch.autograd.functional.jacobian of torch's own cell w.r.t. its state
    cls, extra = CELLS[kind]
    cell = make(cls, 3, 4, gen=gen, **extra).double()
    system = hl.wrap(cell, dtype="float64")
    x = torch.randn(1, 3, generator=gen, dtype=torch.float64)
    s = torch.randn(1, system.state_size, generator=gen, dtype=torch.float64)

    def cell_flat(state):
        if kind == "lstm":
            return torch.cat(cell(x, (state[:, :4], state[:, 4:])), dim=-1)
        return cell(x, state)

    expected = torch.autograd.functional.jacobian(cell_flat, s)[0, :, 0]  # (S, S)
    got = torch.func.jacrev(lambda v: system.step(v[None], x)[0])(s[0])
    torch.testing.assert_close(got, expected, rtol=1e-10, atol=1e-12)
    # and the step batches under vmap like the batched call
    xs = torch.randn(5, 3, generator=gen, dtype=torch.float64)
    ss = torch.randn(5, system.state_size, generator=gen, dtype=torch.float64)
    v = torch.func.vmap(lambda a, b: system.step(a[None], b[None])[0])(ss, xs)
    torch.testing.assert_close(v, system.step(ss, xs), rtol=1e-12, atol=1e-12)


# ---------------------------------------------------------------------------- bidirectional
@pytest.mark.parametrize("kind", list(KINDS))
@pytest.mark.parametrize("batch_first", [True, False])
def test_bidirectional_directions_match_output_halves(make, gen, kind, batch_first):
    # reference: torch's bidirectional output = [forward half, backward half] on the feature axis
    m = module(make, gen, kind, bidirectional=True, batch_first=batch_first)
    x = torch.randn(3, 12, 5, generator=gen)
    out, hn = torch_forward(m, x)
    h_n, c_n = hn if kind == "lstm" else (hn, None)
    fwd = hl.record(m, x, direction="forward")
    bwd = hl.record(m, x, direction="backward")
    assert not fwd.metadata["time_reversed"] and bwd.metadata["time_reversed"]
    np.testing.assert_allclose(fwd.part("layer0.h"), out[..., :7].numpy(), atol=ATOL32)
    # the backward direction's trace runs in its own time: step t read input T-1-t, so flipping
    # its time axis lines it up with torch's output
    np.testing.assert_allclose(bwd.part("layer0.h")[:, ::-1], out[..., 7:].numpy(), atol=ATOL32)
    np.testing.assert_array_equal(bwd.inputs, x.flip(1).numpy())
    np.testing.assert_allclose(fwd.part("layer0.h")[:, -1], h_n[0].numpy(), atol=ATOL32)
    np.testing.assert_allclose(bwd.part("layer0.h")[:, -1], h_n[1].numpy(), atol=ATOL32)
    if c_n is not None:
        np.testing.assert_allclose(bwd.part("layer0.c")[:, -1], c_n[1].numpy(), atol=ATOL32)
    assert hl.wrap(m, direction="backward").time_reversed


def test_bidirectional_backward_with_h0(make, gen):
    # reference: torch's (2, B, H) initial state; index 1 belongs to the backward direction
    m = module(make, gen, "gru", bidirectional=True, batch_first=True)
    x = torch.randn(2, 8, 5, generator=gen)
    h0 = torch.randn(2, 2, 7, generator=gen)
    out, _ = torch_forward(m, x, h0)
    bwd = hl.record(m, x, h0[1:], direction="backward")
    np.testing.assert_allclose(bwd.part("layer0.h")[:, ::-1], out[..., 7:].numpy(), atol=ATOL32)


def test_bidirectional_refusals(make, gen):
    single = module(make, gen, "lstm", bidirectional=True)
    with pytest.raises(ValueError, match=r"bidirectional; pick the direction.*"
                                         r"direction='forward'"):
        hl.wrap(single)
    with pytest.raises(ValueError, match="bidirectional; pick"):
        hl.wrap(single, direction="both")
    deep = module(make, gen, "gru", L=2, bidirectional=True)
    with pytest.raises(ValueError, match=r"bidirectional; pick the direction.*layer=k "
                                         r"\(default: the top layer, 1"):
        hl.wrap(deep)
    top = hl.wrap(deep, direction="forward")  # one layer and one direction: the top layer
    assert top.layer_index == 1 and list(top.parts) == ["layer1.h"] and top.front is not None
    with pytest.raises(ValueError, match=r"layer must be an integer in 0 \.\. 1"):
        hl.wrap(deep, direction="forward", layer=2)
    with pytest.raises(ValueError, match=r"not bidirectional; direction='backward'"):
        hl.wrap(module(make, gen, "gru"), direction="backward")
    assert not hl.wrap(module(make, gen, "gru"), direction="forward").time_reversed


def test_lstm_proj_size_layout(make, gen):
    # h holds proj_size units and c hidden_size (torch's own layout of h_n and c_n)
    m = make(nn.LSTM, 3, 6, proj_size=2, gen=gen)
    system = hl.wrap(m)
    assert dict(system.parts) == {"layer0.h": slice(0, 2), "layer0.c": slice(2, 8)}


# ---------------------------------------------------------------------------- user models
class Tagger(nn.Module):
    def __init__(self):
        super().__init__()
        self.embed = nn.Linear(4, 5)
        self.core = nn.GRU(5, 6, batch_first=True)
        self.head = nn.Linear(6, 2)


class EncoderDecoder(nn.Module):
    def __init__(self):
        super().__init__()
        self.encoder = nn.LSTM(3, 4)
        self.blocks = nn.ModuleList([nn.Linear(4, 4), nn.GRUCell(4, 4)])


def test_user_model_with_one_recurrent_submodule(make, gen):
    model = make(Tagger, gen=gen)
    system = hl.wrap(model)
    assert system.kind == "gru" and system.source == "Tagger" and system.input_size == 5
    assert system.model is model
    x = torch.randn(2, 7, 5, generator=gen)
    trace = hl.record(model, x)
    assert trace.metadata["model_class"] == "Tagger"
    assert_matches_module(trace, model.core, x)


def test_user_model_with_several_recurrent_submodules(make, gen):
    model = make(EncoderDecoder, gen=gen)
    with pytest.raises(ValueError, match=r"contains 2 recurrent submodules \('encoder', "
                                         r"'blocks\.1'\); pick one with "
                                         r"wrap\(model, submodule='encoder'\)"):
        hl.wrap(model)
    assert hl.wrap(model, submodule="blocks.1").kind == "gru"
    assert hl.wrap(model, submodule="encoder").kind == "lstm"
    with pytest.raises(ValueError, match=r"no recurrent submodule named 'decoder'; recurrent "
                                         r"submodules: 'encoder', 'blocks\.1'"):
        hl.wrap(model, submodule="decoder")


def test_model_without_recurrent_part(make, gen):
    model = make(nn.Sequential, nn.Linear(3, 3), nn.Tanh(), gen=gen)
    with pytest.raises(ValueError, match=r"Sequential contains no recurrent submodule.*"
                                         r"wrap\(fn, state_size=S, input_size=I\)"):
        hl.wrap(model)
    with pytest.raises(ValueError, match="contains no recurrent submodule"):
        hl.record(model, np.zeros((1, 2, 3), np.float32))


def test_meta_device_parameters_refused(make, gen):
    # 'meta' tensors hold no data: a stand-in for weights on a device this machine lacks
    m = make(nn.GRU, 3, 4, device="meta", gen=gen)
    with pytest.raises(ValueError, match=r"on device 'meta'.*map_location='cpu'.*model\.cpu\(\)"):
        hl.wrap(m)


def test_wrap_refuses_other_objects():
    system = hl.wrap(lambda s, x: s, state_size=2, input_size=0)
    with pytest.raises(TypeError, match="already a RecurrentSystem"):
        hl.wrap(system)
    with pytest.raises(TypeError, match=r"cannot wrap a int"):
        hl.wrap(3)
    with pytest.raises(ValueError, match="dtype must be float32 or float64"):
        hl.wrap(lambda s, x: s, state_size=2, input_size=0, dtype=torch.float16)


def test_fingerprint_tracks_weights(make):
    a = make(nn.GRU, 3, 4, gen=torch.Generator().manual_seed(1))
    b = make(nn.GRU, 3, 4, gen=torch.Generator().manual_seed(0))
    c = make(nn.GRU, 3, 4, gen=torch.Generator().manual_seed(0))
    assert fingerprint(b) == fingerprint(c) == hl.wrap(b).fingerprint
    assert fingerprint(a) != fingerprint(b)
    with torch.no_grad():
        c.weight_hh_l0[0, 0] += 1e-3
    assert fingerprint(b) != fingerprint(c)


def test_system_is_a_snapshot_of_the_weights(make, gen):
    m = module(make, gen, "rnn_tanh")
    system = hl.wrap(m)
    x = torch.randn(1, 4, 5, generator=gen)
    before = system.run(x, system.zeros(1))
    with torch.no_grad():
        m.weight_hh_l0.mul_(2)
    torch.testing.assert_close(system.run(x, system.zeros(1)), before, rtol=0, atol=0)


# ---------------------------------------------------------------------------- step functions
HENON_A, HENON_B = 1.4, 0.3  # classic values, Hénon 1976 Commun. Math. Phys. (value from memory)


def henon(s, x):
    return torch.stack([1 - HENON_A * s[:, 0] ** 2 + s[:, 1], HENON_B * s[:, 0]], dim=-1)


def test_autonomous_henon_map_matches_numpy():
    # reference: the same map iterated with numpy in float64
    trace = hl.record(henon, np.zeros((2, 25, 0)), np.array([[0.1, 0.0], [0.0, 0.2]]),
                      state_size=2, input_size=0, dtype="float64")
    s = np.array([[0.1, 0.0], [0.0, 0.2]])
    for t in range(25):
        s = np.stack([1 - HENON_A * s[:, 0] ** 2 + s[:, 1], HENON_B * s[:, 0]], axis=-1)
        np.testing.assert_allclose(trace.states[:, t], s, rtol=1e-12, atol=1e-12)
    assert trace.inputs.shape == (2, 25, 0) and trace.metadata["kind"] == "callable"
    assert trace.metadata["model_class"] == "henon" and list(trace.parts) == ["state"]


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_step_function_receives_the_system_dtype(gen, dtype):
    seen = []
    w = torch.randn(3, 3, generator=gen) * 0.3

    def fn(s, x):
        seen.append((s.dtype, x.dtype, x.is_contiguous()))
        # adding a float64 vector promotes a float32 result: the system must cast it back
        return torch.tanh(s @ w.to(s.dtype) + x) + torch.zeros(3, dtype=torch.float64)

    x64 = np.random.default_rng(1).standard_normal((2, 5, 3))  # float64 input data
    trace = hl.record(fn, x64, state_size=3, input_size=3, dtype=dtype)
    assert {d for d, _, _ in seen} == {dtype} and {d for _, d, _ in seen} == {dtype}
    assert all(c for _, _, c in seen)
    assert trace.states.dtype == np.dtype(str(dtype).replace("torch.", ""))


def test_step_function_parts_and_errors():
    system = hl.wrap(henon, state_size=2, input_size=0, parts={"x": slice(0, 1), "y": slice(1, 2)})
    assert dict(system.parts) == {"x": slice(0, 1), "y": slice(1, 2)}
    with pytest.raises(ValueError, match=r"needs its sizes: wrap\(fn, state_size=S"):
        hl.wrap(henon)
    with pytest.raises(ValueError, match="state_size must be an integer >= 1, got 0"):
        hl.wrap(henon, state_size=0, input_size=0)
    with pytest.raises(ValueError, match="input_size must be an integer >= 0, got 1.5"):
        hl.wrap(henon, state_size=2, input_size=1.5)
    with pytest.raises(ValueError, match="part 'y' = slice.*lies outside the state of size 2"):
        hl.wrap(henon, state_size=2, input_size=0, parts={"y": slice(1, 5)})
    with pytest.raises(ValueError, match="submodule= applies to recurrent modules"):
        hl.wrap(henon, state_size=2, input_size=0, submodule="core")
    with pytest.raises(ValueError, match=r"returned shape \(1, 3\) but states have shape "
                                         r"\(1, 2\)"):
        hl.record(lambda s, x: torch.zeros(1, 3), np.zeros((1, 3, 0)), state_size=2,
                  input_size=0)
    with pytest.raises(TypeError, match=r"must return a tensor of shape \(1, 2\), got tuple"):
        hl.record(lambda s, x: (s, s), np.zeros((1, 3, 0)), state_size=2, input_size=0)


class NoisyCell(nn.Module):
    """A step function that is a module with dropout (stochastic in training mode)."""

    def __init__(self):
        super().__init__()
        self.lin = nn.Linear(3, 3)
        self.drop = nn.Dropout(0.5)

    def forward(self, s, x):
        return torch.tanh(self.drop(self.lin(s)) + x)


def test_step_function_module_runs_in_eval_mode_and_keeps_rng(make, gen, snapshot):
    cell = make(NoisyCell, gen=gen).train()
    snap = snapshot(cell)
    x = torch.randn(2, 6, 3, generator=gen)
    a = hl.record(cell, x, state_size=3, input_size=3)
    b = hl.record(cell, x, state_size=3, input_size=3)
    np.testing.assert_array_equal(a.states, b.states)  # deterministic: dropout off
    system = hl.wrap(cell, state_size=3, input_size=3)
    s = torch.zeros(2, 3)
    with torch.no_grad():
        eval_step = torch.tanh(cell.lin(s) + x[:, 0])
    torch.testing.assert_close(system.step(s, x[:, 0]), eval_step)
    snap.assert_unchanged()
    assert cell.training


# ---------------------------------------------------------------------------- properties
# ``make`` is a stateless builder, so sharing it across examples is safe
@settings(max_examples=30, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(kind=st.sampled_from(list(KINDS)), num_layers=st.integers(1, 3),
       hidden=st.integers(1, 6), inputs=st.integers(1, 4), batch=st.integers(1, 3),
       steps=st.integers(1, 7), batch_first=st.booleans(), bias=st.booleans(),
       seed=st.integers(0, 2**16))
def test_property_matches_torch(make, kind, num_layers, hidden, inputs, batch, steps,
                                batch_first, bias, seed):
    # reference: torch forward; property over layer counts, sizes and batch layouts
    g = torch.Generator().manual_seed(seed)
    cls, extra = KINDS[kind]
    m = make(cls, inputs, hidden, num_layers, bias=bias, batch_first=batch_first, gen=g,
              scale=0.8, **extra)
    x = torch.randn(batch, steps, inputs, generator=g)
    h0 = torch.randn(num_layers, batch, hidden, generator=g)
    native = (h0, torch.randn(num_layers, batch, hidden, generator=g)) if kind == "lstm" else h0
    trace = hl.record(m, x, native)
    assert trace.states.shape == (batch, steps, hidden * num_layers * (2 if kind == "lstm" else 1))
    assert_matches_module(trace, m, x, native)
