"""Record a model once and run the registered analyses on the trace with modest budgets."""

from __future__ import annotations

import inspect
import time
from collections.abc import Callable, Iterable, Mapping
from typing import Any

from .._core.aliases import ModelLike, Sequences
from .._core.record import as_system, record
from .._core.registry import AnalysisSpec, analysis_spec, check_names, registered
from .._core.systems import RecurrentSystem
from .._core.trace import Trace
from .._core.validation import as_sequences

__all__ = ["AnalysisResults", "ModelLike", "Sequences", "analysis_options", "budget_of",
           "run_analyses"]

ProgressCallback = Callable[[str, int, int], Any]


class AnalysisResults(dict):
    """The results of :func:`run_analyses`: a plain ``dict`` analysis name -> result object.

    Attributes
    ----------
    trace : Trace
        The states recorded once on the given inputs (B, T, S) and shared by the analyses.
    skipped : dict[str, str]
        Analyses that were not run, with the reason (not installed, a context key missing, or
        failed with ``on_error="skip"``).
    seconds : dict[str, float]
        Wall time of each analysis that ran.
    options : dict[str, dict]
        The keyword options each analysis was called with.
    """

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.trace: Trace | None = None
        self.skipped: dict[str, str] = {}
        self.seconds: dict[str, float] = {}
        self.options: dict[str, dict[str, Any]] = {}


def analysis_options(spec: AnalysisSpec, system: RecurrentSystem, trace: Trace, seed: int,
                     user: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The options ``spec`` is called with: its budget for this trace, then ``user``'s.

    A budget option the function does not accept is dropped; a user's option it does not
    accept is a ``ValueError`` naming the accepted ones.
    """
    names, var_kw = spec.accepted()
    user = dict(user or {})
    opts = {k: v for k, v in budget_of(spec, system, trace, seed, user).items()
            if var_kw or k in names}
    unknown = [k for k in user if not (var_kw or k in names)]
    if unknown:
        fn = spec.load()
        fn = getattr(fn, "__wrapped__", fn)  # an analysis form names the function it wraps
        raise ValueError(
            f"options {unknown} are not options of {getattr(fn, '__name__', spec.name)} (the "
            f"{spec.name!r} analysis); it accepts "
            f"{', '.join(sorted(names - {'system', 'model_or_system', 'trace', 'inputs'}))}"
        )
    opts.update(user)
    return opts


def budget_of(spec: AnalysisSpec, system: RecurrentSystem, trace: Trace, seed: int,
              user: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """``spec.budget(system, trace, seed)``; a budget that takes ``options=`` also sees the
    user's options (to leave out defaults that conflict with them)."""
    if "options" in inspect.signature(spec.budget).parameters:
        return dict(spec.budget(system, trace, seed, options=dict(user or {})))
    return dict(spec.budget(system, trace, seed))


def _check_options(options: Mapping[str, Any] | None) -> dict[str, Mapping[str, Any]]:
    if options is not None and not isinstance(options, Mapping):
        raise TypeError(f"options must be a mapping analysis name -> keyword options, got "
                        f"{type(options).__name__}; e.g. options={{'pca': {{'k': 3}}}}")
    options = dict(options or {})
    check_names(options, "analysis in options")
    for a, o in options.items():
        if not isinstance(o, Mapping):
            raise TypeError(f"options[{a!r}] must be a mapping of keyword options, got "
                            f"{type(o).__name__}; e.g. options={{{a!r}: {{...}}}}")
    return options


def _chosen(which: Iterable[str] | str | None) -> tuple[list[AnalysisSpec], dict[str, str]]:
    if which is None:
        specs = [s for s in registered() if s.available()]
        missing = {s.name: f"not available in this installation ({s.module} is missing)"
                   for s in registered() if not s.available()}
        return specs, missing
    names = check_names([which] if isinstance(which, str) else which, "analysis")
    specs = [analysis_spec(n) for n in names]
    for s in specs:
        s.load()  # fail before any work
    return specs, {}


def run_analyses(
    model_or_system: ModelLike,
    inputs: Sequences,
    *,
    which: Iterable[str] | None = None,
    options: Mapping[str, Mapping[str, Any]] | None = None,
    progress: bool | ProgressCallback | None = None,
    seed: int = 0,
    on_error: str = "raise",
    trace: Trace | None = None,
    context: Mapping[str, Any] | None = None,
    lengths: Any = None,
    mask: Any = None,
) -> AnalysisResults:
    """Record a model once on ``inputs`` and run the chosen analyses with modest budgets.

    Parameters
    ----------
    model_or_system : RecurrentSystem, nn.Module or callable
        Anything :func:`hiddenlens.wrap` accepts, or a system.
    inputs : Tensor or ndarray of shape (B, T, I)
        The sequences the states are recorded on (batch first). The memory analysis uses its
        own i.i.d. probe inputs unless ``options={"memory": {"inputs": ...}}`` says otherwise.
    which : iterable of str, optional
        Names from :func:`hiddenlens.analyses`; default: every analysis available in this
        installation (the others are listed in ``.skipped``). Naming an unavailable one is an
        error.
    options : mapping, optional
        Per-analysis keyword options, e.g. ``{"lyapunov": {"k": 5}, "memory": {"max_lag": 80}}``;
        they override the default budgets. Unknown options raise ``ValueError``.
    progress : bool or callable, optional
        ``True`` shows a progress bar over the analyses; a callable is called as
        ``progress(name, done, total)`` before each analysis (and as ``progress("done", total,
        total)`` at the end); raise from it to stop. Default: no progress display.
    seed : int, default 0
        Seed of the analyses that draw random numbers (start frames, starting states, probes),
        so results repeat exactly.
    on_error : {"raise", "skip"}, default "raise"
        An analysis that fails raises its exception (the default: the caller decides), or is
        left out with its message in ``.skipped``.
    trace : Trace, optional
        Reuse a trace already recorded from this model on these inputs.
    context : mapping, optional
        Data some analyses need besides the trace, e.g. ``{"targets": y, "onsets": t}``. An
        analysis receives the keys it declares (``needs``) as keyword options; one whose keys
        are absent is skipped with the reason in ``.skipped``.
    lengths, mask : optional
        Real lengths (B,) of right-padded ``inputs``, or a (B, T) mask of real steps, as in
        :func:`hiddenlens.record`: every analysis leaves the padded steps out.

    Returns
    -------
    AnalysisResults
        A ``dict`` analysis name -> result object in registry order, with ``.trace``,
        ``.skipped``, ``.seconds`` and ``.options``.

    Notes
    -----
    The default budgets (all exponents and singular values up to 64 states, 64 fixed-point
    starts, memory lags up to 40 on 5 probe sequences of 640 steps) keep a 32-state model at
    about a second per analysis.
    """
    if on_error not in ("raise", "skip"):
        raise ValueError(f"on_error must be 'raise' or 'skip', got {on_error!r}")
    if context is not None and not isinstance(context, Mapping):
        raise TypeError(f"context must be a mapping of name -> data, got "
                        f"{type(context).__name__}; e.g. context={{'targets': y}}")
    system = as_system(model_or_system)
    specs, skipped = _chosen(which)
    options = _check_options(options)
    context = dict(context or {})
    if system.front is not None:
        x = inputs  # the model's raw inputs (token ids, features): its front end reads them
    else:
        x = as_sequences(inputs, system.input_size, system.dtype,
                         what=f"the {system.source} model")
    if trace is None:
        trace = record(system, x, lengths=lengths, mask=mask)
    elif lengths is not None or mask is not None:
        raise ValueError("lengths= and mask= apply when run_analyses records; a given trace "
                         "carries its own lengths (record it with lengths=)")
    out = AnalysisResults()
    out.trace = trace
    out.skipped.update(skipped)
    ready = []
    for spec in specs:
        absent = [k for k in spec.needs if k not in context]
        if absent:
            out.skipped[spec.name] = (f"needs {', '.join(map(repr, absent))} in context=; pass "
                                      f"context={{{absent[0]!r}: ...}}")
            continue
        extra = {k: context[k] for k in (*spec.needs, *spec.uses) if k in context}
        out.options[spec.name] = analysis_options(spec, system, trace, seed,
                                                  {**extra, **options.get(spec.name, {})})
        ready.append(spec)
    # the trace holds what the recurrent part received: the analyses run on that part alone
    _run_each(ready, system.without_front(), trace, out, progress, on_error)
    return out


def _run_each(specs: list[AnalysisSpec], system: RecurrentSystem, trace: Trace,
              out: AnalysisResults, progress: Any, on_error: str) -> None:
    bar = None
    if progress is True:
        from tqdm.auto import tqdm

        bar = tqdm(total=len(specs), desc="analyses", leave=False)
    try:
        for i, spec in enumerate(specs):
            if callable(progress):
                progress(spec.name, i, len(specs))
            if bar is not None:
                bar.set_postfix_str(spec.name)
            _run_one(spec, system, trace, out, on_error)
            if bar is not None:
                bar.update(1)
        if callable(progress):
            progress("done", len(specs), len(specs))
    finally:
        if bar is not None:
            bar.close()


def _run_one(spec: AnalysisSpec, system: RecurrentSystem, trace: Trace, out: AnalysisResults,
             on_error: str) -> None:
    t0 = time.perf_counter()
    try:
        res = spec(system, trace, **dict(out.options[spec.name]))
    except Exception as err:
        if on_error == "raise":
            raise
        out.skipped[spec.name] = f"failed: {type(err).__name__}: {err}"
    else:
        out[spec.name] = res
        out.seconds[spec.name] = time.perf_counter() - t0
