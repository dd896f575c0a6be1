"""The registry of sampler families: the one list of the samplers fisherwalk knows.

``start(sampler=...)``'s choices, ``"auto"``'s candidates, the command line's
``--sampler`` choices, the tuning file's and the checkpoint's kinds all come from here.
Adding a family is one module (a :class:`~fisherwalk.samplers.family.Family`) and
one line below (or :func:`register` at run time, e.g. in a test).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..engine import gradient
from ..engine.metric import whitening_factor
from ..errors import InputError, explain
from ..theory.gradient import optimal_gradient_step
from . import hmc, mala, nuts, randomwalk
from .family import Family

__all__ = ["AUTO", "DEFAULT", "FALLBACK", "register", "unregister", "family", "names", "choices",
           "check_sampler", "gradient_engine", "gradient_names"]

AUTO = "auto"  # start(sampler="auto"): pick the family predicted to answer first
DEFAULT = randomwalk.FAMILY.name
# the family that runs when there is no Gaussian picture to tune from: a posterior with no
# mode (run.modeless), or a choice of "auto" that the warm-up refuted (run.evidence); only
# a gradient sampler with an adapted metric and path length can enter a funnel's neck
FALLBACK = nuts.FAMILY.name

_FAMILIES: dict[str, Family] = {f.name: f for f in (
    randomwalk.FAMILY,
    mala.FAMILY,
    hmc.FAMILY,
    nuts.FAMILY,
)}


def register(entry: Family) -> Family:
    """Add a family (its ``name`` must be new); returns it."""
    if not isinstance(entry, Family):
        raise InputError(explain(f"Expected a Family, got {type(entry).__name__}.",
                                 "register(entry=...)",
                                 "build a fisherwalk.samplers.family.Family."))
    if entry.name in _FAMILIES or entry.name == AUTO:
        raise InputError(explain(f"A sampler family named {entry.name!r} exists already.",
                                 "register(entry=...)", "give the family a new name."))
    _FAMILIES[entry.name] = entry
    return entry


def unregister(name: str) -> None:
    """Remove a family added with :func:`register` (the built-in ones stay)."""
    if name in (f.name for f in (randomwalk.FAMILY, mala.FAMILY, hmc.FAMILY, nuts.FAMILY)):
        raise InputError(explain(f"{name!r} is a built-in sampler family.",
                                 "unregister(name=...)", "remove only families you added."))
    _FAMILIES.pop(name, None)


def names() -> tuple[str, ...]:
    """The registered families' names, in registration order."""
    return tuple(_FAMILIES)


def choices() -> tuple[str, ...]:
    """What start(sampler=...) and the command line accept: the names and ``"auto"``."""
    return (*names(), AUTO)


def check_sampler(sampler: Any, where: str = "start(sampler=...)") -> str:
    if not isinstance(sampler, str) or sampler not in choices():
        raise InputError(explain(f"sampler={sampler!r} is not a known sampler.", where,
                                 f"use one of {', '.join(map(repr, choices()))}."))
    return sampler


def family(name: Any, where: str = "start(sampler=...)") -> Family:
    """The family registered under ``name``."""
    if not isinstance(name, str) or name not in _FAMILIES:
        raise InputError(explain(f"{name!r:.40} is not a registered sampler family.", where,
                                 f"use one of {', '.join(map(repr, names()))}."))
    return _FAMILIES[name]


def gradient_engine(name: str, logdensity_flat, mode, cholesky, chains: int, *,
                    target_acceptance: float | None = None, **options):
    """A gradient family's compiled loop built by hand (for tests and benchmarks)."""
    entry = family(name, "gradient_engine(name=...)")
    if entry.kernel is None:
        raise InputError(explain(f"{name!r} is not a gradient sampler family.",
                                 "gradient_engine(name=...)",
                                 f"use one of {', '.join(map(repr, gradient_names()))}."))
    if target_acceptance is None:
        target_acceptance = optimal_gradient_step(name, int(np.shape(mode)[0])).acceptance
    return gradient.make_gradient_engine(name, entry.kernel, logdensity_flat, mode,
                                         whitening_factor(cholesky), chains,
                                         target_acceptance=target_acceptance, **options)


def gradient_names() -> tuple[str, ...]:
    """The families whose kernels run on gradients."""
    return tuple(n for n, f in _FAMILIES.items() if f.kernel is not None)
