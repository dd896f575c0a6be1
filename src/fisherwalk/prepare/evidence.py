"""Choosing on the evidence: when the Gaussian limit fails, "auto" stops trusting it.

``sampler="auto"`` predicts each sampler's time to an answer from its Gaussian-limit ESS
per evaluation (:mod:`fisherwalk.samplers.auto`). That prediction is only as good as
the Gaussian picture, and start() has already measured how good it is: PSIS k̂ of the
posterior against N(mode, H⁻¹) (Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto
smoothed importance sampling", JMLR 25(72)). The random walk's and MALA's predicted
speeds rest wholly on the limit (their optimal scales and acceptance come from it:
Roberts, Gelman & Gilks 1997; Roberts & Rosenthal 1998), while HMC's and NUTS's step is
adapted by dual averaging and NUTS adapts its path length too (Hoffman & Gelman 2014),
so they degrade more gracefully when the picture is off. Which families rely on the
limit is theirs to say (``Family.relies_on_limit``: the random walk and MALA).

The rule (our choice, common practice, no published source): above the PSIS threshold
(0.7 at 500 draws) the random walk's and MALA's predicted times are multiplied by
:data:`DISCOUNT`; above :data:`DROP_KHAT` (the importance ratios have no finite mean) by
:data:`DISCOUNT` squared. They are not dropped: k̂ near 1 scatters across either side of it
from one key to the next (0.72-1.01 over six keys on the 8-group non-centred model,
benchmarks/hierarchical/RESULTS.md), and at d = 10 a dropped random walk cost a gradient sampler's
compilations and twice the time to answer; a walk that proves far slower than predicted
switches to NUTS after its first round (:mod:`fisherwalk.workflow.switch`).
After the warm-up, a failed covariance check (the whitened spectrum far from ones) is the
same evidence: :func:`redecide` says whether a random walk or MALA chosen by "auto"
should give way to NUTS (the registry's ``FALLBACK``).
"""

from __future__ import annotations

import math
from typing import NamedTuple

from ..samplers import registry

__all__ = ["EvidenceChoice", "weigh_evidence", "redecide", "DISCOUNT", "DROP_KHAT",
           "relies_on_limit"]

DISCOUNT = 4.0  # predicted time multiplier for samplers that rely on the limit, k̂ > threshold
DROP_KHAT = 1.0  # above this k̂ the discount is squared


def relies_on_limit(sampler: str) -> bool:
    """Whether the family's predicted speed rests wholly on the Gaussian limit."""
    return bool(registry.family(sampler).relies_on_limit)


class EvidenceChoice(NamedTuple):
    """The choice after weighing the evidence."""

    sampler: str
    seconds_per_answer: dict[str, float]  # after the discount (dropped ones absent)
    note: str  # '' when the evidence changed nothing


def weigh_evidence(seconds: dict[str, float], khat: float, threshold: float) -> EvidenceChoice:
    """Discount the random walk and MALA when PSIS k̂ says the limit fails."""
    best = min(seconds, key=seconds.get)
    if not khat > threshold:  # NaN (no Laplace draws) and -inf (exact) change nothing
        return EvidenceChoice(best, dict(seconds), "")
    limited = [s for s in seconds if relies_on_limit(s)]
    if khat > DROP_KHAT:
        factor = DISCOUNT**2
        kept = {s: (v * factor if relies_on_limit(s) else v) for s, v in seconds.items()}
        action = (f"multiplied the predicted times of {', '.join(limited)} by {factor:g} "
                  "(their predicted speed rests on the Gaussian limit, and with k̂ above "
                  f"{DROP_KHAT:g} the importance ratios have no finite mean; a walk far "
                  "slower than predicted switches to NUTS after its first round)")
    else:
        kept = {s: (v * DISCOUNT if relies_on_limit(s) else v) for s, v in seconds.items()}
        action = (f"multiplied the predicted times of {', '.join(limited)} by "
                  f"{DISCOUNT:g} (their predicted speed rests on the Gaussian limit)")
    if not kept:  # pragma: no cover - the gradient samplers are always candidates
        kept = dict(seconds)
    chosen = min(kept, key=kept.get)
    changed = "" if chosen == best else f"; the choice moved from {best!r} to {chosen!r}"
    note = (f"PSIS k̂ = {khat:.2f} > {threshold:.2f} says the Laplace approximation misses "
            f"the posterior's tails: 'auto' {action}{changed}.")
    return EvidenceChoice(chosen, kept, note)


def redecide(sampler: str, chosen_by_auto: bool, covariance_failed: bool,
             khat: float, threshold: float) -> str:
    """After the warm-up: '' to keep the sampler, or the reason to switch to NUTS.

    Only a choice made by "auto" is revisited, once, and only for a sampler that relies
    on the limit, when the warm-up's covariance check failed as well as (or instead of)
    k̂: the warm-up's own draws contradict the picture the choice was made on.
    """
    if not chosen_by_auto or not relies_on_limit(sampler) or not covariance_failed:
        return ""
    khat_words = (f"PSIS k̂ {khat:.2f} (threshold {threshold:.2f})" if math.isfinite(khat)
                  else "PSIS k̂ not finite")
    return (f"'auto' chose {sampler!r} at start, but the warm-up's covariance check failed "
            f"({khat_words}): the Gaussian picture its predicted speed rests on does not "
            "hold, so the chains switch to "
            f"{registry.family(registry.FALLBACK).label.split(' (')[0]} with a metric "
            "learned from draws.")
