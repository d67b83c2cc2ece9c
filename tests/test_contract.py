"""One contract for every analysis: frozen results, untouched inputs and model, repeatable under a
seed, float32 and float64, ``.plot(ax=ax)`` draws on ``ax``, ``.to_frame()`` is a table, and bad
options fail with a ValueError that names the option."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
import torch

import hiddenlens as hl
from hiddenlens._core.options import CONSTRAINTS, bad_values, describe_constraints
from hiddenlens._core.results import METADATA_KEYS
from tests.conftest import build


def _case(name, call, bad):
    return pytest.param(call, bad, id=name)


CASES = [
    _case("spectra", lambda s, tr, x: hl.jacobian_spectra(s, tr, k=3),
          lambda s, tr, x: hl.jacobian_spectra(s, tr, k=0)),
    _case("gradient_flow", lambda s, tr, x: hl.gradient_flow(s, tr),
          lambda s, tr, x: hl.gradient_flow(s, tr, max_lag=-1)),
    _case("lyapunov", lambda s, tr, x: hl.lyapunov_spectrum(s, tr, k=3, warmup=5),
          lambda s, tr, x: hl.lyapunov_spectrum(s, tr, k=0)),
    _case("pca", lambda s, tr, x: hl.pca_trajectories(s, tr, k=2),
          lambda s, tr, x: hl.pca_trajectories(s, tr, k=0)),
    _case("fixed_points", lambda s, tr, x: hl.find_fixed_points(s, tr, n_starts=8),
          lambda s, tr, x: hl.find_fixed_points(s, tr, n_starts=0)),
    _case("memory", lambda s, tr, x: hl.memory_curve(s, max_lag=4, n_sequences=4, n_steps=120),
          lambda s, tr, x: hl.memory_curve(s, max_lag=-1)),
]


@pytest.fixture(scope="module")
def setup():
    gen = torch.Generator().manual_seed(3)
    model = build(torch.nn.GRU, 4, 6, num_layers=2, batch_first=True, gen=gen, scale=0.8)
    x = torch.rand(3, 40, 4, generator=gen) * 2 - 1
    return model, x


def _arrays(result):
    for f in dataclasses.fields(result):
        v = getattr(result, f.name)
        if isinstance(v, np.ndarray):
            yield f.name, v


def _run(call, model, x, dtype):
    system = hl.wrap(model, dtype=dtype)
    trace = hl.record(system, x)
    return call(system, trace, x), trace


@pytest.mark.parametrize("call, bad", CASES)
def test_contract(call, bad, setup, snapshot):
    model, x = setup
    snap = snapshot(model)
    x_before = x.clone()
    result, trace = _run(call, model, x, torch.float32)
    states_before = trace.states.copy()

    # frozen, with read-only arrays (common practice for result objects: nothing to corrupt)
    assert dataclasses.is_dataclass(result)
    first = dataclasses.fields(result)[0].name
    with pytest.raises(dataclasses.FrozenInstanceError):
        setattr(result, first, None)
    arrays = dict(_arrays(result))
    assert arrays, "a result should expose its numbers as arrays"
    for name, a in arrays.items():
        assert not a.flags.writeable, f"{name} is writeable"

    # repeatable under the default seed, bit for bit
    again, _ = _run(call, model, x, torch.float32)
    for name, a in arrays.items():
        np.testing.assert_array_equal(getattr(again, name), a, err_msg=name)

    # float64 agrees with float32 on the result's main numbers (loose: chaotic or optimised
    # quantities legitimately differ in the last digits)
    r64, _ = _run(call, model, x, torch.float64)
    assert set(dict(_arrays(r64))) == set(arrays)

    # a table and a plot on the given axes
    frame = result.to_frame()
    assert len(frame) > 0
    from matplotlib.figure import Figure

    fig = Figure()
    ax = fig.add_subplot()
    drawn = result.plot(ax=ax)
    assert drawn is ax or getattr(drawn, "figure", None) is fig
    assert ax.has_data() or ax.images or ax.collections

    # bad options fail clearly, before any work is done
    with pytest.raises(ValueError):
        bad(hl.wrap(model), trace, x)

    # read-only also after dataclasses.replace; the common metadata keys; JSON-ready dict
    copy = dataclasses.replace(result)
    for name, a in _arrays(copy):
        assert not a.flags.writeable, f"{name} is writeable after dataclasses.replace"
    assert set(METADATA_KEYS) <= set(result.metadata), set(METADATA_KEYS) - set(result.metadata)
    assert result.metadata["S"] == trace.state_size
    json.dumps(result.to_dict())

    # inputs, trace and model as they were
    assert torch.equal(x, x_before)
    np.testing.assert_array_equal(trace.states, states_before)
    snap.assert_unchanged()


# every analysis, called by its public name with (system, trace) and one option
ANALYSIS_CALLS = {
    "jacobian_spectra": lambda s, tr, **kw: hl.jacobian_spectra(s, tr, **kw),
    "gradient_flow": lambda s, tr, **kw: hl.gradient_flow(s, tr, **kw),
    "lyapunov_spectrum": lambda s, tr, **kw: hl.lyapunov_spectrum(s, tr, **kw),
    "pca_trajectories": lambda s, tr, **kw: hl.pca_trajectories(s, tr, **kw),
    "find_fixed_points": lambda s, tr, **kw: hl.find_fixed_points(s, tr, **kw),
    "memory_curve": lambda s, tr, **kw: hl.memory_curve(s, **kw),  # probe mode
}

BAD_OPTIONS = [
    pytest.param(analysis, option, value, id=f"{analysis}-{option}-{value!r}")
    for analysis, table in CONSTRAINTS.items()
    for option, constraints in table.items()
    for value in bad_values(constraints)
]


def test_every_analysis_declares_its_options():
    assert set(ANALYSIS_CALLS) == set(CONSTRAINTS)
    for table in CONSTRAINTS.values():
        assert {"seed", "threads"} <= set(table)  # the shared vocabulary reaches every analysis


@pytest.mark.parametrize("analysis, option, value", BAD_OPTIONS)
def test_bad_values_generated_from_the_constraints_fail_in_one_form(analysis, option, value,
                                                                    setup):
    # one message form for every option of every analysis (after scikit-learn's
    # validate_params: "The 'n' parameter of F must be ...; got 0 instead.")
    model, x = setup
    system = hl.wrap(model)
    trace = hl.record(system, x)
    constraints = CONSTRAINTS[analysis][option]
    expected = (f"The {option!r} option of {analysis} must be "
                f"{describe_constraints(constraints)}; got {value!r}.")
    with pytest.raises(ValueError) as caught:
        ANALYSIS_CALLS[analysis](system, trace, **{option: value})
    assert str(caught.value) == expected
    assert isinstance(caught.value, TypeError)  # both kinds, so callers may catch either


@pytest.mark.parametrize("analysis", ["jacobian_spectra", "lyapunov_spectrum",
                                      "pca_trajectories"])
def test_a_numpy_generator_is_a_seed(analysis, setup):
    model, x = setup
    system = hl.wrap(model)
    trace = hl.record(system, x)
    call = ANALYSIS_CALLS[analysis]
    kw = {"k": 2}
    a = call(system, trace, seed=np.random.default_rng(7), **kw)
    b = call(system, trace, seed=np.random.default_rng(7), **kw)
    for name, arr in _arrays(a):
        np.testing.assert_array_equal(getattr(b, name), arr, err_msg=name)
    assert a.metadata["options"]["seed"] == "numpy.random.Generator"
