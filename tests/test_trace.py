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
from hiddenlens._core.trace import Trace, load_trace


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


def test_load_never_unpickles(trace, tmp_path, monkeypatch):
    import pickle

    def refuse(*args, **kwargs):
        raise AssertionError("load_trace unpickled something")

    monkeypatch.setattr(pickle, "load", refuse)
    monkeypatch.setattr(pickle, "loads", refuse)
    trace.save(tmp_path / "t.npz")
    load_trace(tmp_path / "t.npz")
    write_npz(tmp_path / "obj.npz", **dict(good_arrays(trace),
                                           states=np.array([[[{"a": 1}]]], dtype=object)))
    with pytest.raises(ValueError, match="states holds Python objects"):
        load_trace(tmp_path / "obj.npz")


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
    cases["pickled.npz"] = r"is not a hiddenlens trace file.*holds Python objects"
    write_npz(tmp_path / "notjson.npz", **dict(good_arrays(trace), metadata=np.array("{oops")))
    cases["notjson.npz"] = r"is not a hiddenlens trace file.*Expecting"
    write_npz(tmp_path / "foreign.npz", **good_arrays(trace, format="something-else"))
    cases["foreign.npz"] = r"\(written by Trace\.save\): its metadata does not name the format"
    write_npz(tmp_path / "newer.npz", **good_arrays(trace, format_version=99))
    cases["newer.npz"] = r"written by a newer hiddenlens \(format 99.*upgrade hiddenlens"
    write_npz(tmp_path / "noversion.npz", **good_arrays(trace, format_version=None))
    cases["noversion.npz"] = "format_version is missing"
    write_npz(tmp_path / "parts.npz", **good_arrays(trace, parts={"x": [0, 99]}))
    cases["parts.npz"] = r"part 'x' = \[0, 99\] lies outside the state of size 16"
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


# ---------------------------------------------------------------------------- hostile files
def _saved(trace, tmp_path, name="t.npz"):
    trace.save(tmp_path / name)
    return (tmp_path / name).read_bytes()


def test_load_trace_truncated_file_names_the_defect(trace, tmp_path):
    data = _saved(trace, tmp_path)
    for cut in (len(data) // 2, len(data) - 10, 40):
        (tmp_path / "cut.npz").write_bytes(data[:cut])
        with pytest.raises(ValueError, match=r"cut\.npz' is not a hiddenlens trace file.*"
                                             r"(damaged|truncated)"):
            load_trace(tmp_path / "cut.npz")


def test_load_trace_flipped_byte_is_a_bad_crc_value_error(trace, tmp_path):
    data = bytearray(_saved(trace, tmp_path))
    # a byte inside the states data (past the first local header and the .npy header)
    data[300] ^= 0xFF
    (tmp_path / "flip.npz").write_bytes(bytes(data))
    with pytest.raises(ValueError, match=r"flip\.npz'.*damaged.*(CRC|Bad)"):
        load_trace(tmp_path / "flip.npz")


@pytest.mark.parametrize("parts, message", [
    ('{"x": [0, 1e400]}', "is not a pair of integers"),  # JSON reads 1e400 as inf
    ('{"x": [0.0, 2.9]}', "is not a pair of integers"),  # no silent truncation to [0, 2]
    ('{"x": [true, 2]}', "is not a pair of integers"),
    ('{"x": [0, 1, 2]}', "is not a pair of integers"),
])
def test_load_trace_refuses_non_integer_parts(trace, tmp_path, parts, message):
    meta = json.dumps(dict(format="hiddenlens-trace", format_version=1)).replace(
        "{", '{"parts": ' + parts + ", ", 1)
    write_npz(tmp_path / "p.npz", **dict(good_arrays(trace), metadata=np.array(meta)))
    with pytest.raises(ValueError, match=message):
        load_trace(tmp_path / "p.npz")


def test_load_trace_deeply_nested_json_is_a_value_error(trace, tmp_path):
    deep = "[" * 100_000 + "]" * 100_000
    meta = '{"format": "hiddenlens-trace", "format_version": 1, "x": ' + deep + "}"
    write_npz(tmp_path / "deep.npz", **dict(good_arrays(trace), metadata=np.array(meta)))
    with pytest.raises(ValueError, match="nested too deeply"):
        load_trace(tmp_path / "deep.npz")


def _magic_header(header):
    import io

    buf = io.BytesIO()
    np.lib.format.write_array_header_2_0(buf, header)  # writes magic + header
    return buf.getvalue()


def test_load_trace_checks_declared_size_before_allocating(trace, tmp_path):
    # a tiny file whose header declares 2**45 float64 = 256 TiB of states
    path = tmp_path / "huge.npz"
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("states.npy", _magic_header({"descr": "<f8", "fortran_order": False,
                                                 "shape": (1, 2**20, 2**25)}))
        for k, a in good_arrays(trace).items():
            if k != "states":
                with zf.open(f"{k}.npy", "w") as f:
                    np.lib.format.write_array(f, a)
    assert path.stat().st_size < 4096
    with pytest.raises(ValueError, match=r"states declares shape \(1, 1048576, 33554432\).*"
                                         r"but its entry holds 0 bytes"):
        load_trace(path)


def test_load_trace_refuses_a_zip_bomb_above_max_bytes(tmp_path):
    # 64 MiB of zeros deflate to ~64 KiB: the limit applies to the declared (inflated) size
    B, T, S = 1, 2**13, 2**10
    big = Trace(np.zeros((B, T, S)), np.zeros((B, S)), np.zeros((B, T, 0)), {}, {})
    path = tmp_path / "bomb.npz"
    with open(path, "wb") as fh:
        np.savez_compressed(fh, states=big.states, initial=big.initial, inputs=big.inputs,
                            metadata=np.array('{"format": "hiddenlens-trace", '
                                              '"format_version": 1, "parts": {}}'))
    assert path.stat().st_size < 2**20
    with pytest.raises(ValueError, match=r"declare 67\d+ bytes, more than max_bytes=1048576; "
                                         r"pass load_trace\(path, max_bytes=\.\.\.\)"):
        load_trace(path, max_bytes=2**20)
    assert load_trace(path).states.shape == (B, T, S)  # within the default limit
    with pytest.raises(ValueError, match="max_bytes must be a positive integer"):
        load_trace(path, max_bytes=0)


def test_load_trace_refuses_a_fifo_without_hanging(tmp_path):
    import os

    if not hasattr(os, "mkfifo"):
        pytest.skip("no FIFOs on this platform")
    os.mkfifo(tmp_path / "pipe.npz")
    with pytest.raises(ValueError, match=r"pipe\.npz'.*not a regular file"):
        load_trace(tmp_path / "pipe.npz")
    with pytest.raises(ValueError, match="not a regular file"):
        load_trace(tmp_path)


def test_load_trace_refuses_empty_traces(tmp_path):
    for shape in [(0, 5, 3), (2, 0, 3)]:
        meta = '{"format": "hiddenlens-trace", "format_version": 1, "parts": {}}'
        write_npz(tmp_path / "e.npz", states=np.zeros(shape), initial=np.zeros(shape[::2]),
                  inputs=np.zeros(shape[:2] + (1,)), metadata=np.array(meta))
        with pytest.raises(ValueError, match=r"e\.npz'.*states have shape .*non-empty"):
            load_trace(tmp_path / "e.npz")


def test_load_trace_peak_memory_near_the_array_size(tmp_path):
    import tracemalloc

    S = 2**9
    big = Trace(np.ones((4, 2**10, S)), np.zeros((4, S)), np.zeros((4, 2**10, 0)), {}, {})
    big.save(tmp_path / "big.npz")
    size = big.states.nbytes
    tracemalloc.start()
    try:
        back = load_trace(tmp_path / "big.npz")
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert back.states.nbytes == size
    assert peak < 1.3 * size  # numpy's own reader of a zip entry holds about twice the array


def test_trace_refuses_bad_arrays_and_parts():
    z = np.zeros
    with pytest.raises(TypeError, match="trace states must be a floating-point array.*int64"):
        Trace(z((2, 3, 4), np.int64), z((2, 4)), z((2, 3, 1)), {}, {})
    with pytest.raises(ValueError, match=r"empty trace: states have shape \(0, 3, 4\)"):
        Trace(z((0, 3, 4)), z((0, 4)), z((0, 3, 1)), {}, {})
    for bad in (slice(0, 9), slice(-1, 2), slice(2, 2), slice(0, 4, 2), slice(0.0, 2)):
        with pytest.raises(ValueError, match="trace part 'x'"):
            Trace(z((2, 3, 4)), z((2, 4)), z((2, 3, 1)), {"x": bad}, {})
    with pytest.raises(TypeError, match="parts must be a mapping"):
        Trace(z((2, 3, 4)), z((2, 4)), z((2, 3, 1)), [("x", slice(0, 1))], {})


def test_trace_save_never_follows_a_planted_symlink(trace, tmp_path):
    import os

    victim = tmp_path / "victim.txt"
    victim.write_text("keep me")
    # the temporary names an older version used, planted as links to the victim
    for name in (f"t.npz.partial-{os.getpid()}", ".t.npz.partial"):
        os.symlink(victim, tmp_path / name)
    trace.save(tmp_path / "t.npz")
    assert victim.read_text() == "keep me"
    assert load_trace(tmp_path / "t.npz").states.shape == trace.states.shape
    # a link at the destination itself is replaced, its target left alone
    os.symlink(victim, tmp_path / "link.npz")
    trace.save(tmp_path / "link.npz")
    assert victim.read_text() == "keep me" and not (tmp_path / "link.npz").is_symlink()
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.endswith(".partial")
                 and not p.is_symlink()]
    assert leftovers == []
