"""What every figure of :mod:`fisherwalk.results.plots` shares: the canvas and the save.

Figures are ``matplotlib.figure.Figure`` objects drawn by the Agg renderer (no pyplot, no
global backend) and written through the package's one safe write.
"""

from __future__ import annotations

from pathlib import Path

from ..base.files import write_atomic

__all__ = ["figure", "save_figure", "CHAIN_COLOURS", "DPI"]

DPI = 110
CHAIN_COLOURS = ("#1b6ca8", "#d1495b", "#2a9d5c", "#e09f3e", "#6a4c93", "#3d3d3d",
                  "#00a6a6", "#9c6644")


def figure(width: float, height: float):
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), dpi=DPI, layout="constrained")


def save_figure(fig, path) -> Path | None:
    if path is None:
        return None
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    return write_atomic(path, lambda handle: fig.savefig(handle, format="png"))
