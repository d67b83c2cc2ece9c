"""Drawing of trace results (matplotlib only; called by the results' ``.plot``)."""

from __future__ import annotations

from typing import Any


def draw_trace(result, ax: Any = None, *, part: str | None = None, sample: int = 0,
               max_units: int = 16):
    """Draw the first ``max_units`` units of one sample's states over time."""
    from .style import get_axes

    ax = get_axes(ax)
    cols = result.columns(part)[:max_units]
    ax.plot(result.states[sample][:, cols], lw=0.8)
    ax.set_xlabel("step t")
    ax.set_ylabel("state" if part is None else part)
    ax.set_title(f"{result.metadata.get('model_class', 'system')}: sample {sample}")
    return ax
