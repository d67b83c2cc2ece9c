"""Shared test fixtures: seeded generators and a check that a user's model was left as it was."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
import torch

os.environ.setdefault("MPLBACKEND", "Agg")  # no display in tests; matplotlib is not imported here


@pytest.fixture
def gen() -> torch.Generator:
    """A seeded torch generator (tests never touch torch's global RNG)."""
    return torch.Generator().manual_seed(0)


class ModelSnapshot:
    """Everything hiddenlens promises to leave alone on a module, captured for comparison."""

    def __init__(self, model: torch.nn.Module) -> None:
        self.model = model
        self.params = {n: p.detach().clone() for n, p in model.named_parameters()}
        self.param_ids = {n: id(p) for n, p in model.named_parameters()}
        self.buffers = {n: b.detach().clone() for n, b in model.named_buffers()}
        self.training = {n: m.training for n, m in model.named_modules()}
        self.requires_grad = {n: p.requires_grad for n, p in model.named_parameters()}
        self.grads = {n: (p.grad, None if p.grad is None else p.grad.clone())
                      for n, p in model.named_parameters()}
        self.hooks = {n: self._hooks(m) for n, m in model.named_modules()}
        self.param_hooks = {n: dict(p._backward_hooks or {})
                            for n, p in model.named_parameters()}
        self.rng = torch.get_rng_state()

    @staticmethod
    def _hooks(m: torch.nn.Module) -> dict:
        return {k: dict(v) for k, v in vars(m).items() if "hook" in k and isinstance(v, dict)}

    def assert_unchanged(self) -> None:
        m = self.model
        params = dict(m.named_parameters())
        assert params.keys() == self.params.keys()
        for n, p in params.items():
            assert id(p) == self.param_ids[n], f"parameter {n} was replaced"
            # bitwise: compare the raw bytes, not values (NaN-safe, -0.0-safe)
            assert p.dtype == self.params[n].dtype
            assert torch.equal(p.detach().view(torch.uint8) if p.dim() else p.detach(),
                               self.params[n].view(torch.uint8) if p.dim() else self.params[n])
            assert p.requires_grad == self.requires_grad[n], f"{n}.requires_grad changed"
            grad, value = self.grads[n]
            assert p.grad is grad, f"{n}.grad was replaced"
            if grad is not None:
                assert torch.equal(p.grad, value), f"{n}.grad values changed"
            assert dict(p._backward_hooks or {}) == self.param_hooks[n]
        for n, b in m.named_buffers():
            assert torch.equal(b, self.buffers[n]), f"buffer {n} changed"
        assert {n: x.training for n, x in m.named_modules()} == self.training
        assert {n: self._hooks(x) for n, x in m.named_modules()} == self.hooks
        assert torch.equal(torch.get_rng_state(), self.rng), "torch's global RNG state changed"


@pytest.fixture
def snapshot():
    """``snapshot(model)`` captures a model; call ``.assert_unchanged()`` on the result later."""
    return ModelSnapshot


def build(cls: type, *args, gen: torch.Generator, scale: float | None = None, **kwargs):
    """Construct a torch module without touching the global RNG; weights drawn from ``gen``.

    Weights are uniform in [-scale, scale] (default 1/sqrt(hidden_size), torch's own range).
    """
    with torch.random.fork_rng(devices=[]):
        module = cls(*args, **kwargs)
    if scale is None:
        scale = 1.0 / max(getattr(module, "hidden_size", 1), 1) ** 0.5
    with torch.no_grad():
        for p in module.parameters():
            if p.device.type != "meta":
                p.copy_((torch.rand(p.shape, generator=gen, dtype=p.dtype) * 2 - 1) * scale)
    return module


@pytest.fixture
def make():
    """``make(nn.GRU, 3, 5, gen=gen, ...)``: a module built with ``build``."""
    return build


def gaussian_module(cls: type, n_in: int, hidden: int, *, seed: int = 0, std: float = 0.5,
                    **kwargs):
    """A batch-first recurrent module with N(0, std^2) weights from a private generator.

    Built on the meta device and filled in place, so torch's global RNG is never used.
    """
    m = cls(n_in, hidden, batch_first=True, device="meta", **kwargs).to_empty(device="cpu")
    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for p in m.parameters():
            p.copy_(torch.randn(p.shape, generator=gen) * std)
    return m


def gaussian_inputs(shape: tuple[int, ...], seed: int = 0) -> np.ndarray:
    """Standard normal inputs of ``shape`` (B, T, I), float32, from a private numpy generator."""
    return np.random.default_rng(seed).standard_normal(shape).astype(np.float32)


def cue_sequences(B: int, T: int, last_onset: int, seed: int = 0
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Noisy one-channel sequences (B, T, 1) with a cue of class 0, 1 or 2 (amplitude -2, 0, +2)
    at a random onset before ``last_onset``: the inputs, the classes (B,) and the onsets (B,)."""
    rng = np.random.default_rng(seed)
    cls = rng.integers(3, size=B)
    on = rng.integers(0, last_onset, size=B)
    x = 0.3 * rng.standard_normal((B, T, 1))
    x[np.arange(B), on, 0] += (cls - 1) * 2.0
    return x, cls, on


def heavy_modules_after(imports: str, heavy: tuple[str, ...]) -> str:
    """Which of ``heavy`` a fresh interpreter holds after ``import <imports>``, as the printed
    sorted list (``"[]"`` when none)."""
    code = (f"import sys, {imports}; "
            f"print(sorted(m for m in {heavy!r} if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return out.stdout.strip()


def interrupted_after(n_calls: int, step):
    """A step function s, x -> ``step(s, x)`` that raises KeyboardInterrupt (a user's Ctrl-C)
    on every call after ``n_calls``."""
    calls = {"n": 0}

    def interrupted(s, x):
        calls["n"] += 1
        if calls["n"] > n_calls:
            raise KeyboardInterrupt
        return step(s, x)

    return interrupted
