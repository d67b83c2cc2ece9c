"""The option vocabulary of the analyses, declared as data and checked in one place.

Each analysis names its options and their constraints in :data:`CONSTRAINTS`; one call to
:func:`check_options` at the top of the analysis refuses a bad value with one message form::

    The 'seed' option of lyapunov_spectrum must be an int >= 0 or a numpy.random.Generator;
    got -1.

Because the constraints are data, the contract tests generate bad values from them.
The vocabulary (the same name means the same thing in every analysis):

- ``seed``: an int >= 0 or a ``numpy.random.Generator``; every random draw of an analysis comes
  from a local generator seeded by it (see :func:`torch_generator` and :func:`numpy_rng`).
- ``progress``: ``None`` (a bar for long runs only), ``True``/``False``, or a callable
  ``progress(done, total, label)`` called as work completes (see :func:`progress_bar`).
- ``chunk``: a number of time steps handled at once.
- ``k``: how many exponents, components or singular values.
- ``max_lag``: the largest lag in steps.
- ``tol``: the relative convergence tolerance of an iterative solver; thresholds that are not
  convergence tolerances carry their own names (``fixed_tol``, ``slow_tol``, ``distance_tol``,
  ``marginal_tol``).
- ``threads``: ``None`` (torch's current count) or an int >= 1, the torch threads used by the
  calling thread for the analysis (see :mod:`hiddenlens._core.threads`).
"""

from __future__ import annotations

import contextlib
import functools
import inspect
import numbers
import warnings
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

__all__ = [
    "OptionError", "Interval", "OneOf", "InstanceOf", "NONE", "BOOL", "CALLABLE", "SEED",
    "PROGRESS", "CHUNK", "K", "MAX_LAG", "TOL", "THREADS", "CONSTRAINTS", "check_options",
    "describe_constraints",
    "bad_values", "analysis", "torch_generator", "numpy_rng", "int_seed", "progress_bar", "renamed",
]


# ---------------------------------------------------------------------- constraints
class OptionError(ValueError, TypeError):
    """A bad option value; both a ValueError and a TypeError (wrong kind or out of range)."""


class Constraint:
    """One allowed kind of value: ``ok(value)``, a phrase for the message, bad examples."""

    def ok(self, value: Any) -> bool:  # pragma: no cover - abstract
        raise NotImplementedError

    def phrase(self) -> str:  # pragma: no cover - abstract
        raise NotImplementedError

    def near_misses(self) -> list[Any]:
        """Values just outside this constraint (candidates for bad values in tests)."""
        return []


@dataclass(frozen=True)
class Interval(Constraint):
    """Numbers of ``kind`` ("int" or "real") in an interval; ``None`` bounds are open ends."""

    kind: str
    low: float | None = None
    high: float | None = None
    closed: str = "both"  # "both", "left", "right" or "neither"

    def ok(self, value: Any) -> bool:
        if isinstance(value, bool):
            return False
        if self.kind == "int":
            if not isinstance(value, numbers.Integral):
                return False
        elif not isinstance(value, numbers.Real) or not np.isfinite(float(value)):
            return False
        v = float(value)
        lo_in = self.closed in ("both", "left")
        hi_in = self.closed in ("both", "right")
        if self.low is not None and (v < self.low or (v == self.low and not lo_in)):
            return False
        return not (self.high is not None and (v > self.high or (v == self.high and not hi_in)))

    def phrase(self) -> str:
        noun = "an int" if self.kind == "int" else "a float"
        lo_in = self.closed in ("both", "left")
        hi_in = self.closed in ("both", "right")
        if self.low is not None and self.high is not None:
            return (f"{noun} in {'[' if lo_in else '('}{_num(self.low)}, "
                    f"{_num(self.high)}{']' if hi_in else ')'}")
        if self.low is not None:
            return f"{noun} {'>=' if lo_in else '>'} {_num(self.low)}"
        if self.high is not None:
            return f"{noun} {'<=' if hi_in else '<'} {_num(self.high)}"
        return noun

    def near_misses(self) -> list[Any]:
        out: list[Any] = [True, "1"]
        if self.kind == "int":
            out.append(1.5)
            if self.low is not None:
                out.append(int(np.floor(self.low)) - (1 if self.closed in ("both", "left") else 0))
            if self.high is not None:
                out.append(int(np.ceil(self.high)) + (1 if self.closed in ("both", "right") else 0))
        else:
            out.append(float("nan"))
            if self.low is not None:
                out.append(self.low - 1.0 if self.closed in ("both", "left") else self.low)
            if self.high is not None:
                out.append(self.high + 1.0 if self.closed in ("both", "right") else self.high)
        return out


@dataclass(frozen=True)
class OneOf(Constraint):
    """One of a few named values (compared with ``==``, strings only)."""

    values: tuple[Any, ...]

    def ok(self, value: Any) -> bool:
        return isinstance(value, str) and value in self.values

    def phrase(self) -> str:
        return "one of " + ", ".join(repr(v) for v in self.values)

    def near_misses(self) -> list[Any]:
        return ["no-such-choice", 3]


@dataclass(frozen=True)
class InstanceOf(Constraint):
    """An instance of a type (``bool`` excluded from ``int``)."""

    type_: type | tuple[type, ...]
    name: str

    def ok(self, value: Any) -> bool:
        return isinstance(value, self.type_)

    def phrase(self) -> str:
        return self.name


class _NoneConstraint(Constraint):
    def ok(self, value: Any) -> bool:
        return value is None

    def phrase(self) -> str:
        return "None"


class _Bool(Constraint):
    def ok(self, value: Any) -> bool:
        return isinstance(value, (bool, np.bool_))

    def phrase(self) -> str:
        return "a bool"

    def near_misses(self) -> list[Any]:
        return ["yes"]


class _Callable(Constraint):
    def ok(self, value: Any) -> bool:
        return callable(value) and not isinstance(value, type)

    def phrase(self) -> str:
        return "a callable(done, total, label)"


NONE = _NoneConstraint()
BOOL = _Bool()
CALLABLE = _Callable()

# the shared vocabulary
SEED = (Interval("int", 0, None), InstanceOf(np.random.Generator, "a numpy.random.Generator"))
PROGRESS = (NONE, BOOL, CALLABLE)
CHUNK = (NONE, Interval("int", 1, None))  # time steps
K = (NONE, Interval("int", 1, None))
MAX_LAG = (NONE, Interval("int", 1, None))
TOL = (Interval("real", 0, 1, closed="neither"),)
THREADS = (NONE, Interval("int", 1, None))
POSITIVE_INT = (Interval("int", 1, None),)
POSITIVE = (Interval("real", 0, None, closed="neither"),)
NON_NEGATIVE = (Interval("real", 0, None),)
DTYPE_FREE = ()  # checked by hiddenlens._core.validation.as_dtype (its own message)

_COMMON = {"seed": SEED, "progress": PROGRESS}

CONSTRAINTS: dict[str, dict[str, tuple[Constraint, ...]]] = {
    "jacobian_spectra": {
        **_COMMON, "k": K, "chunk": CHUNK, "tol": TOL, "threads": THREADS,
        "method": (OneOf(("auto", "svd", "gram", "krylov")),),
        "radius": (NONE, BOOL),
    },
    "gradient_flow": {
        **_COMMON, "max_lag": MAX_LAG, "chunk": CHUNK, "tol": TOL, "threads": THREADS,
        "max_iter": POSITIVE_INT,
    },
    "lyapunov_spectrum": {
        **_COMMON, "k": K, "threads": THREADS, "qr_every": POSITIVE_INT,
        "warmup": (NONE, Interval("int", 0, None)),
        "method": (OneOf(("auto", "jacobian", "jvp")),),
    },
    "pca_trajectories": {
        "seed": SEED, "k": (Interval("int", 1, None),), "threads": THREADS,
        "label_kind": (OneOf(("auto", "categorical", "ordered")),),
    },
    "find_fixed_points": {
        # n_starts and max_iter default to None: sized from the state (see find_fixed_points)
        **_COMMON, "threads": THREADS, "n_starts": (NONE, *POSITIVE_INT),
        "max_iter": (NONE, Interval("int", 0, None)), "noise": NON_NEGATIVE,
        "fixed_tol": (NONE, *NON_NEGATIVE), "tol": (NONE, *NON_NEGATIVE),
        "slow_tol": NON_NEGATIVE, "distance_tol": NON_NEGATIVE, "marginal_tol": NON_NEGATIVE,
    },
    "memory_curve": {
        **_COMMON, "max_lag": (Interval("int", 0, None),), "threads": THREADS,
        "method": (OneOf(("decoding", "perturbation", "sensitivity")),),
        "n_folds": (Interval("int", 2, None),),
        # counts default to None: sized from the method and the lags (see memory_curve)
        "n_sequences": (NONE, *POSITIVE_INT), "n_steps": (NONE, *POSITIVE_INT),
        "washout": (NONE, Interval("int", 0, None)), "impulse": POSITIVE,
        "baseline_window": (Interval("int", 0, None),),
    },
}


def _num(v: float) -> str:
    return str(int(v)) if float(v).is_integer() else repr(float(v))


def describe_constraints(constraints: tuple[Constraint, ...]) -> str:
    """``"an int >= 0 or a numpy.random.Generator"``: the phrases joined with "or"."""
    phrases = [c.phrase() for c in constraints]
    if len(phrases) <= 2:
        return " or ".join(phrases)
    return ", ".join(phrases[:-1]) + " or " + phrases[-1]


def _message(option: str, analysis: str, constraints: tuple[Constraint, ...], value: Any) -> str:
    return (f"The {option!r} option of {analysis} must be {describe_constraints(constraints)}; "
            f"got {value!r}.")


def check_options(analysis: str, given: Mapping[str, Any]) -> None:
    """Refuse the first option of ``given`` that breaks its constraint, in the one message form.

    ``given`` is usually ``locals()`` at the top of the analysis; names without a declared
    constraint are skipped. Raises ``TypeError`` when no constraint accepts the value's type
    (a string where a number is expected) and ``ValueError`` when the type is right but the
    value is out of range.
    """
    table = CONSTRAINTS[analysis]
    for option, constraints in table.items():
        if option not in given:
            continue
        value = given[option]
        if any(c.ok(value) for c in constraints):
            continue
        raise OptionError(_message(option, analysis, constraints, value))


def bad_values(constraints: tuple[Constraint, ...]) -> Iterator[Any]:
    """Values that break ``constraints`` (for contract tests)."""
    seen = []
    for c in constraints:
        for v in c.near_misses():
            if not any(other.ok(v) for other in constraints) and not any(
                    type(v) is type(s) and (v == s or v != v) for s in seen):
                seen.append(v)
                yield v


# ---------------------------------------------------------------------- deprecated names
def renamed(analysis: str, old: str, new: str, old_value: Any, new_value: Any,
            default: Any = None) -> Any:
    """Take a value given under an option's old name, with a DeprecationWarning naming the new."""
    if old_value is None:
        return new_value
    if new_value is not default:
        raise TypeError(f"{analysis} got both {old!r} (its old name) and {new!r}; pass only "
                        f"{new}={new_value!r}")
    warnings.warn(f"the {old!r} option of {analysis} is now called {new!r}; pass "
                  f"{new}={old_value!r} (the old name goes away in the next release)",
                  DeprecationWarning, stacklevel=3)
    return old_value


# ---------------------------------------------------------------------- seeds
def int_seed(seed: int | np.random.Generator) -> int:
    """An int seed: the seed itself, or one draw from the user's Generator (which advances it)."""
    if isinstance(seed, np.random.Generator):
        return int(seed.integers(0, 2**32))  # within every consumer's range (scikit-learn: 32 bits)
    return int(seed)


def torch_generator(seed: int | np.random.Generator) -> torch.Generator:
    """A local CPU ``torch.Generator`` for ``seed``; torch's global RNG is never used."""
    return torch.Generator().manual_seed(int_seed(seed))


def numpy_rng(seed: int | np.random.Generator) -> np.random.Generator:
    """A local numpy Generator: the user's own Generator as given, or one seeded by an int."""
    if isinstance(seed, np.random.Generator):
        return seed
    return np.random.default_rng(int(seed))


# ---------------------------------------------------------------------- progress
class _Callback:
    """A tqdm-shaped adapter that reports to ``progress(done, total, label)``."""

    def __init__(self, fn: Callable[[int, int, str], Any], total: int, label: str) -> None:
        self.fn, self.total, self.label, self.n = fn, int(total), label, 0

    def update(self, n: int = 1) -> None:
        self.n += int(n)
        self.fn(self.n, self.total, self.label)

    def close(self) -> None:
        pass

    def set_postfix(self, *args: Any, **kwargs: Any) -> None:
        pass

    def __iter__(self) -> Iterator[Any]:  # pragma: no cover - used via progress_bar(iterable)
        raise TypeError("iterate with progress_bar(..., iterable=...)")

    def __enter__(self) -> _Callback:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


class _Iterating(_Callback):
    def __init__(self, fn, total, label, iterable):
        super().__init__(fn, total, label)
        self.iterable = iterable

    def __iter__(self):
        for item in self.iterable:
            yield item
            self.update(1)


def progress_bar(progress: Any, *, total: int, label: str, auto: bool,
                 iterable: Any = None, **tqdm_options: Any) -> Any:
    """The one progress protocol: a tqdm bar, a callback adapter, or a disabled bar.

    ``progress=None`` shows a bar when ``auto`` is true (a long run), ``True``/``False`` force it
    on or off, and a callable is called as ``progress(done, total, label)`` after each unit of
    work (from the thread that runs the analysis). The returned object has ``update(n)`` and
    ``close()`` and is a context manager; with ``iterable`` it also iterates over it.
    """
    if callable(progress) and not isinstance(progress, (bool, np.bool_)):
        if iterable is not None:
            return _Iterating(progress, total, label, iterable)
        return _Callback(progress, total, label)
    from tqdm.auto import tqdm

    show = bool(progress) if progress is not None else bool(auto)
    return tqdm(iterable, total=total, desc=label, disable=not show, leave=False, **tqdm_options)


# ---------------------------------------------------------------------- the analysis boundary
def analysis(name: str) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """Mark ``fn(system, trace, *, options) -> Result`` as the analysis ``name``.

    The wrapper runs ``fn`` with the calling thread's torch thread count set to its
    ``threads`` option (per thread, given back after; see :mod:`hiddenlens._core.threads`) and
    fills the result's common metadata (:func:`hiddenlens._core.results.stamp`) from the system, the
    trace and the options used. Option values are checked by ``check_options`` inside ``fn``.
    """
    from .results import stamp
    from .threads import num_threads

    def decorate(fn: Callable[..., Any]) -> Callable[..., Any]:
        signature = inspect.signature(fn)
        params = list(signature.parameters.values())
        data = [p.name for p in params[:2]]
        skip = {p.name for p in params if p.kind in (p.VAR_POSITIONAL, p.VAR_KEYWORD)}

        @functools.wraps(fn)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            threads = kwargs.get("threads")
            usable = (isinstance(threads, numbers.Integral) and not isinstance(threads, bool)
                      and threads >= 1)
            with num_threads(threads) if usable else contextlib.nullcontext():
                result = fn(*args, **kwargs)
            try:
                bound = signature.bind(*args, **kwargs)
            except TypeError:  # pragma: no cover - fn accepted the call, so binding does too
                return result
            bound.apply_defaults()
            given = bound.arguments
            system, trace = (given.get(n) for n in (data + [None, None])[:2])
            from .trace import Trace

            if isinstance(system, Trace):  # pca_trajectories(trace)
                system, trace = None, system
            options = {k: v for k, v in given.items() if k not in data and k not in skip}
            for var in skip:
                extra = given.get(var)
                if isinstance(extra, Mapping):
                    options.update(extra)
            return stamp(result, name, system, trace, options)

        return wrapper

    return decorate
