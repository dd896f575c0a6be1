"""A planned walk whose measured ESS rate falls far below its prediction switches, once.

A planned walk (:mod:`fisherwalk.workflow.plan`) sizes its first round from the predicted
ESS per step of its sampler (``Family.ess_per_step``, the Gaussian limit at the walker's
tuning). When the first round's measured rate (min over parameters of bulk and tail ESS,
per step of one chain) is below that prediction divided by :data:`SWITCH_FACTOR`, the
Gaussian picture the sampler was tuned on is wrong, and a sampler that rests wholly on it
(the random walk, MALA: ``Family.relies_on_limit``) keeps paying for it in every later
round. The walk then switches once to the registry's FALLBACK (NUTS, whose step size and
path length adapt, Hoffman & Gelman 2014, JMLR 15), its metric learned in windows on its
own engine from where the chains are (:mod:`fisherwalk.prepare.metric_repair`), and says so.
The first round's draws are set aside (the new walk's rounds start afresh from the
chains' positions); NUTS never switches again.

The threshold (our choice, common practice, no published source): on an exact Gaussian
the realised rate is 0.8-0.9 of the prediction (benchmarks/RESULTS.md, section 5), and
an ESS estimate near 400 scatters by tens of percent, so a factor of 10 is not reached by
chance; a walk 10 times slower than planned needs 10 times the draws it was planned for,
which costs more than a NUTS warm-up on every target measured in benchmarks/.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import FisherwalkWarning, warn_user
from ..prepare.metric_repair import fallback_walker_parts, learn_metric
from ..samplers import registry
from ..tuned.walker import Walker

__all__ = ["SWITCH_FACTOR", "switch_reason", "switched_walker"]

SWITCH_FACTOR = 10.0  # measured ESS rate below predicted / this: switch (see the docstring)


def switch_reason(walker: Walker, min_ess: float, max_rhat: float, draws: int,
                  thin: int) -> str:
    """'' to go on, or why the walk switches after its first round of ``draws`` per chain.

    ``min_ess`` is the min over parameters of bulk and tail ESS of the round's draws (all
    chains); ``max_rhat`` its largest R-hat (an R-hat above 1.1 with ESS in hand is as
    strong a sign, but only the rate decides here, the R-hat is said)."""
    family = walker.family
    if not family.relies_on_limit or family.name == registry.FALLBACK:
        return ""
    predicted = float(family.ess_per_step(walker.tuning))
    steps = draws * thin * walker.chains
    if not (predicted > 0 and math.isfinite(predicted)) or steps <= 0:
        return ""
    measured = max(float(min_ess), 0.0) / steps
    if measured * SWITCH_FACTOR >= predicted:
        return ""
    rhat_words = f", R-hat {max_rhat:.3g}" if math.isfinite(max_rhat) else ", R-hat not finite"
    return (f"the first round of walk() measured {measured:.3g} effective draws per step "
            f"per chain (min bulk/tail ESS {min_ess:.0f} over {draws} draws per chain"
            f"{rhat_words}), below a tenth of the {predicted:.3g} that {family.name!r} "
            "was planned on: the Gaussian picture its tuning rests on does not hold here")


def switched_walker(walker: Walker, positions, rng_key, reason: str) -> Walker:
    """The FALLBACK (NUTS) walker warmed up by windows on its engine from ``positions``
    (chains, d), with a note in its report; the switch is said as a warning."""
    learned = learn_metric(walker, np.asarray(positions), rng_key, switch=True)
    tuning, model, state = fallback_walker_parts(walker, learned)
    label = registry.family(registry.FALLBACK).label.split(" (")[0]
    note = (f"Switched to {label} during walk(): {reason}. Its metric was learned by "
            f"{learned.how}, {learned.steps} steps per chain from the chains' positions (step size "
            f"{learned.step_size:.3g}); the first round's draws were set aside.")
    warn_user(note, FisherwalkWarning)
    report = walker.report._replace(notes=tuple(walker.report.notes) + (note,))
    return walker._replace(state=state, tuning=tuning, model=model, report=report)
