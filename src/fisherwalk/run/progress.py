"""Progress display for warm-up and sampling (tqdm: a terminal bar or a notebook widget)."""

from __future__ import annotations

import sys


def progress_bar(total: int, progress: bool | None, desc: str):
    """A tqdm bar of ``total`` steps, or None. ``progress=None``: show it only when
    standard error is a terminal."""
    if progress is None:
        progress = sys.stderr.isatty()
    if not progress:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, unit="draw", desc=desc, leave=True)
