"""Progress display for start, warm-up and sampling (tqdm: a terminal bar or a notebook
widget, whichever fits where the code runs)."""

from __future__ import annotations

import importlib.util
import sys


def in_notebook() -> bool:
    """Whether the code runs in a Jupyter kernel (an IPython shell with a kernel)."""
    if "ipykernel" not in sys.modules:
        return False
    try:
        from IPython import get_ipython
    except ImportError:  # pragma: no cover - ipykernel always brings IPython
        return False
    shell = get_ipython()
    return shell is not None and getattr(shell, "kernel", None) is not None


def shown(progress: bool | None) -> bool:
    """``progress=None``: show it when standard error is a terminal or in a notebook."""
    if progress is None:
        return sys.stderr.isatty() or in_notebook()
    return bool(progress)


def progress_bar(total: int, progress: bool | None, desc: str, unit: str = "draw"):
    """A tqdm bar of ``total`` steps, or None (see :func:`shown`)."""
    if not shown(progress):
        return None
    if in_notebook() and importlib.util.find_spec("ipywidgets") is None:
        from tqdm.std import tqdm  # a text bar in the cell's output, without tqdm's warning

        # each refresh becomes an output of the cell: refresh at most once a second
        return tqdm(total=total, unit=unit, desc=desc, leave=True, mininterval=1.0)
    from tqdm.auto import tqdm  # a terminal bar, or a widget in a notebook with ipywidgets

    return tqdm(total=total, unit=unit, desc=desc, leave=True)
