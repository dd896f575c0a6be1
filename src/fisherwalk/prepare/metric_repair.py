"""The metric repair of refine(): learned from draws when the Laplace metric is wrong.

When the warm-up's checks say H⁻¹ is the wrong metric (PSIS k̂ high, the whitened
covariance spectrum far from ones), a blend of a few hundred correlated draws with H⁻¹
moves the metric only a little. Instead the metric is learned from draws by BlackJAX's
window adaptation (:mod:`fisherwalk.prepare.draws_warmup`), started from the chains' current
positions, the Laplace metric and the current step size, whose windows double so that
early draws are forgotten. The result serves any sampler: a gradient sampler's metric,
the random walk's proposal shape (the covariance estimate, Roberts & Rosenthal 2001,
"Optimal scaling for various Metropolis-Hastings algorithms", Statist. Sci. 16(4)), or,
when "auto" chose the random walk or MALA on a Gaussian picture the warm-up refuted, the
metric and step size of the NUTS walker that replaces it
(:func:`fisherwalk.prepare.evidence.redecide`). A random walk that stays learns its shape
from more steps of its own compiled loop instead (:func:`repair_metric`): the window
adaptation would compile two NUTS programs for one covariance matrix.
"""

from __future__ import annotations

import numpy as np

from ..engine.proposal import shape_from_cholesky
from ..samplers import registry
from ..samplers.family import Family
from ..samplers.windows import learn_on_engine
from ..theory.gradient import NUTS_TARGET_ACCEPTANCE
from ..tuned.tuning import Tuning
from ..tuned.walker import Walker, flat_logdensity, with_engine
from .draws_warmup import DrawsWarmup, metric_factors, window_warmup

REPAIR_FINAL = 100  # a walker switching family ends its windows with one of step size only
#                    (a family keeping its own has refine()'s settling phase for that)

__all__ = ["learn_metric", "learned_factors", "window_start", "fallback_walker_parts",
           "learned_words", "repair_metric", "OWN_DRAWS_PER_DIM", "OWN_DRAWS_MAX_DIM"]

OWN_DRAWS_PER_DIM = 200  # steps per chain per parameter when a log-density family learns the
#                          shape from its own draws: at the random walk's efficiency of about
#                          0.3/d per step (Roberts, Gelman & Gilks 1997) 4 chains then hold
#                          about 240 effective draws, a variance to within about 10%
OWN_DRAWS_MAX_DIM = 25  # above this d the window adaptation's gradients are the cheaper way
#                         (our choice, common practice, no published source)


def window_start(family: Family, tuning: Tuning, phase1, switch: str) -> tuple[float, float]:
    """(step size, target acceptance) the window adaptation starts from: the family's own
    (``Family.window_start``; a gradient family's phase-1 step and its dual averaging's
    aim), else BlackJAX's defaults (1.0, 0.8); NUTS's 0.8 when the walker is switching
    to it (``switch``, :func:`fisherwalk.prepare.evidence.redecide`)."""
    step, aim = (1.0, NUTS_TARGET_ACCEPTANCE) if family.window_start is None else \
        family.window_start(tuning, phase1)
    return float(step), float(NUTS_TARGET_ACCEPTANCE if switch else aim)


def learn_metric(walker: Walker, positions, rng_key, *, step_size: float = 1.0,
                 target_acceptance: float = NUTS_TARGET_ACCEPTANCE,
                 steps: int | None = None, switch: bool = False,
                 first_draws=None) -> DrawsWarmup:
    """The metric learned from draws, from ``positions`` (chains, d) and the Laplace metric.

    A family whose engine takes the metric as data (``Family.learns_metric``: MALA, HMC,
    NUTS), or the registry's FALLBACK when ``switch`` (the walker is switching to it),
    learns it in windows on that engine (:func:`fisherwalk.samplers.windows.learn_on_engine`,
    starting from ``first_draws``, refine()'s phase-1 draws): nothing new is compiled,
    or, when switching, only the program the walk then uses. The random walk's shape is
    learned by BlackJAX's window adaptation (:mod:`fisherwalk.prepare.draws_warmup`).
    """
    fit = walker.report.laplace
    laplace_shape = np.asarray(shape_from_cholesky(np.asarray(fit.cholesky, np.float64)))
    family = registry.family(registry.FALLBACK) if switch else walker.family
    if not family.learns_metric:
        return window_warmup(flat_logdensity(walker.model), np.asarray(positions), rng_key,
                             steps=steps, inverse_mass_matrix=laplace_shape @ laplace_shape.T,
                             step_size=step_size, target_acceptance=target_acceptance)
    tuning = walker.tuning._replace(step_size=float(step_size))
    if switch:
        aim = walker.tuning.aim if family.takes_target_acceptance else None
        draft = Tuning(np.asarray(walker.tuning.shape), None, np.asarray(walker.tuning.whitening),
                       walker.tuning.shape_kind, sampler=family.name, aim=aim)
        tuning = family.initial(draft)
    placement = walker.model.engine.placement
    devices = None if placement is None else placement.mesh
    return learn_on_engine(family, flat_logdensity(walker.model), tuning, fit.mode_flat,
                           walker.chains, devices, np.asarray(positions), rng_key,
                           tuple(fit.names), first_draws=first_draws,
                           final=REPAIR_FINAL if switch else 0,
                           started_from="laplace" if first_draws is None else "warm-up")


def learned_factors(learned: DrawsWarmup, tuning: Tuning):
    """(S, C) of the learned metric in the tuning's dtype: S Sᵀ = M, C Cᵀ = M⁻¹."""
    shape, precision_chol = metric_factors(learned.inverse_mass_matrix)
    dtype = np.asarray(tuning.shape).dtype
    return shape.astype(dtype), precision_chol.astype(dtype)


def fallback_walker_parts(walker: Walker, learned: DrawsWarmup):
    """(tuning, model, state) of a walker of the registry's FALLBACK family (NUTS) with the
    learned metric and step size, the chains where the window adaptation left them; the
    user's target acceptance is kept if the family takes one."""
    fit = walker.report.laplace
    entry = registry.family(registry.FALLBACK)
    shape, precision_chol = learned_factors(learned, walker.tuning)
    aim = walker.tuning.aim if entry.takes_target_acceptance else None
    tuning = Tuning(shape, None, precision_chol, "warm-up", sampler=entry.name,
                    step_size=float(learned.step_size), aim=aim)
    placement = walker.model.engine.placement
    devices = None if placement is None else placement.mesh
    model = with_engine(walker.model._replace(engine=None), tuning, fit.mode_flat,
                        walker.chains, devices)
    positions = np.asarray(learned.position).astype(shape.dtype)
    state = entry.init(model.engine, positions, None, model.evaluate, tuple(fit.names))
    return tuning, model, state


def repair_metric(walker: Walker, context, phase1, state, rng_key, step_size: float,
                  target_acceptance: float, switch: str):
    """(learned, words): the metric learned from draws for refine().

    A family whose engine cannot take a learned metric (``Family.learns_metric`` False:
    the random walk) and stays (no ``switch``), at d <= :data:`OWN_DRAWS_MAX_DIM`, learns
    its shape from its own draws:
    :data:`OWN_DRAWS_PER_DIM` · d more steps of its phase (its compiled loop, no new
    program), whose pooled covariance after the first fifth is the shape (Haario, Saksman
    & Tamminen 2001, "An adaptive Metropolis algorithm", Bernoulli 7(2); the matched
    proposal, Roberts & Rosenthal 2001). Otherwise :func:`learn_metric`: windows on a
    gradient family's engine, or BlackJAX's window adaptation for a random walk beyond that
    d. benchmarks/phases.py measured the window adaptation's new programs as most of the
    random walk's warm-up on the 8-group model.
    """
    family = walker.family
    dim = int(np.shape(phase1.draws)[-1])
    if switch or family.learns_metric or dim > OWN_DRAWS_MAX_DIM:
        learned = learn_metric(walker, family.positions(walker.model.engine, state), rng_key,
                               step_size=step_size, target_acceptance=target_acceptance,
                               switch=bool(switch), first_draws=phase1.draws)
        return learned, None
    steps = OWN_DRAWS_PER_DIM * dim
    more = family.phase(context, rng_key, state, steps)
    kept = np.asarray(more.draws)[:, steps // 5:]
    pooled = kept.reshape(-1, dim).astype(np.float64)
    cov = np.atleast_2d(np.cov(pooled, rowvar=False))
    cov = 0.5 * (cov + cov.T) + 1e-10 * np.trace(cov) / dim * np.eye(dim)
    positions = family.positions(walker.model.engine, more.state)
    logdensity = np.asarray(walker.model.evaluate(np.asarray(positions)))
    learned = DrawsWarmup(np.asarray(positions), logdensity, cov, False, float(more.value),
                          np.full(walker.chains, float(more.value)), steps,
                          float(more.acceptance), 0, 0, np.asarray(more.draws),
                          float(target_acceptance), "own draws")
    return learned, steps


def learned_words(learned: DrawsWarmup, why: str) -> str:
    if learned.started_from == "own draws":
        return (f"Learned the proposal shape from draws ({why}): {learned.steps} more steps "
                "per chain of the sampler's own loop, the pooled covariance of the last "
                f"four fifths (acceptance {learned.acceptance:.2f}).")
    kind = "diagonal" if learned.diagonal else "dense"
    return (f"Learned the metric from draws ({why}): {learned.how}, "
            f"{learned.steps} steps per chain from the chains' positions and "
            + ("a first estimate from the warm-up's own draws"
               if learned.started_from == "warm-up" else "the Laplace metric")
            + f", a {kind} estimate, step size {learned.step_size:.3g}, acceptance "
            f"{learned.acceptance:.2f} in the last quarter"
            + (f", {learned.divergent} divergent transitions" if learned.divergent else "")
            + ".")
