"""How long to run: rounds planned from the theory, then from the measured ESS.

``walk(walker, rng_key)`` without ``draws`` runs until every parameter has bulk and tail
ESS of at least ``ess_limit`` and R-hat below ``rhat_limit`` (Vehtari, Gelman, Simpson,
Carpenter & Bürkner 2021, "Rank-normalization, folding, and localization: an improved
R-hat for assessing convergence of MCMC", Bayesian Analysis 16(2), recommend 400 and
1.01). The summary warns below either ESS, so the run aims at both.

First round, from the theory. In the Gaussian limit the slowest direction of the
proposal moves by J (its expected squared jump per step, in that direction's posterior
standard deviations: :func:`fisherwalk.theory.randomwalk.expected_jump` at the walker's
scale). A chain whose lag-1 autocorrelation is 1 - J/2 (the AR(1) picture, which gives
that squared jump) has integrated autocorrelation time (4 - J)/J, so

    predicted ESS per step per chain = J / (4 - J)

(an AR(1) approximation, no published source for random-walk Metropolis; benchmarks/
RESULTS.md section 5 compares it with realised ESS: realised/predicted 0.82-0.87 for the
Fisher shape). R-hat needs more than ESS 400 when there are many parameters: with M split
half-chains of e effective draws each, the chain means scatter like sigma² F / e with
F ~ chi²(M-1)/(M-1), so R-hat² - 1 ≈ (F - 1)/e (the ratio of between to within variance;
Gelman & Rubin 1992, Statistical Science 7(4)), and R-hat < 1 + delta needs
e > (F - 1)/((1 + delta)² - 1). The first round takes F at its 1 - 0.2/(2d) quantile (2d
R-hats: bulk and folded per parameter; a 20% chance that some R-hat still needs a second
round: a choice, common practice, no published source).

Later rounds, from the measurements: ESS grows in proportion to the draws and R-hat² - 1
falls like 1/draws, so the next total is the current one times the larger of the two
shortfalls, times 1.1, held between 1.25x and 4x (a choice, no published source).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy.stats import chi2

from ..results.diagnostics import ess_bulk, ess_tail, rhat

__all__ = ["RunLength", "predicted_ess_per_step", "first_round", "next_total", "stalled", "verdict",
           "ESS_LIMIT", "RHAT_LIMIT", "MAX_DRAWS", "MAX_SECONDS"]

ESS_LIMIT = 400.0  # Vehtari et al. (2021)
RHAT_LIMIT = 1.01  # Vehtari et al. (2021)
MAX_DRAWS = 50_000  # kept draws per chain at most, by default
MAX_SECONDS = 600.0  # wall time of sampling at most, by default
FIRST_ROUND_MISS = 0.2  # chance that the first round falls short on R-hat
GROWTH = (1.25, 4.0)  # bounds on the ratio of one round's total to the previous one
STALLED_RHAT = 1.1  # R-hat still above this after doubling: the chains will not agree


class RunLength(NamedTuple):
    """How the length of a walk was decided, and why it stopped."""

    planned: bool  # True: rounds until the targets; False: draws=N was given
    stopped: str  # "targets met", "draws budget", "seconds budget", "chains disagree",
    #               "fixed length" or "interrupted"
    rounds: tuple[int, ...]  # total kept draws per chain at the end of each round
    ess_limit: float
    rhat_limit: float
    max_draws: int | None  # the budgets of a planned run
    max_seconds: float | None
    predicted_ess_per_step: float | None  # per chain, slowest direction (theory)
    min_ess: float | None  # min over parameters of bulk and tail ESS, at the end
    max_rhat: float | None  # at the end

    def line(self) -> str:
        """One line for the summary's header."""
        if not self.planned:
            return f"run length: fixed ({self.rounds[-1] if self.rounds else 0} draws asked)"
        rounds = " -> ".join(str(r) for r in self.rounds)
        text = (f"run length: planned for ESS >= {self.ess_limit:.0f} and R-hat < "
                f"{self.rhat_limit}; {len(self.rounds)} round(s), draws per chain {rounds}; "
                f"stopped: {self.stopped}")
        if self.stopped == "draws budget":
            text += f" ({self.max_draws} draws per chain)"
        elif self.stopped == "seconds budget":
            text += f" ({self.max_seconds:g} s)"
        return text


def predicted_ess_per_step(tuning) -> float:
    """Predicted bulk ESS per step of one chain in its slowest direction, from the tuning's
    family (:mod:`fisherwalk.samplers`): the random walk's J / (4 - J) at its scale;
    a gradient family's Gaussian-limit ESS per gradient times the gradients per step
    (:func:`fisherwalk.theory.gradient.optimal_gradient_step`), capped at 1 (a step can
    be antithetic, but the plan should not count on it)."""
    return float(tuning.family.ess_per_step(tuning))


def _rhat_ess(dim: int, chains: int, rhat_limit: float) -> float:
    """Total ESS at which all 2d R-hats fall below the limit with 1 - FIRST_ROUND_MISS."""
    halves = 2 * chains
    quantile = chi2.ppf(1.0 - FIRST_ROUND_MISS / (2 * dim), halves - 1) / (halves - 1)
    per_half = (quantile - 1.0) / ((rhat_limit) ** 2 - 1.0)
    return halves * per_half


def first_round(tuning, chains: int, thin: int, chunk: int, ess_limit: float,
                rhat_limit: float, max_draws: int) -> int:
    """Kept draws per chain of the first round (a multiple of ``chunk``)."""
    per_step = predicted_ess_per_step(tuning)
    needed = max(ess_limit, _rhat_ess(tuning.dim, chains, rhat_limit))
    draws = needed / (chains * per_step * thin) if per_step * thin < 1 else needed / chains
    return _whole_chunks(draws, chunk, max_draws)


def next_total(done: int, min_ess: float, max_rhat: float, chunk: int, ess_limit: float,
               rhat_limit: float, max_draws: int) -> int:
    """Total kept draws per chain after the next round (a multiple of ``chunk``)."""
    factor = GROWTH[1]
    if min_ess > 0 and math.isfinite(min_ess) and math.isfinite(max_rhat):
        by_ess = ess_limit / min_ess
        by_rhat = (max_rhat**2 - 1.0) / (rhat_limit**2 - 1.0)
        factor = min(max(1.1 * max(by_ess, by_rhat), GROWTH[0]), GROWTH[1])
    return _whole_chunks(done * factor, chunk, max_draws)


def _whole_chunks(draws: float, chunk: int, max_draws: int) -> int:
    """Whole chunks of draws, at most ``max_draws`` (the last round may end inside a
    chunk: capping below ``max_draws`` would leave a round with no new draw to take)."""
    return int(min(max(chunk, math.ceil(draws / chunk) * chunk), max_draws))


def stalled(previous: tuple[int, float] | None, current: tuple[int, float]) -> bool:
    """Whether R-hat stays above STALLED_RHAT without falling with the draws.

    ``previous`` and ``current`` are (draws per chain, max R-hat) at the ends of two
    rounds. Chains that mix bring R-hat² - 1 down like 1/draws; chains held apart (in
    separate modes) keep it: less than a tenth of the expected fall says more draws will
    not make the chains agree.
    """
    if previous is None:
        return False
    (n0, r0), (n1, r1) = previous, current
    if not (r0 > STALLED_RHAT and r1 > STALLED_RHAT):
        return False
    if not (math.isfinite(r0) and math.isfinite(r1)):
        return True
    observed = (r1**2 - 1.0) / (r0**2 - 1.0)
    expected = n0 / n1
    return observed > 1.0 - 0.1 * (1.0 - expected)


def verdict(flat: np.ndarray) -> tuple[float, float]:
    """(min over parameters of bulk and tail ESS, max R-hat) of draws (chains, n, d)."""
    with np.errstate(all="ignore"):
        ess = np.minimum(np.atleast_1d(ess_bulk(flat)), np.atleast_1d(ess_tail(flat)))
        rh = np.atleast_1d(rhat(flat))
    min_ess = float(np.min(ess)) if np.all(np.isfinite(ess)) else 0.0
    max_rhat = float(np.max(rh)) if np.all(np.isfinite(rh)) else math.inf
    return min_ess, max_rhat
