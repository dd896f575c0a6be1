"""The plain facts of a run that the results read: :class:`RunFacts`.

The summary, the plots and the ArviZ export need to know which sampler ran, what it aimed
for, the scale or step size it used, what the Gaussian picture predicted, the whitening
that turns draws into the units of that prediction, the Laplace modes and whether there
was a warm-up. The run side builds these facts once from its walker
(:func:`fisherwalk.workflow.runfacts.run_facts`); a run reopened from its folder reads them from
``record.json`` (:func:`facts_record`, :func:`facts_from_record`). Nothing here asks what
kind of object it was given.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

__all__ = ["RunFacts", "facts_record", "facts_from_record", "in_written_order"]


class RunFacts(NamedTuple):
    """What the results need to know about the run that made the draws."""

    sampler: str  # "rwm", "mala", "hmc" or "nuts"
    title: str  # the sampler's name in words ("random-walk Metropolis", "NUTS")
    setting_label: str  # "scale" (the random walk's l) or "step size" (BlackJAX's step_size)
    setting: float  # the scale or step size walk() used
    setting_theory: float  # the scale or step size start() took from the theory
    aim: float  # the acceptance the sampler aimed for (the warm-up's target, else predicted)
    predicted_acceptance: float  # the Gaussian picture's acceptance at ``setting``
    predicted_jump: float | None  # expected squared whitened jump per step (all directions)
    acceptance_band: tuple[float, float]  # the theory's tolerance (theory.tolerance)
    shape: np.ndarray  # (d, d) S of the proposal or metric
    whitening: np.ndarray  # (d, d) lower L, L Lᵀ = the precision the walker believes
    shape_kind: str  # "fisher", "diagonal", "identity", "user", "saved" or "warm-up"
    spectrum: np.ndarray  # (d,) eigenvalues of Sᵀ L Lᵀ S
    names: tuple[str, ...]  # d parameter names, ravelled order
    order: tuple[int, ...]  # ravelled indices in the order the user wrote them
    mode: np.ndarray  # (d,) the Laplace mode, ravelled
    fisher_cholesky: np.ndarray  # (d, d) lower L with L Lᵀ = H at the mode
    modes_flat: tuple[np.ndarray, ...]  # the distinct modes start() found, ravelled
    modes_logdensity: tuple[float, ...]  # their log densities
    modes_fisher: tuple[np.ndarray, ...]  # the Fisher information at each
    warmup_steps: int | None  # warm-up steps per chain (None: no refine())
    leaves: tuple[tuple[str, tuple[int, ...]], ...]  # the position's leaves, ravelled order

    @property
    def dim(self) -> int:
        return len(self.names)

    @property
    def warmed(self) -> bool:
        return self.warmup_steps is not None


def in_written_order(order: tuple[int, ...], size: int) -> np.ndarray:
    """The index array that puts ``size`` ravelled columns in written order (a permutation
    of ``range(size)``; identity when ``order`` is empty or of another size)."""
    order = tuple(order)
    if len(order) != size or sorted(order) != list(range(size)):
        return np.arange(size)
    return np.asarray(order, dtype=int)


def facts_record(facts: RunFacts) -> dict[str, Any]:
    """The facts as JSON-ready data (arrays as nested lists)."""
    out: dict[str, Any] = {}
    for field, value in zip(facts._fields, facts, strict=True):
        if isinstance(value, np.ndarray):
            value = value.tolist()
        elif field in ("modes_flat", "modes_fisher"):
            value = [np.asarray(v).tolist() for v in value]
        elif field == "leaves":
            value = [[name, list(shape)] for name, shape in value]
        elif isinstance(value, tuple):
            value = list(value)
        out[field] = value
    return out


def facts_from_record(content: dict[str, Any]) -> RunFacts:
    """The facts read back from :func:`facts_record`'s data (``KeyError``/``ValueError`` on
    a malformed record; the caller explains)."""
    values: dict[str, Any] = {}
    for field in RunFacts._fields:
        value = content[field]
        if field in ("shape", "whitening", "spectrum", "mode", "fisher_cholesky"):
            value = np.asarray(value, dtype=float)
        elif field in ("modes_flat", "modes_fisher"):
            value = tuple(np.asarray(v, dtype=float) for v in value)
        elif field == "leaves":
            value = tuple((str(name), tuple(int(n) for n in shape)) for name, shape in value)
        elif field in ("names",):
            value = tuple(str(v) for v in value)
        elif field in ("order",):
            value = tuple(int(v) for v in value)
        elif field in ("modes_logdensity", "acceptance_band"):
            value = tuple(float(v) for v in value)
        values[field] = value
    return RunFacts(**values)
