"""Run analyses off the notebook's main thread, with progress, cancelling and a result cache.

A :class:`Runner` owns one worker thread (a ``concurrent.futures`` pool of one) or none at all
(``background=False``: everything runs inline, which tests use). A job is a list of steps; the
runner counts finished steps for the progress bar, checks for a cancel between steps and, for
a running step, stops it at the next Python bytecode by raising :class:`Stopped` in the worker
(NOTE: [Stopping a running step]).
"""

from __future__ import annotations

import ctypes
import threading
import time
from collections.abc import Callable, Hashable, Sequence
from concurrent.futures import Executor, Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

__all__ = ["Cache", "Job", "Runner", "Step", "Stopped"]

# NOTE: [Stopping a running step]
# A cancel must free the notebook at once, and should also free the CPU. Python offers no way
# to kill a thread, but CPython can schedule an exception in another thread
# (PyThreadState_SetAsyncExc); it surfaces at the thread's next bytecode, i.e. between torch
# calls, exactly like a Ctrl-C surfaces in the main thread. Analyses already leave the model
# and their data consistent under KeyboardInterrupt, so Stopped derives from it. The exception
# is only ever scheduled while the step's function is on the stack (guarded by a lock), at
# most once per job, and any still-pending one is withdrawn when the step returns, so it can
# never hit the pool's own bookkeeping.


class Stopped(KeyboardInterrupt):
    """Raised inside a worker when its job was cancelled."""


def _raise_in(thread_id: int, exc: type[BaseException] | None) -> None:
    ctypes.pythonapi.PyThreadState_SetAsyncExc(
        ctypes.c_ulong(thread_id), None if exc is None else ctypes.py_object(exc))


class Cache:
    """A thread-safe mapping from option keys to results, counting computations per name."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._data: dict[Hashable, Any] = {}
        self.computed: dict[str, int] = {}

    def __contains__(self, key: Hashable) -> bool:
        with self._lock:
            return key in self._data

    def get(self, key: Hashable, default: Any = None) -> Any:
        with self._lock:
            return self._data.get(key, default)

    def put(self, key: Hashable, value: Any, name: str) -> None:
        with self._lock:
            self._data[key] = value
            self.computed[name] = self.computed.get(name, 0) + 1

    def clear(self) -> None:
        with self._lock:
            self._data.clear()

    def __len__(self) -> int:
        with self._lock:
            return len(self._data)


@dataclass(eq=False)
class Step:
    """One unit of work: ``fn()`` computes a value stored in the cache under ``key``."""

    key: Hashable
    name: str
    label: str
    fn: Callable[[], Any]


@dataclass(eq=False)
class Job:
    """Steps run in order; ``on_done(job)`` runs in the worker when all steps finished."""

    steps: Sequence[Step]
    on_done: Callable[[Job], None]
    on_error: Callable[[Job, BaseException], None]
    cancelled: bool = False
    finished: int = 0
    current: str = ""
    future: Future | None = None
    started: float = field(default_factory=time.monotonic)
    _thread: int | None = None
    _running: bool = False
    _stop_sent: bool = False


class Runner:
    """Execute jobs in one background thread (or inline) and report progress.

    Parameters
    ----------
    cache : Cache
        Where finished steps are stored; a step whose key is already there is skipped.
    background : bool
        False runs every job inline in the calling thread (for tests and scripts).
    executor : concurrent.futures.Executor, optional
        Use this executor instead of a private one-thread pool.
    on_progress : callable, optional
        ``on_progress(runner)`` after every change of state (from any thread).
    """

    def __init__(self, cache: Cache, *, background: bool = True, executor: Executor | None = None,
                 on_progress: Callable[[Runner], None] | None = None) -> None:
        self.cache = cache
        self.background = background or executor is not None
        self._own_pool = executor is None and background
        self._executor = executor
        self._lock = threading.Lock()
        self._jobs: list[Job] = []
        self._idle = threading.Event()
        self._idle.set()
        self.on_progress = on_progress or (lambda runner: None)
        self._ticker: threading.Thread | None = None

    # ------------------------------------------------------------------ state
    @property
    def busy(self) -> bool:
        with self._lock:
            return bool(self._jobs)

    def progress(self) -> tuple[int, int, str, float]:
        """(steps finished, steps queued, label of the running step, seconds since start)."""
        with self._lock:
            jobs = list(self._jobs)
        if not jobs:
            return 0, 0, "", 0.0
        done = sum(j.finished for j in jobs)
        total = sum(len(j.steps) for j in jobs)
        label = next((j.current for j in jobs if j.current), "")
        return done, total, label, time.monotonic() - min(j.started for j in jobs)

    def pending_keys(self) -> set[Hashable]:
        """Keys of steps queued or running in jobs that are not cancelled."""
        with self._lock:
            return {s.key for j in self._jobs if not j.cancelled for s in j.steps[j.finished:]}

    def wait(self, timeout: float | None = None) -> bool:
        """Block until no job is queued or running; False if ``timeout`` passed first."""
        return self._idle.wait(timeout)

    # ------------------------------------------------------------------ submit / cancel
    def submit(self, steps: Sequence[Step], on_done: Callable[[Job], None],
               on_error: Callable[[Job, BaseException], None]) -> Job:
        """Queue ``steps``; returns the job (already finished when not in the background)."""
        job = Job(list(steps), on_done, on_error)
        with self._lock:
            self._jobs.append(job)
            self._idle.clear()
        self.on_progress(self)
        if not self.background:
            self._execute(job)
            return job
        if self._executor is None:
            self._executor = ThreadPoolExecutor(1, thread_name_prefix="hiddenlens-widget")
        job.future = self._executor.submit(self._execute, job)
        self._start_ticker()
        return job

    def cancel_all(self) -> int:
        """Cancel every queued or running job; returns how many were cancelled."""
        with self._lock:
            jobs = [j for j in self._jobs if not j.cancelled]
            for job in jobs:
                job.cancelled = True
                if job.future is not None:
                    job.future.cancel()
                if job._running and not job._stop_sent:
                    job._stop_sent = True
                    _raise_in(job._thread, Stopped)
        for job in jobs:
            if job.future is not None and job.future.cancelled():
                self._forget(job)
        self.on_progress(self)
        return len(jobs)

    def shutdown(self) -> None:
        """Cancel everything and release the private worker thread."""
        self.cancel_all()
        if self._own_pool and self._executor is not None:
            self._executor.shutdown(wait=False, cancel_futures=True)
            self._executor = None

    # ------------------------------------------------------------------ worker side
    def _execute(self, job: Job) -> None:
        try:
            for step in job.steps:
                if job.cancelled:
                    return
                job.current = step.label
                self.on_progress(self)
                if step.key not in self.cache:
                    value = self._call(job, step.fn)
                    if value is _STOPPED:
                        return
                    self.cache.put(step.key, value, step.name)
                job.finished += 1
            job.current = ""
            if not job.cancelled:
                job.on_done(job)
        except Exception as exc:  # shown in the widget by on_error, never lost
            if not job.cancelled:
                job.on_error(job, exc)
        finally:
            self._forget(job)
            self.on_progress(self)

    def _call(self, job: Job, fn: Callable[[], Any]) -> Any:
        tid = threading.get_ident()
        try:
            try:
                with self._lock:
                    if job.cancelled:
                        return _STOPPED
                    job._thread, job._running = tid, self.background
                return fn()
            finally:
                with self._lock:
                    job._running = False
                    if job._stop_sent:
                        _raise_in(tid, None)  # withdraw a stop that has not surfaced yet
        except Stopped:
            return _STOPPED

    def _forget(self, job: Job) -> None:
        with self._lock:
            if job in self._jobs:
                self._jobs.remove(job)
            if not self._jobs:
                self._idle.set()

    def _start_ticker(self) -> None:
        # refreshes the elapsed-time label twice a second while anything runs
        with self._lock:
            if self._ticker is not None:
                return
            self._ticker = threading.Thread(target=self._tick, daemon=True,
                                            name="hiddenlens-widget-progress")
            self._ticker.start()

    def _tick(self) -> None:
        while True:
            time.sleep(0.5)
            with self._lock:
                if not self._jobs:
                    self._ticker = None
                    return
            try:
                self.on_progress(self)
            except Exception:  # a closed widget must not end the ticker noisily
                with self._lock:
                    self._ticker = None
                return


_STOPPED = object()
