"""Torch errors raised inside a user's step function, translated into what the function must avoid.

Analyses differentiate and batch the step with torch.func (``vmap``, ``jacrev``, ``jvp``); some
ordinary Python in a step function cannot pass through them. :func:`step_errors` wraps those
calls and re-raises the raw torch error as a TypeError that names the cause and the fix.
"""

from __future__ import annotations

import contextlib
import inspect
from collections.abc import Callable, Iterator
from typing import Any

__all__ = ["step_errors", "state_only"]

# (text in torch's message, what the step function did, how to fix it)
_CAUSES = (
    ("derivative for", "uses an operation with no derivative",
     "replace it by a differentiable one (e.g. torch.sigmoid(k * s) for a step, "
     "torch.div(..., rounding_mode=None) for //); Jacobians need derivatives"),
    ("data-dependent control flow", "uses a tensor's value in Python (an `if` or `while` on a "
     "tensor, .item(), float() or int())",
     "write the branch with torch.where(condition, a, b) and keep values as tensors"),
    (".item()", "uses a tensor's value in Python (an `if` or `while` on a tensor, .item(), "
     "float() or int())",
     "write the branch with torch.where(condition, a, b) and keep values as tensors"),
    ("numpy()", "converts tensors to numpy",
     "compute with torch operations only (torch.tanh instead of np.tanh, ...)"),
    ("__array__", "converts tensors to numpy",
     "compute with torch operations only (torch.tanh instead of np.tanh, ...)"),
    ("inplace", "modifies a tensor in place",
     "return a new tensor (s = s * a instead of s *= a)"),
    ("in-place", "modifies a tensor in place",
     "return a new tensor (s = s * a instead of s *= a)"),
)


@contextlib.contextmanager
def step_errors(system: Any) -> Iterator[None]:
    """Re-raise torch's errors from inside a step function as a TypeError saying what to avoid.

    Only step-function systems (``system.kind == "callable"``) are translated; errors of
    module-backed systems pass unchanged.
    """
    try:
        yield
    except RuntimeError as err:
        if getattr(system, "kind", None) != "callable":
            raise
        text = str(err)
        if "randomness" in text or "random operation" in text:
            from .systems import random_step_message

            # the same words as record's refusal (hiddenlens._core.systems.refuse_random_steps)
            raise TypeError(random_step_message(system.source)) from None
        for needle, did, fix in _CAUSES:
            if needle in text:
                first = text.strip().splitlines()[0][:160]
                raise TypeError(
                    f"the step function of {system.source} {did}, which the analysis cannot "
                    f"differentiate or batch; {fix}. (torch said: {first})") from None
        raise


def state_only(fn: Callable[..., Any]) -> Callable[..., Any] | None:
    """``fn`` as ``fn(s, x)`` when it takes the state alone (an autonomous map), else None."""
    try:
        params = list(inspect.signature(fn).parameters.values())
    except (TypeError, ValueError):
        return None
    positional = [p for p in params if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)
                  and p.default is p.empty]
    if len(positional) != 1 or any(p.kind == p.VAR_POSITIONAL for p in params):
        return None

    def step(s, x):
        return fn(s)

    step.__name__ = getattr(fn, "__name__", type(fn).__name__)
    return step
