"""Tests for hiddenlens.examples (folder example_models/): runs, tasks, factories, training."""

from __future__ import annotations

import importlib
import inspect
import json
import math

import numpy as np
import pytest
import torch
from hiddenlens.examples._nets import recurrent_spectral_radii
from hiddenlens.examples.train import RECIPES, fit, largest_lyapunov
from scipy import signal, stats
from sklearn.metrics import accuracy_score, r2_score
from torch import nn

import hiddenlens.examples as example_models
from hiddenlens.examples import (
    RUNS,
    list_runs,
    load_run,
    make_run_inputs,
    probe_inputs_path,
    weights_path,
)
from hiddenlens.examples import greenhouse as gh
from hiddenlens.examples import sorting_line as sl

SORTING_RUNS = example_models.list_runs(task=sl)
RECORD_PATH = weights_path(list_runs()[0]).parent / "training_record.json"


def _factory(name):
    module, _, attr = RUNS[name].factory.partition(":")
    return getattr(importlib.import_module(module), attr)


@pytest.fixture(scope="module")
def models():
    return {name: load_run(name) for name in RUNS}


@pytest.fixture(scope="module")
def sorting_eval():
    # Fresh inputs: training used data seeds 10_000 and up, its report seed 1.
    return sl.make_dataset(64, 200, seed=0)


def test_run_names_and_order():
    assert list_runs() == list(RUNS)
    assert list_runs() == ["rnn-gain0.5", "rnn-gain1.0", "rnn-gain2.0", "gru", "greenhouse-lstm"]
    assert set(RECIPES) == set(RUNS)
    with pytest.raises(TypeError):
        RUNS["extra"] = RUNS["gru"]  # read-only mapping


@pytest.mark.parametrize("name", list(RUNS))
def test_weights_load_with_weights_only(name):
    # torch.load(weights_only=True) is torch's restricted unpickler for untrusted files.
    state = torch.load(weights_path(name), map_location="cpu", weights_only=True)
    model = load_run(name)
    assert isinstance(model, nn.Module)
    assert not model.training
    loaded = model.state_dict()
    assert loaded.keys() == state.keys()
    for key, value in state.items():
        assert torch.equal(loaded[key], value), key
    recurrent = [m for m in model.modules() if isinstance(m, nn.RNNBase)]
    assert len(recurrent) == 1
    assert recurrent[0].batch_first
    assert 32 <= recurrent[0].hidden_size <= 48


def test_shipped_files_are_small():
    total = sum(weights_path(name).stat().st_size for name in RUNS)
    print(f"weights: {total} bytes in total")
    assert total < 300_000
    assert probe_inputs_path().stat().st_size < 200_000


@pytest.mark.parametrize("name", list(RUNS))
def test_forward_on_make_inputs(models, name):
    model = models[name]
    x = torch.from_numpy(make_run_inputs(name, 3, 60, seed=5))  # (B, T, I)
    with torch.no_grad():
        y = model(x)
    n_out = 3 if name in SORTING_RUNS else 1
    assert y.shape == (3, 60, n_out)
    assert y.dtype == torch.float32
    assert torch.isfinite(y).all()
    # Unbatched (T, I) input, as nn.RNN allows, gives the first sequence's outputs.
    with torch.no_grad():
        y0 = model(x[0])
    torch.testing.assert_close(y0, y[0], rtol=1e-5, atol=1e-5)


def test_default_input_shapes():
    x = sl.make_inputs()
    assert x.shape == (16, 200, 5) and x.dtype == np.float32
    g = gh.make_inputs()
    assert g.shape == (16, 300, 3) and g.dtype == np.float32
    assert make_run_inputs("greenhouse-lstm").shape == (16, 300, 3)
    assert make_run_inputs("gru", 2).shape == (2, 200, 5)


@pytest.mark.parametrize("make", [sl.make_inputs, gh.make_inputs])
def test_inputs_are_deterministic_for_a_seed(make):
    a = make(4, 80, seed=7)
    b = make(4, 80, seed=7)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, make(4, 80, seed=8))


def test_sorting_line_trials_follow_the_scenario():
    data = sl.make_dataset(32, 200, seed=3)
    cues = np.argwhere(data.targets != sl.IGNORE)
    assert len(cues) > 32 * 4  # several crates per sequence
    for b, t in cues:
        delay = data.delays[b, t]
        assert 2 <= delay <= 40
        assert data.inputs[b, t, 3] > 0.5  # gate cue
        tag = data.inputs[b, t - delay, :3]
        assert int(np.argmax(tag)) == data.targets[b, t]
        assert tag.max() > 0.5
    # Cue channel is high exactly at the scored steps (sensor noise std 0.05).
    np.testing.assert_array_equal(data.inputs[..., 3] > 0.5, data.targets != sl.IGNORE)
    assert set(np.unique(data.targets)) == {sl.IGNORE, 0, 1, 2}


def test_input_functions_reject_bad_arguments():
    with pytest.raises(ValueError, match="n_sequences=0 is not an integer"):
        sl.make_inputs(0)
    with pytest.raises(ValueError, match="max_delay=3 is below min_delay=5"):
        sl.make_dataset(2, 50, min_delay=5, max_delay=3)
    with pytest.raises(ValueError, match="n_steps=2.5 is not a positive integer"):
        gh.make_inputs(2, 2.5)
    with pytest.raises(TypeError, match="seed='a' is not a non-negative integer"):
        sl.make_inputs(2, 10, seed="a")
    with pytest.raises(TypeError, match="seed=-1 is not a non-negative integer"):
        gh.make_inputs(2, 10, seed=-1)


@pytest.mark.parametrize("name", list(RUNS))
def test_factories_take_no_arguments(name):
    factory = _factory(name)
    params = inspect.signature(factory).parameters.values()
    assert all(p.default is not inspect.Parameter.empty for p in params)
    model = factory()
    assert isinstance(model, nn.Module)
    assert model.state_dict().keys() == load_run(name).state_dict().keys()


def test_factories_are_seeded():
    a, b = sl.make_gru(), sl.make_gru()
    for (key, p), q in zip(a.state_dict().items(), b.state_dict().values(), strict=True):
        assert torch.equal(p, q), key
    assert not torch.equal(sl.make_gru(seed=1).rnn.weight_hh_l0, a.rnn.weight_hh_l0)


def test_loading_and_factories_leave_global_rng_untouched():
    torch_before = torch.get_rng_state()
    # Reading numpy's legacy global state is the point here: it must not move.
    numpy_before = np.random.get_state()[1].copy()  # noqa: NPY002
    for name in RUNS:
        load_run(name)
        _factory(name)()
        make_run_inputs(name, 2, 30, seed=1)
    sl.SortingLineNet("gru", 40, gain=2.0)
    gh.GreenhouseNet("rnn", 32)
    assert torch.equal(torch_before, torch.get_rng_state())
    np.testing.assert_array_equal(numpy_before, np.random.get_state()[1])  # noqa: NPY002


def test_unknown_run_name_lists_available_runs():
    with pytest.raises(KeyError, match="available runs: rnn-gain0.5, rnn-gain1.0"):
        load_run("rnn-gain3.0")
    with pytest.raises(KeyError, match="greenhouse-lstm"):
        weights_path("nope")
    with pytest.raises(TypeError, match="run name must be a str"):
        load_run(3)


@pytest.fixture(scope="module")
def sorting_predictions(models, sorting_eval):
    with torch.no_grad():
        return {
            name: models[name](torch.from_numpy(sorting_eval.inputs)).argmax(-1).numpy()
            for name in SORTING_RUNS
        }  # name -> (B, T) predicted bins


def test_accuracy_matches_sklearn(models):
    data = sl.make_dataset(8, 200, seed=4)
    mask = data.targets != sl.IGNORE
    model = models["rnn-gain1.0"]
    with torch.no_grad():
        pred = model(torch.from_numpy(data.inputs)).argmax(-1).numpy()  # (B, T)
    # Oracle: scikit-learn's accuracy_score on the cue steps.
    expected = accuracy_score(data.targets[mask], pred[mask])
    assert sl.accuracy(model, data.inputs, data.targets) == pytest.approx(expected)
    short = data.delays <= 4
    expected = accuracy_score(data.targets[mask & short], pred[mask & short])
    assert sl.accuracy(model, data.inputs, data.targets, where=short) == pytest.approx(expected)


@pytest.mark.parametrize("name", SORTING_RUNS)
def test_trained_sorting_runs_beat_chance(sorting_predictions, sorting_eval, name):
    data = sorting_eval
    mask = data.targets != sl.IGNORE
    n = int(mask.sum())
    hits = int((sorting_predictions[name][mask] == data.targets[mask]).sum())
    acc = hits / n
    # One-sided exact binomial test against guessing among 3 bins (scipy.stats.binomtest).
    p_value = stats.binomtest(hits, n, 1 / 3, alternative="greater").pvalue
    print(f"{name}: accuracy {acc:.3f} on {n} fresh decisions (chance 0.333), p = {p_value:.1e}")
    assert p_value < 1e-6
    assert acc > 0.42


def test_gain_shapes_memory_span(sorting_predictions, sorting_eval):
    data = sorting_eval
    cue = data.targets != sl.IGNORE
    short = cue & (data.delays <= 4)
    long = cue & (data.delays >= 20)

    def acc(name, where):
        return float(np.mean(sorting_predictions[name][where] == data.targets[where]))

    # Designed contrast of the three runs: all remember a few steps; only gain 1.0 holds the
    # tag over 20-40 steps.
    for name in ("rnn-gain0.5", "rnn-gain1.0", "rnn-gain2.0"):
        assert acc(name, short) > 0.6, name
    assert acc("rnn-gain0.5", long) < 0.45
    assert acc("rnn-gain2.0", long) < 0.45
    assert acc("rnn-gain1.0", long) > 0.7
    assert acc("gru", cue) > 0.95


def test_spectral_radii_follow_the_gain(models):
    radii = {}
    for name in ("rnn-gain0.5", "rnn-gain1.0", "rnn-gain2.0"):
        w_hh = models[name].rnn.weight_hh_l0.detach().double()
        # Oracle: torch.linalg.eigvals beside numpy.linalg.eigvals inside the helper.
        radius = float(torch.linalg.eigvals(w_hh).abs().max())
        assert recurrent_spectral_radii(models[name])["h"] == pytest.approx(radius, rel=1e-9)
        radii[name] = radius
    assert radii["rnn-gain0.5"] < 1.0 < radii["rnn-gain2.0"]
    assert radii["rnn-gain0.5"] < radii["rnn-gain1.0"] < radii["rnn-gain2.0"]


def test_training_record_matches_shipped_weights(models):
    record = json.loads(RECORD_PATH.read_text())["runs"]
    assert list(record) == list(RUNS)
    for name, figures in record.items():
        radii = recurrent_spectral_radii(models[name])
        assert radii == pytest.approx(figures["spectral_radius"], rel=1e-6), name
        assert figures["factory"] == RUNS[name].factory


@pytest.mark.parametrize("gain", [0.5, 1.0, 2.0])
def test_initial_recurrent_blocks_are_scaled_orthogonal(gain):
    # An orthogonal matrix has all singular values 1 (numpy.linalg.svd as oracle).
    for model in (sl.make_tanh_rnn(gain=gain), sl.make_gru(gain=gain), gh.make_model(gain=gain)):
        w_hh = model.rnn.weight_hh_l0.detach().double().numpy()
        size = model.rnn.hidden_size
        for k in range(w_hh.shape[0] // size):
            singular = np.linalg.svd(w_hh[k * size : (k + 1) * size], compute_uv=False)
            np.testing.assert_allclose(singular, gain, rtol=1e-5)


def test_largest_lyapunov_of_a_linear_contraction():
    # Near the fixed point 0 (no input, no bias) tanh is the identity to first order, so the
    # exponent is log of the common modulus of W's singular values: log(0.5)
    # (common practice: Lyapunov exponents of a linear map).
    model = sl.make_tanh_rnn(gain=0.5)
    x = np.zeros((2, 80, 5), dtype=np.float32)
    assert largest_lyapunov(model, x, burn_in=10) == pytest.approx(math.log(0.5), abs=1e-6)


def test_greenhouse_linear_case_matches_lfilter():
    drivers = gh.make_inputs(3, 120, seed=2).astype(np.float64)
    drivers[..., 1] = 0.0  # vent shut
    params = gh.GreenhouseParams(soil_coupling=0.0)
    air = gh.air_temperature(drivers, params=params)
    # Without vent and soil the heat balance is a first-order leaky integrator:
    # A[t] = (1 - 1/tau) A[t-1] + drive[t] / tau, i.e. scipy.signal.lfilter([1/tau], [1, 1/tau-1]).
    drive = params.sun_gain * drivers[..., 0] + params.heater_gain * drivers[..., 2]
    tau = params.tau
    expected = signal.lfilter([1.0 / tau], [1.0, 1.0 / tau - 1.0], drive, axis=1)
    np.testing.assert_allclose(air, expected, rtol=1e-10, atol=1e-12)


def test_greenhouse_run_tracks_temperature(models):
    data = gh.make_dataset(16, 300, seed=0)
    with torch.no_grad():
        pred = models["greenhouse-lstm"](torch.from_numpy(data.inputs)).numpy()
    # Oracle: scikit-learn's r2_score over all steps.
    r2 = r2_score(data.targets.reshape(-1), pred.reshape(-1))
    print(f"greenhouse-lstm: R^2 {r2:.4f} on fresh inputs")
    assert r2 > 0.98


def test_forward_rejects_bad_inputs(models):
    model = models["gru"]
    with pytest.raises(ValueError, match=r"expects \(B, T, 5\)"):
        model(torch.zeros(2, 10, 4))
    with pytest.raises(TypeError, match="takes a torch.Tensor"):
        model(np.zeros((2, 10, 5), dtype=np.float32))
    with pytest.raises(TypeError, match="float32 parameters"):
        model(torch.zeros(2, 10, 5, dtype=torch.float64))
    with pytest.raises(ValueError, match="cell='conv' is not a known recurrent layer"):
        sl.SortingLineNet("conv")
    with pytest.raises(ValueError, match="gain=-1.0 is not a finite positive number"):
        sl.make_tanh_rnn(gain=-1.0)


def test_probe_inputs_file_matches_generator():
    with np.load(probe_inputs_path(), allow_pickle=False) as stored:
        np.testing.assert_array_equal(stored["inputs"], sl.make_inputs(16, 200, seed=0))


def test_training_is_deterministic_and_leaves_global_rng_alone():
    torch_before = torch.get_rng_state()
    recipe = RECIPES["rnn-gain2.0"]
    a = fit(recipe, steps=3)
    b = fit(recipe, steps=3)
    for key, value in a.state_dict().items():
        assert torch.equal(value, b.state_dict()[key]), key
    assert not torch.equal(a.rnn.weight_ih_l0, recipe.factory(gain=2.0).rnn.weight_ih_l0)
    assert torch.equal(torch_before, torch.get_rng_state())


def test_package_docstring_describes_the_scenario():
    doc = example_models.__doc__
    for word in ("Sorting line", "Greenhouse", "rnn-gain2.0",
                 "python -m hiddenlens.examples.train"):
        assert word in doc


def test_cue_trials_ship_their_task_variables():
    trials = sl.make_trials(12, 50, seed=3, delay=20)
    B = 12
    assert trials.inputs.shape == (B, 50, sl.N_INPUTS) and trials.colour.shape == (B,)
    flash = trials.inputs[np.arange(B), trials.onset, :3]  # (B, 3)
    assert np.all(flash.argmax(axis=1) == trials.colour)
    assert np.all(trials.inputs[np.arange(B), trials.cue, 3] > 0.5)
    assert np.all(trials.cue == trials.onset + 20)
    again = sl.make_trials(12, 50, seed=3, delay=20)
    np.testing.assert_array_equal(again.inputs, trials.inputs)
    with pytest.raises(ValueError, match="last_onset"):
        sl.make_trials(4, 10, last_onset=12)


def test_cue_events_match_the_dataset():
    data = sl.make_dataset(4, 120, seed=2)
    seq, onset, colour, delay = sl.cue_events(data)
    assert seq.size == int((data.targets != sl.IGNORE).sum())
    assert np.all(data.inputs[seq, onset, colour] > 0.5)  # the tag flash of each crate
    assert np.all(data.inputs[seq, onset + delay, 3] > 0.5)  # its gate cue


def test_weather_days_ship_their_task_variable():
    days = gh.make_days(30, 200, seed=4)
    B, T = 30, 200
    assert days.inputs.shape == (B, T, 3) and days.weather.shape == (B,)
    assert np.all(days.sunset == days.sunrise + 75)  # half of the 150-step day-night cycle
    steps = np.arange(T)[None]
    first_day = (steps >= days.sunrise[:, None]) & (steps < days.sunset[:, None])
    # clear-sky sunlight of the day: sin(2 pi (t - sunrise) / 150) on the lit steps
    clear = np.sin(2 * np.pi * (steps - days.sunrise[:, None]) / 150)
    lit = first_day & (clear > 0.1)
    cloud = days.inputs[..., 0] / np.where(lit, clear, 1.0)
    level = np.array([0.45, 0.7, 0.95])[days.weather][:, None]
    assert np.all(np.abs(np.where(lit, cloud - level, 0.0)) <= 0.05 + 1e-6)
    assert np.all(days.inputs[..., 2][first_day] == 0.0)  # heater off on the calm day
    assert np.allclose(days.inputs[..., 1][first_day], 0.5)  # vent half open
    np.testing.assert_allclose(days.targets[..., 0], gh.air_temperature(days.inputs), rtol=1e-5,
                               atol=1e-5)
    means = [days.sunshine[days.weather == k].mean() for k in range(3)]
    assert means[0] < means[1] < means[2]
    np.testing.assert_array_equal(gh.make_days(30, 200, seed=4).inputs, days.inputs)
    with pytest.raises(ValueError, match="before the latest sunset"):
        gh.make_days(4, 90)


def test_task_trials_of_every_run():
    for name in example_models.list_runs():
        trials = example_models.task_trials(name, 12, seed=1)
        B = 12
        assert trials.targets.shape == (B,) and trials.onsets.shape == (B,)
        assert trials.inputs.shape[0] == B and trials.targets.max() < len(trials.labels)
        assert trials.onsets.max() < trials.inputs.shape[1]
    with pytest.raises(KeyError, match="no example run"):
        example_models.task_trials("nope")


@pytest.mark.skipif(not example_models.weights_path("greenhouse-lstm").is_file(),
                    reason="example weights not trained yet")
def test_greenhouse_lstm_keeps_the_days_weather_into_the_night():
    # the air (time constant 20 steps) and the soil (150 steps) carry the day's sunshine into
    # the night (example_models/greenhouse.py); the trained LSTM predicts the air temperature,
    # so it must keep the weather well past sunset
    import hiddenlens

    trials = example_models.task_trials("greenhouse-lstm", 48, seed=0)
    trace = hiddenlens.record(example_models.load_run("greenhouse-lstm"), trials.inputs)
    tm = hiddenlens.task_memory(trace, trials.targets, onsets=trials.onsets, max_lag=50,
                                n_folds=3, n_permutations=19, cross_temporal=False, max_iter=100)
    assert tm.scores[0] > 0.9 and tm.span >= 20


def test_buffer_tally_counts_crates():
    data = sl.make_tally(8, 60, seed=2)
    x = data.inputs
    assert not np.any((x[..., 0] > 0) & (x[..., 1] > 0))  # never in and out at once
    np.testing.assert_allclose(data.targets[..., 0] * sl.TALLY_UNIT,
                               np.cumsum(x[..., 0] - x[..., 1], axis=1))


@pytest.mark.skipif(not example_models.tally_weights_path().is_file(),
                    reason="tally weights not trained yet")
def test_line_attractor_of_the_trained_integrator_with_default_settings():
    # An RNN trained to integrate has a line of slow points under zero input, along which the
    # Jacobian has an eigenvalue near 1 (Seung 1996; Sussillo & Barak 2013; Mante et al. 2013)
    import hiddenlens

    model = example_models.load_tally()
    data = sl.make_tally(64, 50, seed=1)
    with torch.no_grad():
        out = model(torch.from_numpy(data.inputs))
    # it integrates: the shipped weights' error is small against the count's variance
    assert float(torch.mean((out - torch.from_numpy(data.targets)) ** 2)) < 0.1 * np.var(
        data.targets)
    trace = hiddenlens.record(model, data.inputs)
    fp = hiddenlens.find_fixed_points(model, trace)  # default settings
    assert fp.slow_set_dimension == 1
    assert fp.summary.startswith("approximate line attractor:")
    assert "along one direction" in fp.summary
    members = int(np.asarray(fp.in_slow_set).sum())
    assert members >= 50 and abs(fp.tangent_eigenvalue - 1) < 0.05
    # reference: numpy's eigenvalues of torch.func's Jacobian of the step at the middle member
    rnn = model.rnn
    order = np.asarray(fp.slow_set_order)
    s = torch.tensor(fp.points[order[len(order) // 2]], dtype=torch.float32)

    def step(h):
        return torch.tanh(rnn.weight_hh_l0 @ h + rnn.bias_hh_l0 + rnn.bias_ih_l0)  # x* = 0

    J = torch.func.jacrev(step)(s).detach().double().numpy()
    assert np.min(np.abs(np.abs(np.linalg.eigvals(J)) - 1)) < 0.05
    # along the line, the readout runs through the counts the net held: ordered points give an
    # ordered count (scipy's Spearman rank correlation)
    with torch.no_grad():
        count = model.readout(torch.tensor(fp.points[order], dtype=torch.float32))[:, 0]
    rho = stats.spearmanr(np.arange(len(order)), count.numpy()).statistic
    assert abs(rho) > 0.95
    assert float(count.max() - count.min()) > 1.0  # more than 5 crates of range


def test_fit_tally_trains_from_its_seed():
    from hiddenlens.examples.train import fit_tally

    a, b = fit_tally(steps=3), fit_tally(steps=3)
    for (k, v), w in zip(a.state_dict().items(), b.state_dict().values()):
        assert torch.equal(v, w), k
