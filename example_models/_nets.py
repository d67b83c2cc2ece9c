"""Shared skeleton of the example models: one recurrent layer followed by a linear readout,
and the argument checks of the task generators.

Parameters are initialised from a private ``torch.Generator`` so that building a model never
draws from torch's global random stream.
"""

from __future__ import annotations

import math

import numpy as np
import torch
from torch import nn

CELLS: dict[str, type[nn.RNNBase]] = {"rnn": nn.RNN, "gru": nn.GRU, "lstm": nn.LSTM}

# Gate blocks stacked in weight_hh_l0, in PyTorch's documented order.
GATE_NAMES: dict[str, tuple[str, ...]] = {
    "rnn": ("h",),
    "gru": ("r", "z", "n"),
    "lstm": ("i", "f", "g", "o"),
}



def check_count(name: str, value: object, minimum: int, example: int,
                expected: str | None = None) -> int:
    """``value`` as an int >= ``minimum``; refused as not ``expected`` (default "an integer >=
    minimum") with an example."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ValueError(f"{name}={value!r} is not {expected or f'an integer >= {minimum}'}; "
                         f"pass e.g. {name}={example}")
    return int(value)


def check_seed(seed: object) -> int:
    """A generator seed: an int >= 0."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise TypeError(f"seed={seed!r} is not a non-negative integer; pass e.g. seed=0")
    return int(seed)

class RecurrentReadout(nn.Module):
    """One batch-first recurrent layer (``self.rnn``) and a linear readout (``self.readout``).

    Parameters
    ----------
    n_inputs, n_outputs : int
        Input channels I and output channels per step.
    cell : {"rnn", "gru", "lstm"}
        Recurrent layer type; ``"rnn"`` is a tanh ``nn.RNN``.
    hidden_size : int
        State size S (for the LSTM, the size of h and of c).
    gain : float
        Every recurrent block of ``weight_hh_l0`` (one per gate) starts as ``gain`` times a
        random orthogonal matrix, so each block starts with all singular values and all
        eigenvalue moduli equal to ``gain``: spectral radius exactly ``gain``.
    input_std : float
        Input weights are drawn from N(0, input_std**2).
    seed : int
        Seed of the private generator used for initialisation.

    Notes
    -----
    Readout weights are drawn from N(0, 1 / S). All biases start at zero except the LSTM
    forget gate bias, which starts at 1 (common practice).
    """

    def __init__(
        self,
        n_inputs: int,
        n_outputs: int,
        *,
        cell: str,
        hidden_size: int,
        gain: float,
        input_std: float,
        seed: int,
    ) -> None:
        super().__init__()
        if cell not in CELLS:
            raise ValueError(
                f"cell={cell!r} is not a known recurrent layer; expected one of "
                f"{sorted(CELLS)}; pass e.g. cell='gru'"
            )
        if isinstance(hidden_size, bool) or not isinstance(hidden_size, int) or hidden_size < 1:
            raise ValueError(
                f"hidden_size={hidden_size!r} is not a positive integer; pass e.g. hidden_size=32"
            )
        if not isinstance(gain, (int, float)) or not math.isfinite(gain) or gain <= 0:
            raise ValueError(f"gain={gain!r} is not a finite positive number; pass e.g. gain=1.0")
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
            raise TypeError(f"seed={seed!r} is not an integer; pass e.g. seed=0")
        self.cell = cell
        kwargs = {"nonlinearity": "tanh"} if cell == "rnn" else {}
        # Built on the meta device and then materialised: the default initialisers would
        # otherwise draw from torch's global random stream.
        self.rnn = CELLS[cell](n_inputs, hidden_size, batch_first=True, device="meta", **kwargs)
        self.readout = nn.Linear(hidden_size, n_outputs, device="meta")
        self.to_empty(device="cpu")
        self._initialise(float(gain), float(input_std), int(seed))

    @torch.no_grad()
    def _initialise(self, gain: float, input_std: float, seed: int) -> None:
        gen = torch.Generator().manual_seed(seed)
        n_in, size = self.rnn.input_size, self.rnn.hidden_size
        n_gates = len(GATE_NAMES[self.cell])
        w_ih = torch.randn(n_gates * size, n_in, generator=gen) * input_std
        w_hh = torch.cat([gain * _random_orthogonal(size, gen) for _ in range(n_gates)])
        self.rnn.weight_ih_l0.copy_(w_ih)
        self.rnn.weight_hh_l0.copy_(w_hh)
        self.rnn.bias_ih_l0.zero_()
        self.rnn.bias_hh_l0.zero_()
        if self.cell == "lstm":
            self.rnn.bias_ih_l0[size : 2 * size] = 1.0  # forget gate
        n_out = self.readout.out_features
        self.readout.weight.copy_(torch.randn(n_out, size, generator=gen) / math.sqrt(size))
        self.readout.bias.zero_()

    def _check_inputs(self, x: torch.Tensor) -> None:
        name = type(self).__name__
        n_in = self.rnn.input_size
        if not isinstance(x, torch.Tensor):
            raise TypeError(
                f"{name} takes a torch.Tensor but got {type(x).__name__}; "
                f"pass torch.as_tensor(inputs) of shape (B, T, {n_in})"
            )
        if x.ndim not in (2, 3) or x.shape[-1] != n_in:
            raise ValueError(
                f"inputs has shape {tuple(x.shape)} but {name} expects (B, T, {n_in}) "
                f"or (T, {n_in}); pass inputs with {n_in} channels on the last axis"
            )
        dtype = self.rnn.weight_hh_l0.dtype
        if x.dtype != dtype:
            raise TypeError(
                f"inputs have dtype {x.dtype} but {name} has {dtype} parameters; "
                f"pass inputs.to({dtype})"
            )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Map inputs (B, T, I) to per-step outputs (B, T, n_out); (T, I) -> (T, n_out)."""
        self._check_inputs(x)
        states, _ = self.rnn(x)  # (B, T, S)
        return self.readout(states)  # (B, T, n_out)


def _random_orthogonal(size: int, gen: torch.Generator) -> torch.Tensor:
    """Haar-distributed orthogonal matrix: QR of a Gaussian matrix with the signs of R's
    diagonal moved into Q (Mezzadri 2007, "How to generate random matrices from the classical
    compact groups")."""
    q, r = torch.linalg.qr(torch.randn(size, size, generator=gen, dtype=torch.float64))
    return (q * torch.sign(torch.diagonal(r))).to(torch.float32)  # (S, S)


def recurrent_spectral_radii(model: RecurrentReadout) -> dict[str, float]:
    """Spectral radius of each gate block of ``weight_hh_l0``, keyed by gate name.

    For a tanh RNN the single key is ``"h"``. For gated cells the blocks are listed in
    PyTorch's order (GRU: r, z, n; LSTM: i, f, g, o).
    """
    w_hh = model.rnn.weight_hh_l0.detach().to(torch.float64).numpy()
    size = model.rnn.hidden_size
    radii = {}
    for k, gate in enumerate(GATE_NAMES[model.cell]):
        block = w_hh[k * size : (k + 1) * size]  # (S, S)
        radii[gate] = float(np.max(np.abs(np.linalg.eigvals(block))))
    return radii
