"""``target_acceptance=``: the acceptance that dual averaging aims for (HMC and NUTS).

Dual averaging (Nesterov 2009, Math. Program. 120; Hoffman & Gelman 2014, "The No-U-Turn
sampler", JMLR 15, section 3.2.1) moves the step size until the mean acceptance
probability meets a target. A higher target gives a smaller step, which follows sharper
curvature (a funnel's neck) with fewer divergent transitions, at more gradient
evaluations per draw (Betancourt 2017, "A conceptual introduction to Hamiltonian Monte
Carlo", arXiv:1701.02434, section 6.2). Which families take one is theirs to say
(``Family.takes_target_acceptance``: HMC and NUTS); the value is kept as ``Tuning.aim``.
"""

from __future__ import annotations

from typing import Any

from ..base.checks import probability
from ..errors import InputError, explain
from ..samplers import registry

__all__ = ["check_aim", "aim_samplers"]


def aim_samplers() -> tuple[str, ...]:
    """The samplers that accept ``target_acceptance=``: the families that take one, and
    ``"auto"`` (used when it picks one of them)."""
    return (*(n for n in registry.names() if registry.family(n).takes_target_acceptance),
            registry.AUTO)


def check_aim(target_acceptance: Any, sampler: str) -> float | None:
    """The validated target acceptance, or None when not given.

    Raises
    ------
    InputError
        Not a number strictly between 0 and 1, or given for a sampler without dual
        averaging toward a target (the random walk and MALA aim at the Gaussian-limit
        optimum).
    """
    if target_acceptance is None:
        return None
    where = "start(target_acceptance=...)"
    if sampler not in aim_samplers():
        takers = [n for n in aim_samplers() if n != registry.AUTO]
        raise InputError(explain(
            f"target_acceptance= is for HMC and NUTS (dual averaging's aim); sampler="
            f"{sampler!r} aims at the acceptance its Gaussian-limit optimum predicts.",
            where, "drop target_acceptance=, or use "
                   + " or ".join(f"sampler={n!r}" for n in (*reversed(takers), "auto"))
                   + "."))
    return probability(target_acceptance, "target_acceptance", where,
                       todo="pass a number strictly between 0 and 1, e.g. 0.9 or 0.95 "
                            "when NUTS reports divergent transitions.")
