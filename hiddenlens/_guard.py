"""Leave a user's model exactly as it was, even when an analysis fails or is interrupted.

Most of hiddenlens never runs the user's module (it works on detached copies of the weights), but
analyses that must call the module itself wrap the call in :func:`preserved`.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator

import torch

__all__ = ["preserved"]

# tensor-level hook tables (``Tensor.register_hook``, ``register_post_accumulate_grad_hook``)
_TENSOR_HOOKS = ("_backward_hooks", "_post_accumulate_grad_hooks")


def _hook_tables(obj: object, names: tuple[str, ...] | None = None) -> dict[str, dict]:
    """Copies of the hook dictionaries of a module (every ``*hooks*`` dict) or a tensor."""
    if names is None:
        names = tuple(k for k, v in vars(obj).items() if "hook" in k and isinstance(v, dict))
    out = {}
    for name in names:
        table = getattr(obj, name, None)
        if isinstance(table, dict):
            out[name] = dict(table)
    return out


def _restore_tables(obj: object, saved: dict[str, dict], names: tuple[str, ...] | None) -> None:
    if names is None:
        names = tuple(k for k, v in vars(obj).items() if "hook" in k and isinstance(v, dict))
    for name in names:
        table = getattr(obj, name, None)
        if isinstance(table, dict):
            # update the same dict object in place: torch's C++ side may hold a reference to it
            table.clear()
            table.update(saved.get(name, {}))


@contextlib.contextmanager
def preserved(model: torch.nn.Module | None, *, eval_mode: bool = True) -> Iterator[None]:
    """Restore training flags, ``requires_grad``, ``.grad``, buffers, hooks and torch's RNG on exit.

    The restore runs however the block ends: normally, by an exception or by
    ``KeyboardInterrupt``.

    Parameters
    ----------
    model : torch.nn.Module or None
        The user's module. ``None`` only guards torch's global RNG state.
    eval_mode : bool, default True
        Put the module in eval mode (dropout off) for the duration of the block.

    Notes
    -----
    ``.grad`` tensors are restored as the same objects with their saved values (a backward pass
    accumulates into an existing ``.grad`` in place). Buffers (e.g. batch-norm running
    statistics) get their saved values back. Parameter values are not copied: code inside the
    block may read and differentiate the parameters but must not assign to them.
    """
    rng = torch.get_rng_state()
    modules = list(model.modules()) if isinstance(model, torch.nn.Module) else []
    training = [m.training for m in modules]
    module_hooks = [_hook_tables(m) for m in modules]
    params = list(model.parameters()) if modules else []
    requires_grad = [p.requires_grad for p in params]
    grads = [(p.grad, None if p.grad is None else p.grad.detach().clone()) for p in params]
    param_hooks = [_hook_tables(p, _TENSOR_HOOKS) for p in params]
    buffers = list(model.buffers()) if modules else []
    buffer_values = [b.detach().clone() for b in buffers]
    try:
        if modules and eval_mode:
            model.eval()
        yield
    finally:
        for m, flag, saved in zip(modules, training, module_hooks, strict=True):
            m.training = flag
            _restore_tables(m, saved, None)
        with torch.no_grad():
            state = zip(params, requires_grad, grads, param_hooks, strict=True)
            for p, flag, (grad, value), saved in state:
                if p.requires_grad != flag:
                    p.requires_grad_(flag)
                if grad is not None and grad.shape == value.shape:
                    grad.copy_(value)
                p.grad = grad
                _restore_tables(p, saved, _TENSOR_HOOKS)
            for b, value in zip(buffers, buffer_values, strict=True):
                if b.shape == value.shape:
                    b.copy_(value)
        torch.set_rng_state(rng)
