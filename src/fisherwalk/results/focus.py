"""Which parameters a summary, a figure or a run folder shows: a focus.

A focus is ``None`` (every parameter), one text or a sequence of texts. Each text is a
parameter's name (``beta[3]``), the name of a whole leaf (``beta`` gives ``beta[0]``,
``beta[1]``, ...), or a shell-style pattern (``beta*``, ``tau_?``; :mod:`fnmatch`, case
sensitive). A name is tried literally before as a pattern, so ``beta[3]`` means that
parameter, not the pattern ``beta3``. A text matching nothing is refused, naming what
exists.

With nothing chosen and more parameters than a figure can show, :func:`prominent` picks
the ones that matter most: the worst R-hat first, then the lowest ESS, then group-level
scales (names that read like a standard deviation or scale: ``sigma``, ``tau``, ``sd``,
``scale``), then the rest in written order.
"""

from __future__ import annotations

import fnmatch
import re
from collections.abc import Sequence
from typing import Any

import numpy as np

from ..errors import InputError, explain

__all__ = ["focus_indices", "prominent", "SPREAD_WORDS"]

SPREAD_WORDS = ("sigma", "tau", "sd", "scale", "std", "spread")  # group-level sd names
_WORD = re.compile(r"[A-Za-z]+")


def _texts(focus: Any, where: str) -> list[str]:
    if isinstance(focus, str):
        return [focus]
    try:
        texts = list(focus)
    except TypeError:
        texts = [focus]
    if not texts or not all(isinstance(t, str) and t for t in texts):
        raise InputError(explain(
            f"focus={focus!r} is not a parameter name, a pattern or a list of them.", where,
            "pass None for every parameter, or e.g. focus=['sigma', 'beta*']."))
    return texts


def focus_indices(names: Sequence[str], focus: Any, *, where: str = "focus") -> list[int]:
    """The columns of ``names`` that ``focus`` chooses, in the order of ``names``."""
    names = list(names)
    if focus is None:
        return list(range(len(names)))
    chosen: set[int] = set()
    for text in _texts(focus, where):
        hit = [j for j, name in enumerate(names)
               if name == text or name.startswith(text + "[") or name.startswith(text + ".")]
        if not hit:
            hit = [j for j, name in enumerate(names) if fnmatch.fnmatchcase(name, text)]
        if not hit:
            shown = ", ".join(names[:8]) + (", ..." if len(names) > 8 else "")
            raise InputError(explain(
                f"focus {text!r} matches no parameter.", where,
                f"use a name, a leaf name or a pattern of the run's names ({shown})."))
        chosen.update(hit)
    return sorted(chosen)


def _spread_like(name: str) -> bool:
    words = [w.lower() for w in _WORD.findall(name)]
    return any(w in SPREAD_WORDS or w.startswith("log") and w[3:] in SPREAD_WORDS
               for w in words)


def prominent(names: Sequence[str], rhat: np.ndarray, ess: np.ndarray, count: int
              ) -> list[int]:
    """The ``count`` columns that matter most, in the order of ``names``: worst R-hat,
    lowest ESS (bulk or tail, whichever is lower), then spread-like names, then the rest."""
    size = len(names)
    if size <= count:
        return list(range(size))
    rhat = np.where(np.isfinite(rhat), rhat, np.inf)
    ess = np.where(np.isfinite(ess), ess, 0.0)
    picked: list[int] = []

    def add(indices) -> None:
        for j in indices:
            if len(picked) < count and int(j) not in picked:
                picked.append(int(j))

    quarter = max(1, count // 4)
    add(np.argsort(-rhat, kind="stable")[:quarter])
    add(np.argsort(ess, kind="stable")[:quarter])
    add([j for j in range(size) if _spread_like(names[j])])
    add(range(size))
    return sorted(picked)
