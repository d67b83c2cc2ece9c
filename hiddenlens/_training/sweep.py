"""Key figures of many runs (checkpoints, hyperparameter settings) on one engine of processes.

Work is shipped as plain data: a factory name ``"package.module:function"`` with keyword
arguments, and weights as a file path or a state_dict, so that every engine (joblib processes,
a dask.distributed cluster, Ray) rebuilds the same model and returns the same numbers.
"""

from __future__ import annotations

import importlib
import math
import os
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from .monitor import DEFAULT_FIGURES, check_figures, check_probe_inputs

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import Sequences

__all__ = ["sweep", "SweepResult", "ENGINES"]

ENGINES = ("local", "dask", "ray")


@dataclass(frozen=True, eq=False)
class SweepResult:
    """One row per run: name, hyperparameters, key figures and their intervals, error.

    Attributes
    ----------
    names : tuple of str
        R run names, in the order given.
    figures : tuple of str
        F figure names.
    values, low, high : ndarray of shape (R, F)
        Figures and their interval bounds (NaN where a run failed or gave no value).
    params : Mapping[str, tuple]
        Hyperparameter name -> R values.
    errors : tuple of str or None
        Per run: None, or ``"ErrorType: message"`` when it failed.
    level : float
        Nominal coverage of the intervals.
    engine : str
    """

    names: tuple[str, ...]
    figures: tuple[str, ...]
    values: np.ndarray
    low: np.ndarray
    high: np.ndarray
    params: Mapping[str, tuple]
    errors: tuple[str | None, ...]
    level: float
    engine: str

    def __post_init__(self) -> None:
        from .._core.results import frozen_mapping, readonly

        for n in ("values", "low", "high"):
            object.__setattr__(self, n, readonly(getattr(self, n), np.float64))
        object.__setattr__(self, "params", frozen_mapping(
            {k: tuple(v) for k, v in self.params.items()}))

    @property
    def table(self):
        """pandas DataFrame: name, the params, each figure with ``<figure>_low/_high``, error."""
        import pandas as pd

        cols: dict[str, Any] = {"name": list(self.names)}
        for k, v in self.params.items():
            cols[k] = list(v)
        for j, f in enumerate(self.figures):
            cols[f] = self.values[:, j].copy()
            cols[f"{f}_low"] = self.low[:, j].copy()
            cols[f"{f}_high"] = self.high[:, j].copy()
        cols["error"] = list(self.errors)
        return pd.DataFrame(cols)

    def to_frame(self):
        """The same as :attr:`table`."""
        return self.table

    def plot(self, figure: str, param: str, ax: Any = None, **kw: Any):
        """``figure`` against hyperparameter ``param``, with interval error bars."""
        from .._plotting.training import draw_sweep

        return draw_sweep(self, figure, param, ax, **kw)

    def __repr__(self) -> str:
        failed = sum(e is not None for e in self.errors)
        return (f"SweepResult({len(self.names)} runs, {len(self.figures)} figures, "
                f"{failed} failed, engine={self.engine!r})")


# ---------------------------------------------------------------------- run specs
def _factory_name(factory: Any) -> str:
    if isinstance(factory, str):
        module, sep, attr = factory.partition(":")
        if not sep or not module or not attr:
            raise ValueError(f"a factory must look like 'package.module:function', got "
                             f"{factory!r}")
        return factory
    mod, qual = getattr(factory, "__module__", None), getattr(factory, "__qualname__", "")
    if callable(factory) and mod and qual and "<" not in qual and mod != "__main__":
        return f"{mod}:{qual}"
    raise TypeError(f"a factory must be importable by name so that it can be shipped to "
                    f"workers: pass 'package.module:function', got {factory!r}")


def _spec(run: Any, i: int) -> dict[str, Any]:
    """A run as plain data: name, factory, kwargs, weights (path or state_dict) or a module."""
    import torch

    if isinstance(run, torch.nn.Module):
        return {"name": f"run{i}", "module": run}
    if isinstance(run, (tuple, list)) and len(run) == 2:
        run = {"factory": run[0], "weights": run[1]}
    if not isinstance(run, Mapping) or "factory" not in run:
        raise TypeError(f"runs[{i}] must be an nn.Module, a (factory, weights) pair or a dict "
                        f"with 'factory' (and 'weights', 'kwargs', 'name'); got "
                        f"{type(run).__name__}")
    unknown = set(run) - {"factory", "weights", "kwargs", "name"}
    if unknown:
        raise ValueError(f"runs[{i}] has unknown keys {sorted(unknown)}; expected factory, "
                         "weights, kwargs, name")
    w = run.get("weights")
    if w is not None and not isinstance(w, (str, os.PathLike, Mapping)):
        raise TypeError(f"runs[{i}]['weights'] must be a file path or a state_dict, got "
                        f"{type(w).__name__}")
    return {"name": str(run.get("name", f"run{i}")), "factory": _factory_name(run["factory"]),
            "kwargs": dict(run.get("kwargs") or {}),
            "weights": os.fspath(w) if isinstance(w, (str, os.PathLike)) else w}


def import_factory(name: str) -> Callable[..., Any]:
    module, _, attr = name.partition(":")
    obj: Any = importlib.import_module(module)
    for part in attr.split("."):
        obj = getattr(obj, part)
    return obj


def build(spec: Mapping[str, Any]):
    """The model of one run spec: the factory called with kwargs, the weights loaded."""
    import torch

    if "module" in spec:
        return spec["module"]
    model = import_factory(spec["factory"])(**spec["kwargs"])
    w = spec.get("weights")
    if w is not None:
        state = torch.load(w, map_location="cpu", weights_only=True) if isinstance(w, str) \
            else w
        if isinstance(state, Mapping) and isinstance(state.get("state_dict"), Mapping):
            state = state["state_dict"]
        with torch.no_grad():
            model.load_state_dict(state)
    return model


def _evaluate(spec: Mapping[str, Any], inputs: np.ndarray, figures: tuple[str, ...],
              seed: int, level: float, n_boot: int) -> dict[str, Any]:
    """One run: its figures, or its error (never raised: one failure must not stop a sweep)."""
    from .monitor import probe_figures

    try:
        rows = probe_figures(build(spec), inputs, figures, seed=seed, level=level,
                             n_boot=n_boot)
    except Exception as err:  # reported in the run's row
        return {"rows": [], "error": f"{type(err).__name__}: {err}"}
    return {"rows": rows, "error": None}


# ---------------------------------------------------------------------- engines
def _run_local(specs, args, n_jobs, progress):
    from joblib import Parallel, delayed

    gen = Parallel(n_jobs=n_jobs, return_as="generator")(
        delayed(_evaluate)(s, *args) for s in specs)
    return list(_progress(gen, len(specs), progress))


def _run_dask(specs, args, address, progress):
    from dask.distributed import Client, LocalCluster, as_completed

    cluster = None
    if address is None:
        # ":0": the scheduler's HTTP server (started even without a dashboard) takes a free
        # port instead of 8787, which another cluster on this machine may hold
        cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                               dashboard_address=":0")
        client = Client(cluster)
    else:
        client = Client(address)
    try:
        data = client.scatter(args[0], broadcast=True)
        futures = [client.submit(_evaluate, s, data, *args[1:], pure=False) for s in specs]
        index = {f.key: i for i, f in enumerate(futures)}
        out: list[Any] = [None] * len(specs)
        for fut in _progress(as_completed(futures), len(specs), progress):
            out[index[fut.key]] = fut.result()
        return out
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def _run_ray(specs, args, address, progress):
    try:
        import ray
    except ImportError as err:
        raise ImportError("engine='ray' needs Ray; install it with pip install ray, or use "
                          "engine='local' or 'dask'") from err
    if not ray.is_initialized():
        ray.init(address=address, ignore_reinit_error=True, log_to_driver=False)
    remote = ray.remote(_evaluate)
    data = ray.put(args[0])
    refs = [remote.remote(s, data, *args[1:]) for s in specs]
    return list(_progress((ray.get(r) for r in refs), len(specs), progress))


def _progress(items, total, progress):
    if not progress:
        yield from items
        return
    from tqdm.auto import tqdm

    with tqdm(total=total, desc="sweep", leave=False) as bar:
        for it in items:
            yield it
            bar.update(1)


# ---------------------------------------------------------------------- public function
def sweep(
    runs: Sequence[Any],
    inputs: Sequences,
    *,
    params: Any = None,
    engine: str = "local",
    address: str | None = None,
    figures: Sequence[str] = DEFAULT_FIGURES,
    seed: int = 0,
    level: float = 0.9,
    n_boot: int = 100,
    n_jobs: int | None = None,
    progress: bool = True,
) -> SweepResult:
    """Key figures with intervals for many runs, computed on an engine of workers.

    Parameters
    ----------
    runs : sequence
        Each run is a ``dict(factory="package.module:function", kwargs={...},
        weights=PATH_or_state_dict, name=...)``, a ``(factory, weights)`` pair, or an
        ``nn.Module`` (shipped as it is: prefer factory + weights for process engines).
        Weights files are read with ``torch.load(weights_only=True)``.
    inputs : ndarray of shape (B, T, I)
        One probe batch shared by all runs.
    params : pandas.DataFrame or Mapping[str, sequence], optional
        Hyperparameters of the runs, one row (value) per run, in run order.
    engine : {"local", "dask", "ray"}, default "local"
        ``"local"``: joblib worker processes on this machine. ``"dask"``: dask.distributed,
        on a new in-process ``LocalCluster`` (two single-thread workers) or on the scheduler
        at ``address``. ``"ray"``: Ray (optional; ``address`` passed to ``ray.init``).
    address : str, optional
        Scheduler address for ``"dask"`` / ``"ray"``.
    figures : sequence of str
        Names from ``hiddenlens._training.monitor.MONITOR_FIGURES``.
    seed, level, n_boot
        Seed of the analyses and the bootstrap (the same for every run: the table does not
        depend on the engine), nominal level and resamples of the intervals.
    n_jobs : int, optional
        joblib processes for ``"local"`` (default: joblib's, all cores).
    progress : bool, default True
        A progress bar over runs.

    Returns
    -------
    SweepResult
        A failing run has NaN figures and its error in the ``error`` column.
    """
    if engine not in ENGINES:
        raise ValueError(f"engine must be one of {ENGINES}, got {engine!r}")
    if address is not None and engine == "local":
        raise ValueError("address= names a dask or Ray scheduler; use engine='dask' or 'ray'")
    figures = check_figures(figures)
    if isinstance(runs, (str, bytes)) or not isinstance(runs, Sequence) or not runs:
        raise TypeError("runs must be a non-empty list of runs (dicts with factory and "
                        "weights, (factory, weights) pairs or modules)")
    specs = [_spec(r, i) for i, r in enumerate(runs)]
    names = [s["name"] for s in specs]
    if len(set(names)) != len(names):
        raise ValueError("run names must be distinct; give each run a 'name'")
    x = check_probe_inputs(inputs, "inputs")
    table = _params_table(params, len(specs))
    args = (x, figures, int(seed), float(level), int(n_boot))
    if engine == "local":
        out = _run_local(specs, args, n_jobs, progress)
    elif engine == "dask":
        out = _run_dask(specs, args, address, progress)
    else:
        out = _run_ray(specs, args, address, progress)
    R, F = len(specs), len(figures)
    vals, lows, highs = (np.full((R, F), math.nan) for _ in range(3))
    for i, o in enumerate(out):
        for row in o["rows"]:
            j = figures.index(row["figure"])
            vals[i, j], lows[i, j], highs[i, j] = row["value"], row["low"], row["high"]
    return SweepResult(names=tuple(names), figures=figures, values=vals, low=lows, high=highs,
                       params=table, errors=tuple(o["error"] for o in out), level=float(level),
                       engine=engine)


def _params_table(params: Any, n: int) -> dict[str, tuple]:
    if params is None:
        return {}
    if hasattr(params, "to_dict") and hasattr(params, "columns"):
        params = {c: list(params[c]) for c in params.columns}
    if not isinstance(params, Mapping):
        raise TypeError(f"params must be a pandas DataFrame or a mapping name -> values, got "
                        f"{type(params).__name__}")
    out = {}
    for k, v in params.items():
        v = tuple(v)
        if len(v) != n:
            raise ValueError(f"params[{k!r}] has {len(v)} values for {n} runs; give one per run")
        out[str(k)] = v
    return out
