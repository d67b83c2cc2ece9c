"""Per-thread torch thread counts for the calling thread only, restored afterwards.

Splitting microseconds of work across threads costs more than it saves, and on a loaded machine
a thread waiting for a busy core turns each small product into milliseconds (measured on a shared
2-core machine: 18 ms instead of 0.2 ms per batched 64 x 64 product with 2 threads).

``torch.set_num_threads`` is process-wide: it also sets the count that every thread started later
inherits, so calling it from a library (or from a widget's worker thread) changes what the
user's own threads see. With torch's OpenMP backend the count torch uses in a thread is that
thread's OpenMP ``nthreads-var`` (``omp_get_max_threads``), which ``omp_set_num_threads`` sets
for the calling thread only (OpenMP 4.5 specification, section 3.2.1). So :func:`num_threads`
calls ``omp_set_num_threads`` of the OpenMP runtime torch loaded, through ctypes, and gives the
previous value back on exit; no other thread, and no thread started later, sees a change. Where
no such runtime is found (another parallel backend), the blocks run at the current count.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import threading
from collections.abc import Iterator
from typing import Any

import torch

__all__ = ["single_thread", "single_thread_below", "num_threads", "parallel_map",
           "per_thread_available", "usable_cores"]

_LOCK = threading.Lock()
_OMP: Any = None
_SEARCHED = False


def _omp() -> Any:
    """The OpenMP runtime torch runs on (its ``omp_set_num_threads``), or None."""
    global _OMP, _SEARCHED
    with _LOCK:
        if _SEARCHED:
            return _OMP
        _SEARCHED = True
        if "OpenMP" not in torch.__config__.parallel_info().split("backend:")[-1]:
            return None
        candidates = []
        try:
            with open("/proc/self/maps") as maps:
                for line in maps:
                    path = line.split()[-1]
                    name = path.rsplit("/", 1)[-1]
                    if name.startswith(("libgomp", "libiomp", "libomp")) and path not in candidates:
                        candidates.append(path)
        except OSError:
            pass
        # other packages load their own copies (scikit-learn and scipy vendor libgomp): try
        # torch's own first, and keep a runtime only if setting it changes torch's count
        here = os.path.dirname(torch.__file__)
        candidates.sort(key=lambda p: not p.startswith(here))
        torch.get_num_threads()  # let torch's lazy per-thread initialisation run first
        for path in candidates:
            try:
                lib = ctypes.CDLL(path)  # the already loaded library: same handle
                lib.omp_set_num_threads.argtypes = [ctypes.c_int]
                lib.omp_get_max_threads.restype = ctypes.c_int
            except (OSError, AttributeError):
                continue
            before = int(lib.omp_get_max_threads())
            if before != torch.get_num_threads():
                continue
            probe = before + 1
            lib.omp_set_num_threads(probe)
            try:
                drives_torch = torch.get_num_threads() == probe
            finally:
                lib.omp_set_num_threads(before)
            if drives_torch:
                _OMP = lib
                break
        return _OMP


def per_thread_available() -> bool:
    """True when thread counts can be set for one thread only (torch on OpenMP)."""
    return _omp() is not None


@contextlib.contextmanager
def num_threads(n: int | None) -> Iterator[None]:
    """Let the calling thread use ``n`` torch threads inside the block (None: leave as is).

    Only the calling thread changes; the previous count is given back however the block ends.
    Without a per-thread runtime the block runs at the current count (the result is the same
    within the documented thread-count tolerance; only the speed differs).
    """
    lib = _omp() if n is not None else None
    if lib is None:
        yield
        return
    # torch sets a thread's count lazily on its first parallel call in that thread (from the
    # process-wide value of torch.set_num_threads); trigger that first so it cannot undo ours
    torch.get_num_threads()
    before = int(lib.omp_get_max_threads())
    if before == n:
        yield
        return
    lib.omp_set_num_threads(int(n))
    try:
        yield
    finally:
        lib.omp_set_num_threads(before)


def single_thread(when: bool = True) -> contextlib.AbstractContextManager[None]:
    """Use one torch thread in the calling thread inside the block when ``when`` is true."""
    return num_threads(1 if when else None)



# ---------------------------------------------------------------------- batches on worker threads
# NOTE: [Independent batches on worker threads]
# LAPACK on one small matrix cannot use a second core (torch's batched eigvalsh and svdvals
# loop over the batch calling LAPACK once per matrix, and numpy does the same), and inner BLAS
# threads on such sizes cost more than they give (see the module docstring). Independent pieces
# of a batch can: each worker thread runs whole pieces with one torch thread of its own, so
# every core does useful work and none waits for another inside a kernel. Pieces are handed out
# one at a time, so a worker slowed by a busy core takes fewer of them. Only the workers' own
# thread counts are set (per thread, as above); the caller's thread is untouched.
_POOLS: dict[int, Any] = {}
_WORKER_PREFIX = "hiddenlens-batch"


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity), at least 1."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # pragma: no cover - platforms without affinity
        return max(1, os.cpu_count() or 1)


def _pool(workers: int) -> Any:
    from concurrent.futures import ThreadPoolExecutor

    with _LOCK:
        pool = _POOLS.get(workers)
        if pool is None:
            pool = _POOLS[workers] = ThreadPoolExecutor(
                workers, thread_name_prefix=_WORKER_PREFIX)
        return pool


def _one_thread(fn: Any, item: Any) -> Any:
    with single_thread():
        return fn(item)


def parallel_map(fn: Any, items: Any, workers: int, *, done: Any = None) -> list[Any]:
    """``[fn(item) for item in items]`` on ``workers`` threads with one torch thread each.

    ``done(i)`` runs in the calling thread after item ``i`` finished (in completion order).
    With one worker (or one item) everything runs in the calling thread, on one torch thread.
    If the caller is interrupted (Ctrl-C) items not yet started are cancelled; those running
    finish on their own and their results are dropped. See NOTE: [Independent batches on
    worker threads].
    """
    items = list(items)
    nested = threading.current_thread().name.startswith(_WORKER_PREFIX)
    if workers <= 1 or len(items) <= 1 or nested:  # a worker never waits on its own pool
        out = []
        for i, item in enumerate(items):
            out.append(_one_thread(fn, item))
            if done is not None:
                done(i)
        return out
    from concurrent.futures import FIRST_COMPLETED, wait

    pool = _pool(int(workers))
    futures = {pool.submit(_one_thread, fn, item): i for i, item in enumerate(items)}
    results: list[Any] = [None] * len(items)
    pending = set(futures)
    try:
        while pending:
            finished, pending = wait(pending, return_when=FIRST_COMPLETED)
            for f in finished:
                results[futures[f]] = f.result()
                if done is not None:
                    done(futures[f])
    except BaseException:
        for f in pending:
            f.cancel()
        raise
    return results


def single_thread_below(step_flops: float, threshold: float
                        ) -> contextlib.AbstractContextManager[None]:
    """One torch thread in the calling thread for per-step work below ``threshold`` flops.

    Each analysis passes its own measured threshold (a module constant, read at each call).
    """
    return single_thread(step_flops < threshold)
