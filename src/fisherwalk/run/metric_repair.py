"""The metric repair of refine(): learned from draws when the Laplace metric is wrong.

When the warm-up's checks say H⁻¹ is the wrong metric (PSIS k̂ high, the whitened
covariance spectrum far from ones), a blend of a few hundred correlated draws with H⁻¹
moves the metric only a little. Instead the metric is learned from draws by BlackJAX's
window adaptation (:mod:`fisherwalk.run.draws_warmup`), started from the chains' current
positions, the Laplace metric and the current step size, whose windows double so that
early draws are forgotten. The result serves any sampler: a gradient sampler's metric,
the random walk's proposal shape (the covariance estimate, Roberts & Rosenthal 2001,
"Optimal scaling for various Metropolis-Hastings algorithms", Statist. Sci. 16(4)), or,
when "auto" chose the random walk or MALA on a Gaussian picture the warm-up refuted, the
metric and step size of the NUTS walker that replaces it
(:func:`fisherwalk.run.evidence.redecide`).
"""

from __future__ import annotations

import jax
import numpy as np

from ..theory.gradient import NUTS_TARGET_ACCEPTANCE
from .draws_warmup import DrawsWarmup, metric_factors, window_warmup
from .gradient_run import gradient_model, gradient_state
from .proposal import shape_from_cholesky
from .walker import GradientTuning, Walker

__all__ = ["learn_metric", "nuts_from_learned", "learned_words"]


def learn_metric(walker: Walker, positions, rng_key, *, step_size: float = 1.0,
                 target_acceptance: float = NUTS_TARGET_ACCEPTANCE,
                 steps: int | None = None) -> DrawsWarmup:
    """Window adaptation from ``positions`` (chains, d), the Laplace metric and a step."""
    fit = walker.report.laplace
    laplace_shape = np.asarray(shape_from_cholesky(np.asarray(fit.cholesky, np.float64)))
    unravel, fn = walker.model.unravel, walker.model.logdensity_fn

    def flat_logdensity(vector):
        return fn(unravel(vector))

    return window_warmup(flat_logdensity, np.asarray(positions), rng_key, steps=steps,
                         inverse_mass_matrix=laplace_shape @ laplace_shape.T,
                         step_size=step_size, target_acceptance=target_acceptance)


def nuts_from_learned(walker: Walker, learned: DrawsWarmup, aim: float | None = None):
    """(tuning, model, state) of a NUTS walker with the learned metric and step size."""
    fit = walker.report.laplace
    dtype = np.asarray(fit.mode_flat).dtype
    shape, precision_chol = metric_factors(learned.inverse_mass_matrix)
    tuning = GradientTuning("nuts", learned.step_size, shape.astype(dtype),
                            precision_chol.astype(dtype), "warm-up", aim)
    model = gradient_model(walker.model, tuning, fit.mode_flat, walker.chains)
    state = gradient_state(model, learned.position.astype(dtype), fit.names)
    return tuning, model, state


def learned_words(learned: DrawsWarmup, why: str) -> str:
    kind = "diagonal" if learned.diagonal else "dense"
    return (f"Learned the metric from draws ({why}): BlackJAX's window adaptation, "
            f"{learned.steps} steps per chain from the chains' positions and the Laplace "
            f"metric, a {kind} estimate, step size {learned.step_size:.3g}, acceptance "
            f"{learned.acceptance:.2f} in the last quarter"
            + (f", {learned.divergent} divergent transitions" if learned.divergent else "")
            + ".")


def positions_of(walker: Walker, state) -> np.ndarray:
    """Original-coordinate positions of a gradient walker's whitened state."""
    engine = walker.model.engine
    return engine.mode + np.asarray(jax.device_get(state.position)) @ np.asarray(
        engine.whitening).T
