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

__all__ = [
    "DRIVERS",
    "N_INPUTS",
    "WEATHER",
    "GreenhouseData",
    "GreenhouseNet",
    "GreenhouseParams",
    "air_temperature",
    "WeatherDays",
    "make_dataset",
    "make_days",
    "make_inputs",
    "make_model",
]

DRIVERS: tuple[str, ...] = ("sunlight", "vent", "heater")
N_INPUTS = 3

_DAY = 150  # steps per day-night cycle of the sunlight
#: the day's weather, from the most to the least cloud; its index is the label of make_days
WEATHER: tuple[str, ...] = ("overcast", "mixed", "sunny")
# cloud factor (fraction of the clear-sky sunlight that gets through) of each weather, inside
# the range 0.4..1.0 of the cloud factor that make_dataset draws
_CLOUD_LEVEL = (0.45, 0.7, 0.95)
_CLOUD_WOBBLE = 0.05  # how far the cloud factor strays from its weather's level
_CALM_VENT = 0.5  # vent opening through the first day of make_days (the heater is off)
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


class WeatherDays(NamedTuple):
    """Greenhouse sequences that each start with one day of a known weather, and the task
    variables to decode.

    Attributes
    ----------
    inputs : ndarray of shape (B, T, 3), float32
        Sunlight, vent opening and heater power, as in :func:`make_dataset`.
    targets : ndarray of shape (B, T, 1), float32
        The air temperature they produce.
    weather : ndarray of shape (B,), int64
        The first day's weather, an index into :data:`WEATHER` (0 overcast, 1 mixed, 2 sunny).
    sunshine : ndarray of shape (B,), float64
        The first day's mean sunlight over its daylight steps (a continuous version of
        ``weather``).
    sunrise, sunset : ndarray of shape (B,), int64
        First daylight step of that day, and the first dark step after it (its ``onset``
        for ``hiddenlens.task_memory``: lags count into the night).
    """

    inputs: np.ndarray
    targets: np.ndarray
    weather: np.ndarray
    sunshine: np.ndarray
    sunrise: np.ndarray
    sunset: np.ndarray


def make_days(
    n_sequences: int = 96,
    n_steps: int = 300,
    *,
    seed: int = 0,
    first_sunrise: int = 5,
    last_sunrise: int = 25,
) -> WeatherDays:
    """Greenhouse sequences whose first day has one of three weathers (:data:`WEATHER`).

    Each sequence starts at night; the first day dawns at a random step in
    ``first_sunrise..last_sunrise`` and lasts half a cycle (75 steps). During that day the
    cloud factor stays near its weather's level (overcast 0.45, mixed 0.7, sunny 0.95 of the
    clear-sky sunlight, wobbling by 0.05), the vent stays half open and the heater off, so the
    weather is the day's only driver; from sunset on, clouds, vent and heater are random as in
    :func:`make_dataset`, which adds drive the weather has to be told apart from. The day's
    sunshine warms
    the air (time constant 20 steps) and the soil (150 steps), which gives its heat back through
    the night: decode ``weather`` from the states at each step after ``sunset``
    (``hiddenlens.task_memory``) to see how long a network keeps the day's weather.

    Parameters
    ----------
    n_sequences, n_steps : int
        Batch size B and length T (T must reach past the latest sunset).
    seed : int
        Seed of the private ``np.random.default_rng``.
    first_sunrise, last_sunrise : int
        Range (inclusive) of the first day's sunrise step.

    Returns
    -------
    WeatherDays
    """
    n_seq = check_count("n_sequences", n_sequences, 1, 96, "a positive integer")
    n_t = check_count("n_steps", n_steps, 1, 300, "a positive integer")
    seed = check_seed(seed)
    lo, hi = int(first_sunrise), int(last_sunrise)
    if not 0 <= lo <= hi:
        raise ValueError(f"first_sunrise={first_sunrise!r} and last_sunrise={last_sunrise!r} "
                         "must satisfy 0 <= first_sunrise <= last_sunrise; pass e.g. 5 and 25")
    if hi + _DAY // 2 >= n_t:
        raise ValueError(f"n_steps={n_t} ends before the latest sunset (step {hi + _DAY // 2});"
                         f" pass n_steps > {hi + _DAY // 2} or an earlier last_sunrise")
    rng = np.random.default_rng(seed)
    weather = rng.integers(len(WEATHER), size=n_seq)  # (B,)
    sunrise = rng.integers(lo, hi + 1, size=n_seq)  # (B,)
    steps = np.arange(n_t)[None, :]  # (1, T)
    # sin(2 pi (t - sunrise) / DAY) > 0 exactly on the steps sunrise + 1 .. sunrise + DAY/2 - 1
    daylight = np.clip(np.sin(2.0 * np.pi * (steps - sunrise[:, None]) / _DAY), 0.0, None)
    clouds = 0.7 + 0.3 * np.tanh(_smooth_noise(rng, (n_seq, n_t)))  # (B, T)
    level = np.asarray(_CLOUD_LEVEL)[weather][:, None]  # (B, 1)
    wobble = _CLOUD_WOBBLE * np.tanh(_smooth_noise(rng, (n_seq, n_t)))  # (B, T)
    first_day = (steps >= sunrise[:, None]) & (steps < sunrise[:, None] + _DAY // 2)  # (B, T)
    clouds = np.where(first_day, level + wobble, clouds)
    vent = 1.0 / (1.0 + np.exp(-1.5 * _smooth_noise(rng, (n_seq, n_t))))  # (B, T)
    heater = np.clip(_smooth_noise(rng, (n_seq, n_t)), 0.0, None)  # (B, T)
    # a calm first day: vent half open, heater off, so the weather is the day's only driver
    vent = np.where(first_day, _CALM_VENT, vent)
    heater = np.where(first_day, 0.0, heater)
    sun = daylight * clouds  # (B, T)
    inputs = np.stack([sun, vent, heater], axis=-1)  # (B, T, 3)
    targets = air_temperature(inputs)[..., None]  # (B, T, 1)
    sunset = sunrise + _DAY // 2
    lit = first_day & (daylight > 0)
    sunshine = (sun * lit).sum(axis=1) / lit.sum(axis=1)  # (B,)
    return WeatherDays(inputs.astype(np.float32), targets.astype(np.float32),
                       weather.astype(np.int64), sunshine, sunrise.astype(np.int64),
                       sunset.astype(np.int64))


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
