"""Leave a user's model exactly as it was, even when an analysis fails or is interrupted.

Most of hiddenlens never runs the user's module (it works on detached copies of the weights), but
analyses that must call the module itself wrap the call in :func:`preserved`.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator

import torch

__all__ = ["preserved"]

_HOOK_DICTS = (
    "_forward_hooks",
    "_forward_pre_hooks",
    "_backward_hooks",
    "_backward_pre_hooks",
    "_state_dict_hooks",
    "_load_state_dict_pre_hooks",
)


@contextlib.contextmanager
def preserved(model: torch.nn.Module | None, *, eval_mode: bool = True) -> Iterator[None]:
    """Restore training flags, ``requires_grad``, ``.grad``, hooks and torch's RNG on exit.

    Parameters
    ----------
    model : torch.nn.Module or None
        The user's module. ``None`` only guards torch's global RNG state.
    eval_mode : bool, default True
        Put the module in eval mode (dropout off) for the duration of the block.
    """
    rng = torch.get_rng_state()
    modules = list(model.modules()) if isinstance(model, torch.nn.Module) else []
    training = [m.training for m in modules]
    params = list(model.parameters()) if modules else []
    requires_grad = [p.requires_grad for p in params]
    grads = [p.grad for p in params]
    hooks = [
        {name: dict(getattr(m, name)) for name in _HOOK_DICTS if hasattr(m, name)}
        for m in modules
    ]
    try:
        if modules and eval_mode:
            model.eval()
        yield
    finally:
        for m, flag, saved in zip(modules, training, hooks):
            m.training = flag
            for name, content in saved.items():
                current = getattr(m, name)
                current.clear()
                current.update(content)
        for p, flag, grad in zip(params, requires_grad, grads):
            if p.requires_grad != flag:
                p.requires_grad_(flag)
            p.grad = grad
        torch.set_rng_state(rng)
