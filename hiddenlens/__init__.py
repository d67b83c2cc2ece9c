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
    "wrap": "_core.systems",
    "RecurrentSystem": "_core.systems",
    "LayerWeights": "_core.systems",
    "leaky_rnn": "_core.systems",
    "load_weights": "_core.checkpoints",
    "LoadedWeights": "_core.checkpoints",
    "record": "_core.record",
    "NonFiniteStateWarning": "_core.record",
    "StationaryTrajectoryWarning": "_analyses.lyapunov",
    "Trace": "_core.trace",
    "load_trace": "_core.trace",
    "jacobians": "_core.jacobians",
    "jacobian_spectra": "_analyses.spectra",
    "gradient_flow": "_analyses.gradient_flow",
    "loss_gradient_norms": "_analyses.gradient_flow",
    "lyapunov_spectrum": "_analyses.lyapunov",
    "pca_trajectories": "_analyses.pca",
    "task_memory": "_analyses.task_memory",
    "find_fixed_points": "_analyses.fixed_points",
    "memory_curve": "_analyses.memory",
    "compare_runs": "_analyses.compare",
    "linear_cka": "_analyses.compare",
    "explore": "widgets",
    "compare": "widgets",
    "write_report": "_faces.report",
    # the analysis registry and the runner every face uses
    "register_analysis": "_core.registry",
    "unregister_analysis": "_core.registry",
    "analyses": "_core.registry",
    "AnalysisSpec": "_core.registry",
    "run_analyses": "_analyses.runner",
    "key_figures": "_analyses.figures",
    "summary_sentence": "_analyses.figures",
    "diagnose": "_analyses.diagnosis",
    "rank_runs": "_analyses.diagnosis",
    "describe_figure": "_analyses.diagnosis",
    "Diagnosis": "_analyses.diagnosis",
    # result types, for isinstance checks and type annotations
    "JacobianSpectra": "_analyses.spectra",
    "GradientFlow": "_analyses.gradient_flow",
    "LossGradientNorms": "_analyses.gradient_flow",
    "LyapunovSpectrum": "_analyses.lyapunov",
    "kaplan_yorke_dimension": "_analyses.lyapunov",
    "PCATrajectories": "_analyses.pca",
    "TaskMemory": "_analyses.task_memory",
    "FixedPoints": "_analyses.fixed_points",
    "MemoryCurve": "_analyses.memory",
    "MemoryRangeWarning": "_analyses.memory",
    "RunComparison": "_analyses.compare",
    # over training and across runs
    "Monitor": "_training.monitor",
    "timeline": "_training.timeline",
    "Timeline": "_training.timeline",
    "sweep": "_training.sweep",
    "SweepResult": "_training.sweep",
    "bootstrap_figures": "_analyses.bootstrap",
    "figure_intervals": "_analyses.bootstrap",
    "within_noise": "_analyses.bootstrap",
    "FigureIntervals": "_analyses.bootstrap",
}

__all__ = ["__version__", *_LAZY]

if TYPE_CHECKING:  # pragma: no cover - for type checkers and IDEs only
    from ._core.record import NonFiniteStateWarning, record  # noqa: F401
    from ._core.systems import LayerWeights, RecurrentSystem, wrap  # noqa: F401
    from ._core.trace import Trace, load_trace  # noqa: F401


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'hiddenlens' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
