"""Per-step Jacobians of a recurrent system: d s_t / d s_{t-1} and d s_t / d x_t.

This module is the one place that computes step Jacobians; every analysis that needs them
(spectra, gradient flow, Lyapunov exponents, fixed-point stability, input sensitivity) calls it.
"""

from __future__ import annotations

import torch
from torch.func import jacrev, vmap

from ._systems import RecurrentSystem

__all__ = ["step_jacobians", "input_jacobians"]


def _per_sample(system: RecurrentSystem):
    # the step works on batches (B, S); give it a batch of one so any step function fits vmap
    def f(s: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
        return system.step(s.unsqueeze(0), x.unsqueeze(0)).squeeze(0)

    return f


def step_jacobians(system: RecurrentSystem, prev: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    """State Jacobians J = dF/ds at states ``prev`` (N, S) with inputs ``x`` (N, I): (N, S, S)."""
    return vmap(jacrev(_per_sample(system), argnums=0))(prev, x)


def input_jacobians(system: RecurrentSystem, prev: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    """Input Jacobians dF/dx at states ``prev`` (N, S) with inputs ``x`` (N, I): (N, S, I)."""
    return vmap(jacrev(_per_sample(system), argnums=1))(prev, x)
