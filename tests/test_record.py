"""Recording: input and initial-state layouts, metadata, bad input, non-finite states, and the
user's model left exactly as it was."""

from __future__ import annotations

import datetime as dt
import warnings

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._core.record import as_system, initial_states


def lstm(make, gen, L=2):
    return make(nn.LSTM, 3, 4, L, batch_first=True, gen=gen)


def gru(make, gen, L=2):
    return make(nn.GRU, 3, 4, L, batch_first=True, gen=gen)


# ---------------------------------------------------------------------------- inputs
def test_numpy_tensor_and_single_sequence_inputs_agree(make, gen):
    m = gru(make, gen)
    x = torch.randn(1, 6, 3, generator=gen)
    a = hl.record(m, x)
    b = hl.record(m, x.numpy())
    c = hl.record(m, x[0])  # one sequence (T, I)
    d = hl.record(m, x[0].double().numpy())  # float64 data converted to the system's float32
    for t in (b, c, d):
        np.testing.assert_array_equal(t.states, a.states)
        assert t.states.shape == (1, 6, 8) and t.inputs.dtype == np.float32


def test_inputs_are_batch_first_whatever_the_module_layout(make, gen):
    # reference: torch forward in the module's own time-major layout
    m = make(nn.GRU, 3, 4, gen=gen)  # batch_first=False
    x = torch.randn(5, 7, 3, generator=gen)  # (B, T, I)
    with torch.no_grad():
        out, _ = m(x.transpose(0, 1))  # (T, B, H)
    np.testing.assert_allclose(hl.record(m, x).states, out.transpose(0, 1).numpy(), atol=1e-6)


def test_trace_holds_copies_and_is_read_only(make, gen):
    m = gru(make, gen)
    x = torch.randn(2, 5, 3, generator=gen)
    trace = hl.record(m, x)
    x.zero_()
    assert np.abs(trace.inputs).sum() > 0
    for a in (trace.states, trace.initial, trace.inputs):
        assert not a.flags.writeable
        with pytest.raises(ValueError, match="read-only"):
            a[0] = 0


# ---------------------------------------------------------------------------- initial states
def test_h0_layouts_agree_with_torch(make, gen):
    # reference: torch forward with the native (h0, c0) tuple of shape (L, B, H) each
    m = lstm(make, gen)
    x = torch.randn(2, 6, 3, generator=gen)
    h0 = torch.randn(2, 2, 4, generator=gen)
    c0 = torch.randn(2, 2, 4, generator=gen)
    with torch.no_grad():
        out, _ = m(x, (h0, c0))
    native = hl.record(m, x, (h0, c0))
    np.testing.assert_allclose(native.part("layer1.h"), out.numpy(), atol=1e-6)
    # the same states in the flat layout layer0.h, layer0.c, layer1.h, layer1.c: (B, S)
    flat = torch.cat([h0[0], c0[0], h0[1], c0[1]], dim=-1)  # (B, S)
    np.testing.assert_array_equal(hl.record(m, x, flat).states, native.states)
    np.testing.assert_array_equal(hl.record(m, x, flat.numpy()).states, native.states)
    np.testing.assert_array_equal(native.initial, flat.numpy())
    # one flat state (S,) is shared by every sequence
    shared = hl.record(m, x, flat[0])
    np.testing.assert_array_equal(shared.initial, np.repeat(flat[:1].numpy(), 2, axis=0))


def test_h0_native_layout_for_gru_and_cells(make, gen):
    # reference: torch forward / torch cell with its own initial state
    m = gru(make, gen)
    x = torch.randn(3, 5, 3, generator=gen)
    h0 = torch.randn(2, 3, 4, generator=gen)
    with torch.no_grad():
        out, _ = m(x, h0)
    np.testing.assert_allclose(hl.record(m, x, h0).part("layer1.h"), out.numpy(), atol=1e-6)
    cell = make(nn.LSTMCell, 3, 4, gen=gen)
    h, c = torch.randn(3, 4, generator=gen), torch.randn(3, 4, generator=gen)
    trace = hl.record(cell, x, (h, c))
    with torch.no_grad():
        h1, c1 = cell(x[:, 0], (h, c))
    np.testing.assert_allclose(trace.states[:, 0], torch.cat([h1, c1], -1).numpy(), atol=1e-6)


def test_h0_errors(make, gen):
    m = lstm(make, gen)
    x = torch.randn(2, 4, 3, generator=gen)
    with pytest.raises(ValueError, match=r"h0 must have shape \(2, 16\) or \(16,\), or "
                                         r"PyTorch's own layout \(2, 2, 4\) as a tuple"):
        hl.record(m, x, torch.zeros(2, 15))
    with pytest.raises(ValueError, match=r"c0 must have shape \(2, 2, 4\) in PyTorch's layout, "
                                         r"got \(2, 3, 4\)"):
        hl.record(m, x, (torch.zeros(2, 2, 4), torch.zeros(2, 3, 4)))
    with pytest.raises(TypeError, match=r"tuple h0 is accepted only as \(h0, c0\) for an LSTM"):
        hl.record(gru(make, gen), x, (torch.zeros(2, 2, 4), torch.zeros(2, 2, 4)))
    with pytest.raises(ValueError, match=r"h0 contains NaN or Inf \(first at index \(1, 3\)\)"):
        h0 = torch.zeros(2, 16)
        h0[1, 3] = float("nan")
        hl.record(m, x, h0)
    with pytest.raises(TypeError, match="h0 must hold floating-point numbers"):
        hl.record(m, x, torch.zeros(2, 16, dtype=torch.int64))
    system = hl.wrap(m)
    assert initial_states(system, None, 3).shape == (3, 16)


# ---------------------------------------------------------------------------- metadata
def test_metadata(make, gen):
    m = lstm(make, gen)
    trace = hl.record(m, torch.randn(2, 5, 3, generator=gen))
    meta = trace.metadata
    assert meta["model_class"] == "LSTM" and meta["kind"] == "lstm"
    assert (meta["num_layers"], meta["hidden_size"], meta["state_size"]) == (2, 4, 16)
    assert (meta["input_size"], meta["batch_size"], meta["n_steps"]) == (3, 2, 5)
    assert meta["fingerprint"] == hl.wrap(m).fingerprint and len(meta["fingerprint"]) == 16
    assert meta["dtype"] == "float32" and meta["hiddenlens_version"] == hl.__version__
    assert meta["output_part"] == "layer1.h" and meta["time_reversed"] is False
    created = dt.datetime.fromisoformat(meta["created"])
    assert abs((dt.datetime.now(dt.timezone.utc) - created).total_seconds()) < 600
    with pytest.raises(TypeError):
        meta["kind"] = "gru"  # read-only mapping


def test_as_system(make, gen):
    system = hl.wrap(gru(make, gen))
    assert as_system(system) is system
    with pytest.raises(TypeError, match=r"options \['dtype'\] apply when wrapping a model"):
        as_system(system, dtype="float64")
    with pytest.raises(TypeError, match=r"options \['dtype'\] apply when wrapping a model"):
        hl.record(system, np.zeros((1, 2, 3), np.float32), dtype="float64")


# ---------------------------------------------------------------------------- bad input
BAD_INPUTS = [
    (np.zeros((2, 3, 4, 3), np.float32), ValueError,
     r"inputs must have shape \(B, T, 3\) or \(T, 3\) \(batch first\), got array of shape "
     r"\(2, 3, 4, 3\)"),
    (np.zeros(3, np.float32), ValueError, r"inputs must have shape \(B, T, 3\)"),
    (np.zeros((2, 5, 4), np.float32), ValueError,
     r"inputs has 4 features but the GRU system expects 3; pass inputs of shape \(B, T, 3\)"),
    (np.zeros((2, 5, 3), np.int64), TypeError,
     r"inputs must hold floating-point numbers, got a numpy array of dtype int64"),
    (torch.zeros(2, 5, 3, dtype=torch.bool), TypeError,
     r"inputs must hold floating-point numbers, got a tensor of dtype torch\.bool"),
    (torch.zeros(2, 5, 3, dtype=torch.complex64), TypeError, r"floating-point numbers"),
    ([[0.0, 1.0, 2.0]], TypeError, r"inputs must be a torch tensor or a numpy array, got list"),
    (np.zeros((2, 0, 3), np.float32), ValueError,
     r"inputs is empty \(shape \(2, 0, 3\)\); pass at least one sequence of at least one step"),
    (np.zeros((0, 4, 3), np.float32), ValueError, r"inputs is empty"),
    (np.array([[[0, 0, 0], [0, np.nan, 0]]], np.float32), ValueError,
     r"inputs contains NaN or Inf \(first at index \(0, 1, 1\)\)"),
    (np.array([[[0, 0, np.inf]]], np.float32), ValueError, r"inputs contains NaN or Inf"),
    (torch.zeros(2, 5, 3, device="meta"), ValueError, r"inputs is on the 'meta' device"),
]


@pytest.mark.parametrize("inputs, error, message", BAD_INPUTS)
def test_bad_inputs_are_refused_and_the_model_is_left_alone(make, gen, snapshot, inputs, error,
                                                            message):
    m = gru(make, gen)
    snap = snapshot(m)
    with pytest.raises(error, match=message):
        hl.record(m, inputs)
    snap.assert_unchanged()


def test_packed_sequence_refused(make, gen):
    m = gru(make, gen)
    packed = nn.utils.rnn.pack_padded_sequence(torch.zeros(2, 4, 3), torch.tensor([4, 2]),
                                               batch_first=True)
    with pytest.raises(TypeError, match=r"inputs is a PackedSequence.*pad the sequences to "
                                        r"equal length and pass a \(B, T, I\) tensor"):
        hl.record(m, packed)


# ---------------------------------------------------------------------------- the model stays
def busy_model(make, gen):
    """A model with every piece of state hiddenlens promises not to touch."""

    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.norm = nn.BatchNorm1d(3)
            self.rnn = nn.LSTM(3, 4, 2, dropout=0.5, batch_first=True)

    net = make(Net, gen=gen).train()
    net.rnn.weight_ih_l0.requires_grad_(False)
    net.rnn.weight_hh_l1.grad = torch.ones_like(net.rnn.weight_hh_l1)
    net.rnn.register_forward_hook(lambda *a: None)
    net.rnn.register_forward_pre_hook(lambda *a: None, with_kwargs=True)
    net.rnn.bias_hh_l0.register_hook(lambda g: g)
    return net


def test_wrap_and_record_leave_the_model_as_it_was(make, gen, snapshot):
    net = busy_model(make, gen)
    snap = snapshot(net)
    x = torch.randn(2, 6, 3, generator=gen)
    hl.wrap(net)
    trace = hl.record(net, x)
    hl.record(net, x, dtype="float64")
    snap.assert_unchanged()
    # dropout between layers is off: the trace is the eval-mode forward
    with torch.no_grad():
        out, _ = net.eval().rnn(x)
    net.train()
    np.testing.assert_allclose(trace.part("layer1.h"), out.numpy(), atol=1e-6)


def test_model_left_alone_after_failures(make, gen, snapshot):
    net = busy_model(make, gen)
    snap = snapshot(net)
    for bad in (np.zeros((2, 5, 7), np.float32), np.zeros((2, 5, 3), np.int32)):
        with pytest.raises((ValueError, TypeError)):
            hl.record(net, bad)
    with pytest.raises(ValueError):
        hl.record(net, np.zeros((2, 5, 3), np.float32), np.zeros((2, 3)))
    with pytest.raises(ValueError):
        hl.wrap(net, submodule="missing")
    snap.assert_unchanged()


# ---------------------------------------------------------------------------- exploding states
def test_states_that_turn_non_finite_are_kept_with_a_warning(make, gen):
    # a relu RNN with huge recurrent weights overflows float32 within a few steps
    m = make(nn.RNN, 2, 3, nonlinearity="relu", batch_first=True, gen=gen, scale=0.1)
    with torch.no_grad():
        m.weight_hh_l0.fill_(1e12)
        m.bias_ih_l0.fill_(1.0)
    x = np.zeros((3, 12, 2), np.float32)
    x[2] = 1.0
    with pytest.warns(hl.NonFiniteStateWarning,
                      match=r"states of RNN became NaN/Inf at step t=\d+ of sample b=\d+ \(first "
                            r"occurrence; \d+ of 36 \(sample, step\) states are affected\)"
                      ) as caught:
        trace = hl.record(m, x)
    assert len(caught) == 1
    message = str(caught[0].message)
    t = int(message.split("step t=")[1].split()[0])
    b = int(message.split("sample b=")[1].split()[0])
    bad = ~np.isfinite(trace.states).all(axis=2)  # (B, T): kept as computed, not dropped
    assert 1 < t < 12 and bad[b, t] and not bad[:, :t].any() and not bad[:b, t].any()
    assert bad[:, -1].all() and np.isfinite(trace.states[:, 0]).all()


def test_finite_states_do_not_warn(make, gen):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        hl.record(gru(make, gen), np.ones((2, 30, 3), np.float32) * 100)


def test_interrupted_step_function_run_leaves_model_and_rng(make, gen, snapshot):
    class Interrupting(nn.Module):
        def __init__(self):
            super().__init__()
            self.lin = nn.Linear(2, 2)
            self.drop = nn.Dropout(0.3)
            self.calls = 0

        def forward(self, s, x):
            self.calls += 1
            if self.calls == 4:
                raise KeyboardInterrupt
            return torch.tanh(self.drop(self.lin(s)))

    cell = make(Interrupting, gen=gen).train()
    snap = snapshot(cell)
    with pytest.raises(KeyboardInterrupt):
        hl.record(cell, np.zeros((2, 10, 0)), state_size=2, input_size=0)
    snap.assert_unchanged()  # the module ran as a private copy: never called, never flipped
    assert cell.training and cell.drop.training and cell.calls == 0


def test_float64_model_recorded_in_float32_says_so_in_metadata():
    model = torch.nn.GRU(2, 3, batch_first=True).double()
    trace = hl.record(model, np.zeros((1, 4, 2), np.float32))
    assert trace.metadata["model_dtype"] == "float64" and trace.metadata["dtype"] == "float32"
    assert "analysed in float32" in trace.metadata["precision_note"]
    same = hl.record(model, np.zeros((1, 4, 2)), dtype=torch.float64)
    assert "precision_note" not in same.metadata
    flow = hl.gradient_flow(model, trace)  # results carry the trace's metadata
    assert "precision_note" in flow.metadata


def test_step_function_output_shape_is_checked_at_every_step():
    calls = {"n": 0}

    def shrinking(s, x):
        calls["n"] += 1
        # one probe call checks for random draws before the recording's first step
        return s if calls["n"] < 4 else s[:, :1]

    system = hl.wrap(shrinking, state_size=2, input_size=0)
    with pytest.raises(ValueError, match=r"returned shape \(1, 1\) .*\(at step t=2\)"):
        hl.record(system, np.zeros((1, 5, 0), np.float32))


def test_integer_weights_are_refused_not_cast():
    model = torch.nn.RNN(2, 3, batch_first=True)
    model.weight_hh_l0 = torch.nn.Parameter(torch.zeros(3, 3, dtype=torch.int64),
                                            requires_grad=False)
    with pytest.raises(TypeError, match="weight_hh_l0 has dtype int64.*floating-point"):
        hl.wrap(model)
