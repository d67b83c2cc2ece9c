"""Sorting line: remember a crate's colour tag until the diverter-gate cue arrives.

Fruit crates ride a conveyor past a colour scanner. When a crate passes, the scanner flashes
its tag for one step on one of three channels (one-hot). A variable number of steps later the
diverter-gate cue arrives on channel 3, and at that step the network must name the bin, which
is the tag colour. Meanwhile belt vibration streams in on channel 4, and every channel carries
a little sensor noise. Crates follow each other along the sequence, so one sequence holds
several decisions.

Channels of the inputs (B, T, 5): 0-2 tag flash (red, green, yellow), 3 gate cue, 4 belt
vibration. Targets (B, T): the bin index at cue steps, ``IGNORE`` (-1) at every other step.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import torch

from ._nets import RecurrentReadout, check_count, check_seed

__all__ = [
    "BINS",
    "IGNORE",
    "N_INPUTS",
    "CueTrials",
    "SortingLineData",
    "SortingLineNet",
    "TallyData",
    "accuracy",
    "cue_events",
    "make_dataset",
    "make_gru",
    "make_inputs",
    "make_tally",
    "make_tally_rnn",
    "make_tanh_rnn",
    "make_trials",
]

BINS: tuple[str, ...] = ("red", "green", "yellow")
N_INPUTS = 5
IGNORE = -1

_CUE = 3
_VIBRATION = 4
_VIBRATION_PERSISTENCE = 0.9  # AR(1) coefficient of the belt vibration
_VIBRATION_STD = 0.25
_SENSOR_NOISE_STD = 0.05
_GAP = (2, 8)
# Input weights start as N(0, 1.5**2): a one-step tag flash then stands out against the
# recurrent drive even in the gain-2 network.
_INPUT_STD = 1.5  # steps between one crate's cue and the next crate's tag (inclusive)


class SortingLineData(NamedTuple):
    """One batch of sorting-line sequences.

    Attributes
    ----------
    inputs : ndarray of shape (B, T, 5), float32
        Tag flash (channels 0-2), gate cue (3) and belt vibration (4), plus sensor noise.
    targets : ndarray of shape (B, T), int64
        Bin index (0, 1, 2) at each cue step, ``IGNORE`` (-1) elsewhere.
    delays : ndarray of shape (B, T), int64
        Steps from tag flash to cue at each cue step, 0 elsewhere.
    """

    inputs: np.ndarray
    targets: np.ndarray
    delays: np.ndarray


def make_dataset(
    n_sequences: int = 16,
    n_steps: int = 200,
    *,
    seed: int = 0,
    min_delay: int = 2,
    max_delay: int = 40,
) -> SortingLineData:
    """Draw sorting-line sequences with their targets.

    Parameters
    ----------
    n_sequences, n_steps : int
        Batch size B and length T.
    seed : int
        Seed of the private ``np.random.default_rng``; the same seed gives the same data.
    min_delay, max_delay : int
        Range (inclusive) of the steps between a tag flash and its gate cue; delays are drawn
        log-uniformly (rounded down) from this range.

    Returns
    -------
    SortingLineData
        ``inputs`` (B, T, 5) float32, ``targets`` (B, T) int64, ``delays`` (B, T) int64.
    """
    n_seq = check_count("n_sequences", n_sequences, 1, 16)
    n_t = check_count("n_steps", n_steps, 1, 200)
    lo = check_count("min_delay", min_delay, 1, 2)
    hi = check_count("max_delay", max_delay, 1, 40)
    if hi < lo:
        raise ValueError(f"max_delay={hi} is below min_delay={lo}; pass max_delay >= min_delay")
    rng = np.random.default_rng(check_seed(seed))
    inputs = np.zeros((n_seq, n_t, N_INPUTS))  # (B, T, I)
    targets = np.full((n_seq, n_t), IGNORE, dtype=np.int64)  # (B, T)
    delays = np.zeros((n_seq, n_t), dtype=np.int64)  # (B, T)
    for b in range(n_seq):
        t = int(rng.integers(1, _GAP[1] + 1))
        while True:
            # Log-uniform: short gaps between scanner and gate are as common as long ones
            # on a log scale, so both short and long memory spans are exercised.
            delay = min(int(np.exp(rng.uniform(np.log(lo), np.log(hi + 1)))), hi)
            if t + delay >= n_t:
                break
            colour = int(rng.integers(len(BINS)))
            inputs[b, t, colour] = 1.0
            inputs[b, t + delay, _CUE] = 1.0
            targets[b, t + delay] = colour
            delays[b, t + delay] = delay
            t += delay + int(rng.integers(_GAP[0], _GAP[1] + 1))

    shocks = rng.standard_normal((n_seq, n_t))  # (B, T)
    scale = _VIBRATION_STD * np.sqrt(1.0 - _VIBRATION_PERSISTENCE**2)
    vibration = np.empty((n_seq, n_t))  # (B, T)
    vibration[:, 0] = _VIBRATION_STD * shocks[:, 0]
    for t in range(1, n_t):
        vibration[:, t] = _VIBRATION_PERSISTENCE * vibration[:, t - 1] + scale * shocks[:, t]
    inputs[:, :, _VIBRATION] += vibration
    inputs += _SENSOR_NOISE_STD * rng.standard_normal(inputs.shape)
    return SortingLineData(inputs.astype(np.float32), targets, delays)


class CueTrials(NamedTuple):
    """Sorting-line trials with one crate each, and the task variables to decode.

    Attributes
    ----------
    inputs : ndarray of shape (B, T, 5), float32
    colour : ndarray of shape (B,), int64
        The tag colour (bin index) of the sequence's crate.
    onset : ndarray of shape (B,), int64
        The step of the tag flash.
    cue : ndarray of shape (B,), int64
        The step of the gate cue, -1 when the trial has none.
    """

    inputs: np.ndarray
    colour: np.ndarray
    onset: np.ndarray
    cue: np.ndarray


def make_trials(
    n_sequences: int = 96,
    n_steps: int = 80,
    *,
    seed: int = 0,
    first_onset: int = 5,
    last_onset: int = 15,
    delay: int | None = None,
) -> CueTrials:
    """One crate per sequence: a tag flash at a random onset, then (optionally) its gate cue.

    The belt vibration and sensor noise are those of :func:`make_dataset`. Decode ``colour``
    from the states at each step after ``onset`` (``hiddenlens.task_memory``) to see how long a
    network keeps the tag.

    Parameters
    ----------
    n_sequences, n_steps : int
    seed : int
        Seed of the private ``np.random.default_rng``.
    first_onset, last_onset : int
        Range (inclusive) of the tag-flash step.
    delay : int, optional
        Steps from flash to gate cue; None: no cue, the tag must be kept to the end.
    """
    n_seq = check_count("n_sequences", n_sequences, 1, 96)
    n_t = check_count("n_steps", n_steps, 2, 80)
    lo = check_count("first_onset", first_onset, 0, 5)
    hi = check_count("last_onset", last_onset, lo, 15)
    if hi >= n_t:
        raise ValueError(f"last_onset={hi} is not inside the {n_t} steps; pass a smaller "
                         "last_onset or a larger n_steps")
    if delay is not None:
        delay = check_count("delay", delay, 1, 30)
    base = make_dataset(n_seq, n_t, seed=seed, min_delay=n_t, max_delay=n_t)
    inputs = base.inputs.copy()  # vibration and noise, no crate (every delay is too long)
    rng = np.random.default_rng(check_seed(seed) + 1)
    colour = rng.integers(len(BINS), size=n_seq)
    onset = rng.integers(lo, hi + 1, size=n_seq)
    rows = np.arange(n_seq)
    inputs[rows, onset, colour] += 1.0
    cue = np.full(n_seq, -1, dtype=np.int64)
    if delay is not None:
        cue = onset + delay
        inside = cue < n_t
        inputs[rows[inside], cue[inside], _CUE] += 1.0
        cue = np.where(inside, cue, -1)
    return CueTrials(inputs, colour.astype(np.int64), onset.astype(np.int64), cue)


def cue_events(data: SortingLineData) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The crates of a :func:`make_dataset` batch as events.

    Returns
    -------
    sequence, onset, colour, delay : ndarrays of shape (n_events,), int64
        For each crate: its sequence, the step of its tag flash, its colour and the steps to
        its gate cue.
    """
    seq, cue_step = np.nonzero(np.asarray(data.targets) != IGNORE)
    delay = np.asarray(data.delays)[seq, cue_step]
    return seq, cue_step - delay, np.asarray(data.targets)[seq, cue_step], delay


def make_inputs(n_sequences: int = 16, n_steps: int = 200, *, seed: int = 0) -> np.ndarray:
    """Sorting-line inputs of shape (B, T, 5), float32; see :func:`make_dataset`."""
    return make_dataset(n_sequences, n_steps, seed=seed).inputs


class SortingLineNet(RecurrentReadout):
    """Recurrent layer plus a linear readout giving 3 bin logits per step.

    Parameters
    ----------
    cell : {"rnn", "gru"}
        ``"rnn"`` is a tanh ``nn.RNN``; ``"gru"`` an ``nn.GRU``. ``"lstm"`` works as well.
    hidden_size : int
        State size S.
    gain, seed : keyword-only
        As in :class:`RecurrentReadout` (orthogonal recurrent blocks times ``gain``, private
        initialisation generator).

    Input weights start as N(0, 1.5**2), recurrent blocks as ``gain`` times a random
    orthogonal matrix. ``forward(x)`` maps inputs (B, T, 5) to logits (B, T, 3); the
    prediction counts only at cue steps.
    """

    def __init__(
        self, cell: str = "rnn", hidden_size: int = 32, *, gain: float = 1.0, seed: int = 0
    ) -> None:
        super().__init__(
            N_INPUTS,
            len(BINS),
            cell=cell,
            hidden_size=hidden_size,
            gain=gain,
            input_std=_INPUT_STD,
            seed=seed,
        )


def make_tanh_rnn(*, gain: float = 1.0, seed: int = 0) -> SortingLineNet:
    """Untrained tanh ``nn.RNN`` sorting-line model with 32 states."""
    return SortingLineNet("rnn", 32, gain=gain, seed=seed)


def make_gru(*, gain: float = 1.0, seed: int = 0) -> SortingLineNet:
    """Untrained ``nn.GRU`` sorting-line model with 32 states."""
    return SortingLineNet("gru", 32, gain=gain, seed=seed)


@torch.no_grad()
def accuracy(
    model: torch.nn.Module,
    inputs: np.ndarray,
    targets: np.ndarray,
    *,
    where: np.ndarray | None = None,
) -> float:
    """Fraction of cue steps at which the largest logit names the right bin.

    Parameters
    ----------
    model : nn.Module
        Maps (B, T, 5) to (B, T, 3). Run as given; switch it to eval mode yourself.
    inputs : ndarray of shape (B, T, 5)
    targets : ndarray of shape (B, T)
        As from :func:`make_dataset`; steps holding ``IGNORE`` do not count.
    where : ndarray of shape (B, T), bool, optional
        Count only the cue steps where this is True, e.g. ``data.delays >= 30``.
    """
    targets = np.asarray(targets)
    mask = targets != IGNORE  # (B, T)
    if where is not None:
        mask &= np.asarray(where, dtype=bool)
    if not mask.any():
        raise ValueError(
            "no cue step to score; pass longer sequences (n_steps >= 50) or a wider `where`"
        )
    dtype = next(model.parameters()).dtype
    logits = model(torch.as_tensor(np.asarray(inputs), dtype=dtype))  # (B, T, 3)
    predicted = logits.argmax(dim=-1).numpy()  # (B, T)
    return float(np.mean(predicted[mask] == targets[mask]))


# ---------------------------------------------------------------------- the buffer tally
#: crates per unit of the tally's output: the output stays near the tanh units' range
TALLY_UNIT = 5.0
_TALLY_RATE = 0.08  # chance per step that a crate enters the buffer lane (and that one leaves)


class TallyData(NamedTuple):
    """Sequences of the buffer tally: crates entering and leaving the buffer lane.

    Attributes
    ----------
    inputs : ndarray of shape (B, T, 2), float32
        Channel 0: a crate enters the buffer lane (1 for one step); channel 1: one leaves.
    targets : ndarray of shape (B, T, 1), float32
        The running count of crates in the lane (entered minus left since the start), in units
        of :data:`TALLY_UNIT` crates.
    """

    inputs: np.ndarray
    targets: np.ndarray


def make_tally(n_sequences: int = 32, n_steps: int = 50, *, seed: int = 0) -> TallyData:
    """The buffer tally: keep a running count of the crates in the buffer lane.

    Before the diverter, crates queue in a buffer lane; a light barrier at its entrance and
    one at its exit each flash for one step when a crate passes (each with chance 0.08 per
    step, never both at once). The network outputs the count so far, in units of 5 crates:
    an integrator, which between events must hold any count it has reached. A network that
    learns it well has a line of slow points under zero input, one per count (a line
    attractor; Seung 1996, Sussillo & Barak 2013).
    """
    n_seq = check_count("n_sequences", n_sequences, 1, 32)
    n_t = check_count("n_steps", n_steps, 1, 50)
    rng = np.random.default_rng(check_seed(seed))
    event = rng.random((n_seq, n_t))  # (B, T)
    inputs = np.zeros((n_seq, n_t, 2), dtype=np.float32)  # (B, T, 2)
    inputs[..., 0] = event < _TALLY_RATE
    inputs[..., 1] = event > 1.0 - _TALLY_RATE
    count = np.cumsum(inputs[..., 0] - inputs[..., 1], axis=1)  # (B, T)
    return TallyData(inputs, (count / TALLY_UNIT)[..., None].astype(np.float32))


class TallyNet(RecurrentReadout):
    """tanh ``nn.RNN`` plus a linear readout for the buffer tally: (B, T, 2) -> (B, T, 1)."""

    def __init__(self, hidden_size: int = 16, *, gain: float = 1.0, seed: int = 0) -> None:
        super().__init__(2, 1, cell="rnn", hidden_size=hidden_size, gain=gain, input_std=0.5,
                         seed=seed)


def make_tally_rnn(*, gain: float = 1.0, seed: int = 0) -> TallyNet:
    """Untrained tanh ``nn.RNN`` buffer-tally model with 16 states."""
    return TallyNet(16, gain=gain, seed=seed)
