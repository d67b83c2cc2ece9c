"""Greenhouse: predict the air temperature from sunlight, vent opening and heater power.

Three smooth random drivers stream in (channel 0 sunlight, 1 vent opening, 2 heater power).
The air temperature, measured relative to outdoors, is a leaky integrator of the drivers with
a time constant of about 20 steps; an open vent makes it leak faster, and a slow soil-heat
store (time constant 150 steps) warms up with the air and gives heat back. The network outputs
the temperature at every step.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from ._nets import RecurrentReadout, check_count, check_seed

__all__ = ["DRIVERS", "N_INPUTS", "GreenhouseData", "GreenhouseNet", "GreenhouseParams",
    "air_temperature", "make_dataset", "make_inputs", "make_model"]

DRIVERS: tuple[str, ...] = ("sunlight", "vent", "heater")
N_INPUTS = 3

_DAY = 150  # steps per day-night cycle of the sunlight
_PERSISTENCE = 0.95  # AR(1) coefficient of the smooth driver processes
_BURN_IN = 100


@dataclass(frozen=True)
class GreenhouseParams:
    """Constants of the greenhouse heat balance (temperatures relative to outdoors).

    Per step t, with air temperature A, soil temperature G and drivers sun, vent, heat::

        A[t] = A[t-1] + (sun_gain * sun[t] + heater_gain * heat[t]
                         - (1 + vent_loss * vent[t]) * A[t-1]
                         + soil_coupling * (G[t-1] - A[t-1])) / tau
        G[t] = G[t-1] + (A[t-1] - G[t-1]) / soil_tau

    starting from A[-1] = G[-1] = 0.
    """

    tau: float = 20.0
    soil_tau: float = 150.0
    sun_gain: float = 3.0
    heater_gain: float = 2.0
    vent_loss: float = 1.5
    soil_coupling: float = 0.5


class GreenhouseData(NamedTuple):
    """One batch of greenhouse sequences.

    Attributes
    ----------
    inputs : ndarray of shape (B, T, 3), float32
        Sunlight, vent opening and heater power.
    targets : ndarray of shape (B, T, 1), float32
        Air temperature relative to outdoors.
    """

    inputs: np.ndarray
    targets: np.ndarray


def air_temperature(drivers: np.ndarray, *, params: GreenhouseParams | None = None) -> np.ndarray:
    """Integrate the heat balance of :class:`GreenhouseParams` over drivers (B, T, 3).

    Returns
    -------
    ndarray of shape (B, T), float64
        Air temperature relative to outdoors after each step's drivers have acted.
    """
    p = GreenhouseParams() if params is None else params
    drivers = np.asarray(drivers, dtype=np.float64)
    if drivers.ndim != 3 or drivers.shape[-1] != N_INPUTS:
        raise ValueError(
            f"drivers has shape {drivers.shape} but the greenhouse expects (B, T, 3); "
            "pass sunlight, vent and heater on the last axis"
        )
    sun, vent, heat = drivers[..., 0], drivers[..., 1], drivers[..., 2]  # (B, T) each
    air = np.zeros(drivers.shape[:2])  # (B, T)
    a = np.zeros(drivers.shape[0])  # (B,)
    g = np.zeros(drivers.shape[0])  # (B,)
    for t in range(drivers.shape[1]):
        gain = p.sun_gain * sun[:, t] + p.heater_gain * heat[:, t]
        leak = (1.0 + p.vent_loss * vent[:, t]) * a
        a, g = a + (gain - leak + p.soil_coupling * (g - a)) / p.tau, g + (a - g) / p.soil_tau
        air[:, t] = a
    return air


def _smooth_noise(rng: np.random.Generator, shape: tuple[int, int]) -> np.ndarray:
    """Two cascaded AR(1) filters of white noise, scaled to unit stationary variance."""
    phi = _PERSISTENCE
    # y = s * sum_k (k+1) phi^k eps[t-k] has variance s^2 (1 + phi^2) / (1 - phi^2)^3.
    scale = np.sqrt((1.0 - phi**2) ** 3 / (1.0 + phi**2))
    n_seq, n_t = shape
    shocks = rng.standard_normal((n_seq, n_t + _BURN_IN))  # (B, T + burn-in)
    x = np.zeros(n_seq)
    y = np.zeros(n_seq)
    out = np.empty((n_seq, n_t))  # (B, T)
    for t in range(n_t + _BURN_IN):
        x = phi * x + shocks[:, t]
        y = phi * y + x
        if t >= _BURN_IN:
            out[:, t - _BURN_IN] = scale * y
    return out


def make_dataset(n_sequences: int = 16, n_steps: int = 300, *, seed: int = 0) -> GreenhouseData:
    """Draw greenhouse driver sequences and the air temperature they produce.

    Parameters
    ----------
    n_sequences, n_steps : int
        Batch size B and length T.
    seed : int
        Seed of the private ``np.random.default_rng``; the same seed gives the same data.

    Returns
    -------
    GreenhouseData
        ``inputs`` (B, T, 3) float32 and ``targets`` (B, T, 1) float32.
    """
    n_seq = check_count("n_sequences", n_sequences, 1, 16, "a positive integer")
    n_t = check_count("n_steps", n_steps, 1, 300, "a positive integer")
    rng = np.random.default_rng(check_seed(seed))
    phase = rng.uniform(0.0, _DAY, size=(n_seq, 1))  # (B, 1)
    steps = np.arange(n_t)[None, :]  # (1, T)
    daylight = np.clip(np.sin(2.0 * np.pi * (steps + phase) / _DAY), 0.0, None)  # (B, T)
    clouds = 0.7 + 0.3 * np.tanh(_smooth_noise(rng, (n_seq, n_t)))  # (B, T)
    vent = 1.0 / (1.0 + np.exp(-1.5 * _smooth_noise(rng, (n_seq, n_t))))  # (B, T)
    heater = np.clip(_smooth_noise(rng, (n_seq, n_t)), 0.0, None)  # (B, T)
    inputs = np.stack([daylight * clouds, vent, heater], axis=-1)  # (B, T, 3)
    targets = air_temperature(inputs)[..., None]  # (B, T, 1)
    return GreenhouseData(inputs.astype(np.float32), targets.astype(np.float32))


def make_inputs(n_sequences: int = 16, n_steps: int = 300, *, seed: int = 0) -> np.ndarray:
    """Greenhouse inputs of shape (B, T, 3), float32; see :func:`make_dataset`."""
    return make_dataset(n_sequences, n_steps, seed=seed).inputs


class GreenhouseNet(RecurrentReadout):
    """Recurrent layer plus a linear readout giving the air temperature at every step.

    Parameters
    ----------
    cell : {"lstm", "gru", "rnn"}
        Recurrent layer type.
    hidden_size : int
        State size S.
    gain, seed : keyword-only
        As in :class:`RecurrentReadout` (orthogonal recurrent blocks times ``gain``, private
        initialisation generator).

    ``forward(x)`` maps inputs (B, T, 3) to temperatures (B, T, 1).
    """

    def __init__(
        self, cell: str = "lstm", hidden_size: int = 32, *, gain: float = 1.0, seed: int = 0
    ) -> None:
        super().__init__(
            N_INPUTS, 1, cell=cell, hidden_size=hidden_size, gain=gain, input_std=1.0, seed=seed
        )


def make_model(*, gain: float = 1.0, seed: int = 0) -> GreenhouseNet:
    """Untrained ``nn.LSTM`` greenhouse model with 32 states."""
    return GreenhouseNet("lstm", 32, gain=gain, seed=seed)
