"""Traces: views, windows, tables, plots and the file format."""

from __future__ import annotations

import dataclasses
import json
import zipfile

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens import _trace
from hiddenlens._trace import Trace, load_trace


@pytest.fixture
def system(make, gen):
    return hl.wrap(make(nn.LSTM, 3, 4, 2, batch_first=True, gen=gen))


@pytest.fixture
def trace(system, gen):
    h0 = torch.randn(3, system.state_size, generator=gen)
    return hl.record(system, torch.randn(3, 20, 3, generator=gen), h0)


# ---------------------------------------------------------------------------- views
def test_sizes_parts_and_columns(trace):
    assert (trace.batch_size, trace.n_steps, trace.state_size, trace.input_size) == (3, 20, 16, 3)
    assert trace.part("layer1.c").shape == (3, 20, 4)
    np.testing.assert_array_equal(trace.part("layer0.c"), trace.states[:, :, 4:8])
    np.testing.assert_array_equal(trace.columns(["layer0.h", "layer1.h"]),
                                  [0, 1, 2, 3, 8, 9, 10, 11])
    np.testing.assert_array_equal(trace.columns(), np.arange(16))
    with pytest.raises(KeyError, match=r"no part named 'layer2\.h'; this trace has parts "
                                       r"'layer0\.h', 'layer0\.c'"):
        trace.part("layer2.h")
    with pytest.raises(ValueError, match="parts is empty"):
        trace.columns([])
    prev = trace.previous_states()
    np.testing.assert_array_equal(prev[:, 0], trace.initial)
    np.testing.assert_array_equal(prev[:, 1:], trace.states[:, :-1])


def test_trace_is_frozen(trace):
    with pytest.raises(dataclasses.FrozenInstanceError):
        trace.states = None
    with pytest.raises(TypeError):
        trace.parts["x"] = slice(0, 1)


def test_inconsistent_arrays_refused():
    with pytest.raises(ValueError, match=r"inconsistent trace arrays: states \(2, 3, 4\).*"
                                         r"initial \(2, 5\) \(expected \(B, S\)\)"):
        Trace(np.zeros((2, 3, 4)), np.zeros((2, 5)), np.zeros((2, 3, 1)), {}, {})


# ---------------------------------------------------------------------------- windows
@pytest.mark.parametrize("samples, steps", [
    (None, slice(5, 12)), ([2, 0], slice(None)), (1, slice(0, 7)), ([True, False, True],
                                                                   slice(-4, None)),
    (np.array([0, 1]), slice(19, 20)),
])
def test_select_windows_are_exact(system, trace, samples, steps):
    sub = trace.select(samples, steps)
    b = np.arange(3)[samples if samples is not None else slice(None)]
    b = np.atleast_1d(b)
    t0, t1, _ = steps.indices(20)
    np.testing.assert_array_equal(sub.states, trace.states[b, t0:t1])
    np.testing.assert_array_equal(sub.inputs, trace.inputs[b, t0:t1])
    assert sub.metadata["window"] == [t0, t1]
    assert (sub.metadata["batch_size"], sub.metadata["n_steps"]) == (len(b), t1 - t0)
    # exact: running the system from the window's initial state reproduces the window
    rerun = system.run(torch.from_numpy(sub.inputs.copy()), torch.from_numpy(sub.initial.copy()))
    np.testing.assert_allclose(rerun.numpy(), sub.states, rtol=0, atol=1e-6)


def test_select_of_a_select_keeps_absolute_window(trace):
    sub = trace.select(steps=slice(5, 15)).select(steps=slice(2, 4))
    assert sub.metadata["window"] == [7, 9]
    np.testing.assert_array_equal(sub.states, trace.states[:, 7:9])
    np.testing.assert_array_equal(sub.initial, trace.states[:, 6])


def test_select_errors(trace):
    with pytest.raises(ValueError, match=r"steps must be a non-empty contiguous slice of "
                                         r"range\(20\), got slice\(5, 5, None\)"):
        trace.select(steps=slice(5, 5))
    with pytest.raises(ValueError, match="contiguous"):
        trace.select(steps=slice(0, 10, 2))
    with pytest.raises(TypeError, match="steps must be a slice"):
        trace.select(steps=3)
    with pytest.raises(ValueError, match="samples selects no sequence"):
        trace.select([])
    with pytest.raises(IndexError, match=r"samples \[0, 3\] out of range for a trace of 3"):
        trace.select([0, 3])
    with pytest.raises(ValueError, match=r"boolean samples mask must have shape \(3,\)"):
        trace.select([True, False])
    with pytest.raises(TypeError, match="samples must be an int"):
        trace.select([0.5])


# ---------------------------------------------------------------------------- tables and plots
def test_to_frame(trace):
    frame = trace.to_frame()
    assert frame.shape == (3 * 20, 16)
    assert list(frame.index.names) == ["sample", "step"]
    assert frame.columns[0] == "layer0.h[0]" and frame.columns[4] == "layer0.c[0]"
    np.testing.assert_array_equal(frame.loc[(2, 7)].to_numpy(), trace.states[2, 7])
    assert trace.to_frame("layer1.h").shape == (60, 4)


def test_plot_draws_on_the_given_axes(trace):
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots()
    try:
        assert trace.plot(ax=ax, part="layer1.h", sample=2) is ax
        assert len(ax.lines) == 4
        np.testing.assert_array_equal(ax.lines[0].get_ydata(), trace.states[2, :, 8])
        new = trace.plot(max_units=3)
        assert new is not ax and len(new.lines) == 3
        plt.close(new.figure)
    finally:
        plt.close(fig)


# ---------------------------------------------------------------------------- files
def test_save_load_round_trip_is_exact(trace, tmp_path):
    path = tmp_path / "run.trace"  # the name is used as given
    trace.save(path)
    assert path.exists() and not (tmp_path / "run.trace.npz").exists()
    assert [p.name for p in tmp_path.iterdir()] == ["run.trace"]  # no temporary left behind
    back = load_trace(path)
    for name in ("states", "initial", "inputs"):
        a, b = getattr(trace, name), getattr(back, name)
        assert a.dtype == b.dtype and a.shape == b.shape
        assert a.tobytes() == b.tobytes()  # bitwise
        assert not b.flags.writeable
    assert dict(back.metadata) == dict(trace.metadata)
    assert dict(back.parts) == dict(trace.parts)
    # a window keeps its metadata through the file too
    sub = trace.select([1], slice(3, 9))
    sub.save(tmp_path / "sub.npz")
    assert dict(load_trace(str(tmp_path / "sub.npz")).metadata) == dict(sub.metadata)


def test_float64_and_callable_traces_round_trip(tmp_path):
    def rotate(s, x):
        return torch.stack([0.9 * s[:, 1] + x[:, 0], -0.9 * s[:, 0]], dim=-1)

    trace = hl.record(rotate, np.ones((2, 4, 1)), np.ones(2), state_size=2, input_size=1,
                      dtype="float64", parts={"a": slice(0, 1), "b": slice(1, 2)})
    trace.save(tmp_path / "t.npz")
    back = load_trace(tmp_path / "t.npz")
    assert back.states.dtype == np.float64 and back.states.tobytes() == trace.states.tobytes()
    assert dict(back.parts) == {"a": slice(0, 1), "b": slice(1, 2)}
    assert back.metadata["hidden_size"] is None


def test_load_uses_allow_pickle_false(trace, tmp_path, monkeypatch):
    trace.save(tmp_path / "t.npz")
    calls = []
    real = np.load

    def spy(*args, **kwargs):
        calls.append(kwargs)
        return real(*args, **kwargs)

    monkeypatch.setattr(_trace.np, "load", spy)
    load_trace(tmp_path / "t.npz")
    assert calls and all(c.get("allow_pickle") is False for c in calls)


def test_metadata_must_be_json(trace, tmp_path):
    odd = Trace(trace.states, trace.initial, trace.inputs, trace.parts,
                dict(trace.metadata, seed=np.int64(3), scale=np.float32(0.5)))
    odd.save(tmp_path / "ok.npz")  # numpy scalars become numbers
    assert load_trace(tmp_path / "ok.npz").metadata["seed"] == 3
    bad = Trace(trace.states, trace.initial, trace.inputs, trace.parts, {"model": object()})
    with pytest.raises(TypeError, match="metadata must be JSON-serialisable"):
        bad.save(tmp_path / "bad.npz")
    assert not (tmp_path / "bad.npz").exists()


def write_npz(path, **arrays):
    with open(path, "wb") as fh:
        np.savez(fh, **arrays)


def good_arrays(trace, **meta_changes):
    meta = dict(trace.metadata, parts={"layer0.h": [0, 4]}, format="hiddenlens-trace",
                format_version=1)
    meta.update(meta_changes)
    meta = {k: v for k, v in meta.items() if v is not None}
    return dict(states=trace.states, initial=trace.initial, inputs=trace.inputs,
                metadata=np.array(json.dumps(meta)))


def test_bad_and_foreign_files(trace, tmp_path):
    cases = {}
    (tmp_path / "text.npz").write_text("just some words\n")
    cases["text.npz"] = r"is not a hiddenlens trace file.*it is not an \.npz archive"
    (tmp_path / "empty.npz").write_bytes(b"")
    cases["empty.npz"] = r"is not a hiddenlens trace file.*it is not an \.npz archive"
    np.save(tmp_path / "single.npy", np.zeros(3))
    cases["single.npy"] = r"holds a single array, not an \.npz archive"
    write_npz(tmp_path / "other.npz", weights=np.zeros(3))
    cases["other.npz"] = r"lacks initial, inputs, metadata, states"
    write_npz(tmp_path / "pickled.npz", **dict(good_arrays(trace),
                                               metadata=np.array([{"a": 1}], dtype=object)))
    cases["pickled.npz"] = r"is not a hiddenlens trace file.*allow_pickle=False"
    write_npz(tmp_path / "notjson.npz", **dict(good_arrays(trace), metadata=np.array("{oops")))
    cases["notjson.npz"] = r"is not a hiddenlens trace file.*Expecting"
    write_npz(tmp_path / "foreign.npz", **good_arrays(trace, format="something-else"))
    cases["foreign.npz"] = r"is not a hiddenlens trace file \(written by Trace\.save\)$"
    write_npz(tmp_path / "newer.npz", **good_arrays(trace, format_version=99))
    cases["newer.npz"] = r"written by a newer hiddenlens \(format 99.*upgrade hiddenlens"
    write_npz(tmp_path / "noversion.npz", **good_arrays(trace, format_version=None))
    cases["noversion.npz"] = "format_version is missing"
    write_npz(tmp_path / "parts.npz", **good_arrays(trace, parts={"x": [0, 99]}))
    cases["parts.npz"] = r"part 'x' = slice\(0, 99, None\) lies outside the state of size 16"
    write_npz(tmp_path / "badparts.npz", **good_arrays(trace, parts=[1, 2]))
    cases["badparts.npz"] = "malformed parts"
    write_npz(tmp_path / "ints.npz",
              **dict(good_arrays(trace), states=np.zeros((3, 20, 16), np.int64)))
    cases["ints.npz"] = "states has dtype int64, expected float"
    with zipfile.ZipFile(tmp_path / "broken.npz", "w") as zf:
        zf.writestr("states.npy", b"\x93NUMPY garbage")
        for k in ("initial", "inputs", "metadata"):
            zf.writestr(f"{k}.npy", b"")
    cases["broken.npz"] = "is not a hiddenlens trace file"
    for name, message in cases.items():
        with pytest.raises(ValueError, match=message):
            load_trace(tmp_path / name)
    with pytest.raises(FileNotFoundError, match="no trace file at"):
        load_trace(tmp_path / "missing.npz")
