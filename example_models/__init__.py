"""Small trained recurrent models to try hidden-state analyses on (``hiddenlens.examples``).

The folder ``example_models/`` of the source tree installs as the package
``hiddenlens.examples``; import it under that name.

Two invented tasks:

* **Sorting line** (:mod:`hiddenlens.examples.sorting_line`): fruit crates pass a colour scanner on
  a conveyor. The scanner flashes a crate's tag (red, green or yellow; one-hot on channels
  0-2) for one step; 2 to 40 steps later the diverter-gate cue arrives on channel 3 and the
  network must name the bin, i.e. the tag colour, at that step. Belt vibration streams in on
  channel 4 and all channels carry a little sensor noise. A classification task that needs
  memory; inputs (B, T, 5), logits (B, T, 3).
* **Greenhouse** (:mod:`hiddenlens.examples.greenhouse`): from sunlight, vent opening and heater
  power, predict the air temperature, a leaky integrator (time constant ~20 steps) of these
  drivers with a slow soil-heat store. A regression task; inputs (B, T, 3), outputs (B, T, 1).

Every model holds exactly one batch-first recurrent layer (``model.rnn``) and a linear readout
(``model.readout``). The shipped runs:

================  ====================================================================
``rnn-gain0.5``   sorting line, tanh ``nn.RNN`` (32 states), recurrent init gain 0.5
``rnn-gain1.0``   same, gain 1.0
``rnn-gain2.0``   same, gain 2.0
``gru``           sorting line, ``nn.GRU`` (32 states), gain 1.0
``greenhouse-lstm`` greenhouse, ``nn.LSTM`` (32 states)
================  ====================================================================

The three ``rnn-gain*`` runs differ only in the gain g of the recurrent initialisation
(W_hh starts as g times a random orthogonal matrix, spectral radius exactly g). Their
recurrent weights were trained with a small step size, so the gain still shows in the trained
dynamics: contractive at 0.5, expansive and chaotic at 2.0. Retrain with
``python -m hiddenlens.examples.train``.

Examples
--------
>>> import torch
>>> from hiddenlens.examples import load_run, sorting_line
>>> model = load_run("rnn-gain1.0")
>>> x = torch.from_numpy(sorting_line.make_inputs(4, 100, seed=1))
>>> model(x).shape
torch.Size([4, 100, 3])
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Mapping
from pathlib import Path
from types import MappingProxyType, ModuleType
from typing import NamedTuple

import numpy as np
import torch
from torch import nn

__all__ = [
    "RUNS",
    "Run",
    "TaskTrials",
    "list_runs",
    "load_run",
    "load_tally",
    "make_run_inputs",
    "probe_inputs_path",
    "task_metrics",
    "tally_weights_path",
    "task_trials",
    "weights_path",
]

_HERE = Path(__file__).resolve().parent


class Run(NamedTuple):
    """Where a shipped run comes from.

    Attributes
    ----------
    factory : str
        ``"module:function"`` of a factory that builds the untrained model with no arguments.
    weights : str
        File name of the trained ``state_dict`` in ``example_models/weights``.
    task : str
        The task module the run was trained on, e.g. ``"hiddenlens.examples.sorting_line"``
        (its ``make_inputs`` feeds the run).
    """

    factory: str
    weights: str
    task: str = ""


_SORTING = "hiddenlens.examples.sorting_line"
_GREENHOUSE = "hiddenlens.examples.greenhouse"

RUNS: Mapping[str, Run] = MappingProxyType(
    {
        "rnn-gain0.5": Run(f"{_SORTING}:make_tanh_rnn", "rnn-gain0.5.pt", _SORTING),
        "rnn-gain1.0": Run(f"{_SORTING}:make_tanh_rnn", "rnn-gain1.0.pt", _SORTING),
        "rnn-gain2.0": Run(f"{_SORTING}:make_tanh_rnn", "rnn-gain2.0.pt", _SORTING),
        "gru": Run(f"{_SORTING}:make_gru", "gru.pt", _SORTING),
        "greenhouse-lstm": Run(f"{_GREENHOUSE}:make_model", "greenhouse-lstm.pt", _GREENHOUSE),
    }
)


def list_runs(task: ModuleType | str | None = None) -> list[str]:
    """Names of the shipped runs, in the order of :data:`RUNS`.

    ``task`` (a task module such as :mod:`hiddenlens.examples.sorting_line`, or its name)
    keeps the runs trained on that task only.
    """
    if task is None:
        return list(RUNS)
    name = task.__name__ if isinstance(task, ModuleType) else str(task)
    return [n for n, r in RUNS.items() if r.task == name]


def _run(name: str) -> Run:
    if not isinstance(name, str):
        raise TypeError(f"run name must be a str, got {type(name).__name__}; pass e.g. 'gru'")
    try:
        return RUNS[name]
    except KeyError:
        raise KeyError(
            f"no example run named {name!r}; available runs: {', '.join(RUNS)}"
        ) from None


def weights_path(name: str) -> Path:
    """Path of the trained ``state_dict`` of run ``name`` (the file may be missing if the
    run was never trained; ``python -m hiddenlens.examples.train --only NAME`` writes it)."""
    return _HERE / "weights" / _run(name).weights


def probe_inputs_path() -> Path:
    """Path of ``data/sorting_line_inputs.npz``: key ``"inputs"``, shape (16, 200, 5), float32,
    equal to ``sorting_line.make_inputs(16, 200, seed=0)``."""
    return _HERE / "data" / "sorting_line_inputs.npz"


def _import_factory(path: str) -> Callable[[], nn.Module]:
    module_name, _, attr = path.partition(":")
    return getattr(importlib.import_module(module_name), attr)


def load_run(name: str) -> nn.Module:
    """Build run ``name`` and load its trained weights; returned in eval mode.

    Weights are read with ``torch.load(..., weights_only=True)``; torch's global random stream
    is not used.

    Raises
    ------
    KeyError
        If ``name`` is not one of :func:`list_runs`.
    FileNotFoundError
        If the weights file is missing.
    """
    run = _run(name)
    path = weights_path(name)
    if not path.is_file():
        raise FileNotFoundError(
            f"weights of run {name!r} not found at {path}; "
            f"create them with `python -m hiddenlens.examples.train --only {name}`"
        )
    model = _import_factory(run.factory)()
    state = torch.load(path, map_location="cpu", weights_only=True)
    model.load_state_dict(state)
    return model.eval()


def tally_weights_path() -> Path:
    """Path of the trained buffer-tally integrator's ``state_dict`` (``weights/tally-rnn.pt``;
    ``python -m hiddenlens.examples.train --tally`` writes it)."""
    return _HERE / "weights" / "tally-rnn.pt"


def load_tally() -> nn.Module:
    """The tanh RNN trained on the buffer tally (:func:`sorting_line.make_tally`), in eval
    mode: an integrator of crates entering (+1) and leaving (-1) the buffer lane, whose zero
    input holds a line of slow points (a line attractor).

    Not one of :data:`RUNS` (its inputs are the tally's two light barriers, not the sorting
    line's five channels). Weights are read with ``torch.load(..., weights_only=True)``.
    """
    from .sorting_line import make_tally_rnn

    path = tally_weights_path()
    if not path.is_file():
        raise FileNotFoundError(f"weights of the buffer tally not found at {path}; create them "
                                "with `python -m hiddenlens.examples.train --tally`")
    model = make_tally_rnn()
    model.load_state_dict(torch.load(path, map_location="cpu", weights_only=True))
    return model.eval()


def make_run_inputs(
    name: str, n_sequences: int = 16, n_steps: int | None = None, *, seed: int = 0
) -> np.ndarray:
    """Inputs (B, T, I) float32 suited to run ``name``, from its task's ``make_inputs``.

    ``n_steps=None`` uses the task's default length (200 sorting line, 300 greenhouse).
    """
    task = importlib.import_module(_run(name).task)
    if n_steps is None:
        return task.make_inputs(n_sequences, seed=seed)
    return task.make_inputs(n_sequences, n_steps, seed=seed)


class TaskTrials(NamedTuple):
    """Trials of a run's task with the task variable to decode (:func:`task_trials`).

    Attributes
    ----------
    inputs : ndarray of shape (B, T, I), float32
    targets : ndarray of shape (B,), int64
        The task variable of each trial, an index into ``labels``.
    onsets : ndarray of shape (B,), int64
        The step each trial's lags count from.
    labels : tuple of str
        The names of the target values.
    description : str
        What the trials are and what is decoded, in words.
    """

    inputs: np.ndarray
    targets: np.ndarray
    onsets: np.ndarray
    labels: tuple[str, ...]
    description: str


def task_trials(name: str, n_sequences: int = 96, *, seed: int = 0) -> TaskTrials:
    """Trials of run ``name``'s task with its task variable, ready for task memory.

    Sorting line: one crate per trial (:func:`sorting_line.make_trials`, 80 steps, no gate
    cue), the target its tag colour, the onset its tag flash. Greenhouse: one calm day of a
    known weather per trial (:func:`greenhouse.make_days`, 300 steps), the target that weather,
    the onset its sunset.

    Examples
    --------
    >>> import hiddenlens
    >>> from hiddenlens.examples import load_run, task_trials
    >>> trials = task_trials("gru")
    >>> hiddenlens.explore(load_run("gru"), trials.inputs, targets=trials.targets,
    ...                    onsets=trials.onsets)  # doctest: +SKIP
    """
    task = _run(name).task
    if task == _SORTING:
        from . import sorting_line

        t = sorting_line.make_trials(n_sequences, 80, seed=seed)
        return TaskTrials(t.inputs, t.colour, t.onset, sorting_line.BINS,
                          f"{n_sequences} one-crate trials of 80 steps; the crate's tag colour "
                          "decoded at each step after its flash")
    from . import greenhouse

    d = greenhouse.make_days(n_sequences, 300, seed=seed)
    return TaskTrials(d.inputs, d.weather, d.sunset, greenhouse.WEATHER,
                      f"{n_sequences} greenhouse sequences of 300 steps, each starting with one "
                      "calm day of known weather; the weather decoded at each step after "
                      "sunset")


# Task facts for the diagnosis: chance accuracy (three tag colours, uniform) and the horizon,
# the longest span the task needs (the longest tag-to-cue delay; the greenhouse's time constant).
_TASK_FACTS: Mapping[str, dict] = MappingProxyType({
    # n_eval: gate cues in the evaluation set of train.py, make_dataset(256, 200, seed=1)
    "sorting_line": {"chance": 1.0 / 3.0, "horizon": 40, "kind": "classification",
                     "n_eval": 2845},
    "greenhouse": {"horizon": 20, "kind": "regression"},
})


def task_metrics(name: str) -> dict:
    """Task metrics of shipped run ``name`` from ``weights/training_record.json``.

    Returns
    -------
    dict
        ``task``, ``kind``, ``horizon`` (steps), ``loss`` (evaluation loss) and, for the sorting
        line, ``accuracy``, ``chance``, ``n_eval`` (evaluated decisions) and
        ``accuracy_by_delay``; for the greenhouse ``r2`` and ``rmse``.
        Ready for ``hiddenlens.diagnose(figures, task=task_metrics(name))``.
    """
    import json

    _run(name)
    record = json.loads((_HERE / "weights" / "training_record.json").read_text())
    entry = record.get("runs", {}).get(name)
    if entry is None:
        raise KeyError(f"run {name!r} has no entry in training_record.json; retrain it with "
                       f"`python -m example_models.train --only {name}`")
    out = {"task": entry["task"], **_TASK_FACTS[entry["task"]], "loss": entry["eval_loss"]}
    for key in ("accuracy", "accuracy_by_delay", "r2", "rmse"):
        if key in entry:
            out[key] = entry[key]
    return out
