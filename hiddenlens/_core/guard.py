"""Never touch the user's objects: private frozen copies, and grad mode given back per thread.

hiddenlens works on copies. Module-backed systems copy the recurrent weights when wrapped; a step
function that is an ``nn.Module`` is run as a private copy (:func:`private_copy`): a deep copy
in eval mode with ``requires_grad`` off, so the user's module, its training flags, parameters,
``.grad``, buffers and hooks are never read-modified-written, and two analyses running at once
in different threads never meet on shared state. Random draws come only from local generators
(``hiddenlens._core.options.torch_generator``); torch's global RNG is neither used nor saved and
restored, so a user drawing random numbers in another thread keeps an untouched stream.

Hooks: the copy keeps the hooks registered on the user's module (``copy.deepcopy`` copies the
hook tables, the hook functions themselves are shared), because they are part of the function the
module computes. A hook that records into a user list will see the copy's calls; a hook that
should not run during analysis is best removed before wrapping.

Grad mode is thread-local in torch; analyses change it only through context managers, and
:func:`grad_restored` gives the calling thread's grad mode back even when a second Ctrl-C lands
while the first is being handled.
"""

from __future__ import annotations

import contextlib
import copy
from collections.abc import Iterator

import torch

__all__ = ["private_copy", "grad_restored"]


def private_copy(module: torch.nn.Module) -> torch.nn.Module:
    """A frozen private copy of ``module``: deep copy, eval mode, ``requires_grad`` off.

    The user's module is only read. ``.grad`` tensors are not carried over (the copy never
    accumulates gradients into the parameters).

    Raises
    ------
    TypeError
        When the module cannot be deep-copied (it holds a lock, a file or similar); wrap a plain
        function that calls a copy you made, e.g. ``wrap(lambda s, x: my_copy(s, x), ...)``.
    """
    try:
        work = copy.deepcopy(module)
    except Exception as err:  # deepcopy raises TypeError, RuntimeError, pickling errors...
        raise TypeError(
            f"hiddenlens runs a step module as a private copy so that yours is never changed, "
            f"but {type(module).__name__} cannot be copied ({type(err).__name__}: {err}); make "
            "it copyable with copy.deepcopy, or wrap a plain function of (state, x)"
        ) from None
    work.eval()
    for p in work.parameters():
        p.requires_grad_(False)
        p.grad = None
    return work


@contextlib.contextmanager
def grad_restored() -> Iterator[None]:
    """Give the calling thread's grad mode back on exit, however the block ends.

    A ``KeyboardInterrupt`` that arrives while the mode is being restored is held until the
    mode is back, then raised.
    """
    before = torch.is_grad_enabled()
    try:
        yield
    finally:
        pending: BaseException | None = None
        while True:
            try:
                torch.set_grad_enabled(before)  # sets the calling thread's mode only
                break
            except KeyboardInterrupt as interrupt:  # pragma: no cover - timing dependent
                pending = interrupt
        if pending is not None:  # pragma: no cover - timing dependent
            raise pending
