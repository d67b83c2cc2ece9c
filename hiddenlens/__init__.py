"""hiddenlens: probe the hidden-state dynamics of recurrent neural networks.

Wrap a recurrent PyTorch model (or a step function) as a system, record its hidden states, and
run the analyses: Jacobian spectra and gradient flow, Lyapunov spectra, memory span, PCA
trajectories and fixed points. Results are small frozen objects with ``.plot()`` and
``.to_frame()``; :func:`explore` and :func:`compare` show them as notebook widgets and the
``hiddenlens`` command writes them into an HTML report.

Names are imported on first use, so ``import hiddenlens`` stays light and the computation core
never pulls in matplotlib or ipywidgets.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

from ._version import __version__

# public name -> private module that defines it
_LAZY = {
    "wrap": "_systems",
    "RecurrentSystem": "_systems",
    "LayerWeights": "_systems",
    "leaky_rnn": "_systems",
    "load_weights": "_checkpoints",
    "LoadedWeights": "_checkpoints",
    "record": "_record",
    "NonFiniteStateWarning": "_record",
    "StationaryTrajectoryWarning": "_lyapunov",
    "Trace": "_trace",
    "load_trace": "_trace",
    "jacobians": "_jacobians",
    "jacobian_spectra": "_spectra",
    "gradient_flow": "_gradient_flow",
    "loss_gradient_norms": "_gradient_flow",
    "lyapunov_spectrum": "_lyapunov",
    "pca_trajectories": "_pca",
    "task_memory": "_task_memory",
    "find_fixed_points": "_fixed_points",
    "memory_curve": "_memory",
    "compare_runs": "_compare",
    "linear_cka": "_compare",
    "explore": "widgets",
    "compare": "widgets",
    "write_report": "_report",
    # the analysis registry and the runner every face uses
    "register_analysis": "_registry",
    "unregister_analysis": "_registry",
    "analyses": "_registry",
    "AnalysisSpec": "_registry",
    "run_analyses": "_runner",
    "key_figures": "_figures",
    "summary_sentence": "_figures",
    "diagnose": "_diagnosis",
    "rank_runs": "_diagnosis",
    "describe_figure": "_diagnosis",
    "Diagnosis": "_diagnosis",
    # result types, for isinstance checks and type annotations
    "JacobianSpectra": "_spectra",
    "GradientFlow": "_gradient_flow",
    "LossGradientNorms": "_gradient_flow",
    "LyapunovSpectrum": "_lyapunov",
    "kaplan_yorke_dimension": "_lyapunov",
    "PCATrajectories": "_pca",
    "TaskMemory": "_task_memory",
    "FixedPoints": "_fixed_points",
    "MemoryCurve": "_memory",
    "MemoryRangeWarning": "_memory",
    "RunComparison": "_compare",
    # over training and across runs
    "Monitor": "_monitor",
    "timeline": "_timeline",
    "Timeline": "_timeline",
    "sweep": "_sweep",
    "SweepResult": "_sweep",
    "bootstrap_figures": "_bootstrap",
    "figure_intervals": "_bootstrap",
    "within_noise": "_bootstrap",
    "FigureIntervals": "_bootstrap",
}

__all__ = ["__version__", *_LAZY]

if TYPE_CHECKING:  # pragma: no cover - for type checkers and IDEs only
    from ._record import NonFiniteStateWarning, record  # noqa: F401
    from ._systems import LayerWeights, RecurrentSystem, wrap  # noqa: F401
    from ._trace import Trace, load_trace  # noqa: F401


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'hiddenlens' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
