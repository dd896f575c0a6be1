"""A warm-up that learns the metric from draws: BlackJAX's window adaptation, from our starts.

When the Laplace picture is wrong (PSIS k̂ high, a warm-up covariance far from H⁻¹) or
does not exist (no mode: :mod:`fisherwalk.fit.runaway`), the metric has to come from the
draws. BlackJAX's ``window_adaptation`` does exactly that (Stan's schedule: a fast
window for the step size, slow windows of doubling length whose draws estimate the
covariance, so that early unrepresentative draws are forgotten, and a final fast window;
Carpenter et al. 2017, "Stan: a probabilistic programming language", J. Stat. Softw.
76(1); the step size by dual averaging, Hoffman & Gelman 2014, JMLR 15). We delegate to
it rather than rewrite it, and give it what fisherwalk knows: the chains' starts, the
Laplace metric H⁻¹ as ``initial_inverse_mass_matrix`` and a step size, and, in blackjax
1.7.1, ``imm_shrinkage_to_previous`` to shrink each window's estimate toward the
previous metric (the Laplace one first; in the spirit of Ledoit & Wolf 2004, "A
well-conditioned estimator for large-dimensional covariance matrices", J. Multivariate
Anal. 88(2)).

Each chain adapts on its own (``jax.vmap`` over chains); the walker then shares one
metric (the mean of the chains' inverse mass matrices: each estimates the same
posterior covariance) and one step size (the median of the chains', which the walk's
dual averaging in :func:`fisherwalk.refine` can still move).
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Callable

import blackjax
import jax
import jax.numpy as jnp
import numpy as np

from ..base.checks import probability, whole_number
from ..base.keys import as_key
from ..samplers.windows import DENSE_LIMIT, LearnedMetric, metric_factors

__all__ = ["DrawsWarmup", "window_warmup", "DENSE_LIMIT", "dense_enough", "WINDOW_STEPS",
           "LAPLACE_WINDOW_STEPS", "metric_factors"]

WINDOW_STEPS = 1000  # BlackJAX's (and Stan's) default warm-up length, for a start with no mode
LAPLACE_WINDOW_STEPS = 300  # started from the Laplace metric (benchmarks/RESULTS.md measures it)
DRAWS_PER_DIM = 20  # a dense estimate needs at least this many warm-up steps per parameter
#                   (Stan's last slow window holds about half of them: ~10 d draws per
#                   chain); with fewer, the noisy dense estimate made NUTS's trees 8x
#                   longer than a diagonal one did (benchmarks/phases.py, the random-
#                   intercept target at d = 53, 300 steps). Our choice, common practice,
#                   no published source.
SHRINKAGE = 0.2  # imm_shrinkage_to_previous when started from the Laplace metric (our choice)


DrawsWarmup = LearnedMetric  # the one record of a metric learned from draws


def _supports(name: str) -> bool:
    return name in inspect.signature(blackjax.window_adaptation).parameters


def _last_window(steps: int) -> int:
    """Draws per chain in the last slow window of BlackJAX's (Stan's) schedule: a first
    fast window of 75 steps, a last of 50, slow windows 25, 50, 100, ... between them,
    the last one taking what remains."""
    slow = steps - 75 - 50
    if slow < 25:
        return 0
    size, used = 25, 0
    while used + size + 2 * size <= slow:
        used += size
        size *= 2
    return slow - used


def dense_enough(dim: int, steps: int) -> bool:
    """Whether a dense metric can be estimated per chain: up to :data:`DENSE_LIMIT`, and
    with at least 10 d draws in the last window (each chain estimates its own; the sample
    eigenvalues spread as (1 ± √(d/n))², Marchenko & Pastur 1967: n ≥ 10 d keeps them within
    about 0.5 to 1.7; the 10 is our choice, common practice, no published source). On the
    random-intercept benchmark (d = 53) a dense estimate from 100 draws per chain made
    NUTS's trajectories 14 times longer than a diagonal one."""
    return dim <= DENSE_LIMIT and 10 * dim <= _last_window(steps)


def window_warmup(flat_logdensity: Callable, starts, rng_key, *, steps: int | None = None,
                  inverse_mass_matrix=None, step_size: float = 1.0,
                  target_acceptance: float = 0.8, diagonal: bool | None = None,
                  shrinkage: float | None = None) -> DrawsWarmup:
    """NUTS with BlackJAX's window adaptation, one per chain, from ``starts``.

    Parameters
    ----------
    flat_logdensity
        The log posterior on the ravelled position, ``(d,) -> scalar``.
    starts
        (chains, d) starting points (ravelled).
    rng_key
        A JAX key.
    steps
        Warm-up steps per chain; default :data:`LAPLACE_WINDOW_STEPS` when a Laplace
        metric is given, :data:`WINDOW_STEPS` otherwise.
    inverse_mass_matrix
        The metric to start from (d, d), e.g. the Laplace H⁻¹; default the identity.
    step_size
        The step size to start from (e.g. the Gaussian-limit step for NUTS at this d).
    target_acceptance
        Dual averaging's aim (BlackJAX's default 0.8).
    diagonal
        Estimate a diagonal metric; default: dense when :func:`dense_enough`.
    shrinkage
        ``imm_shrinkage_to_previous`` (blackjax >= 1.7.1); default :data:`SHRINKAGE`
        with a Laplace metric, 0 without.

    Returns
    -------
    DrawsWarmup
    """
    starts = np.atleast_2d(np.asarray(starts))
    chains, dim = starts.shape
    steps_default = WINDOW_STEPS if inverse_mass_matrix is None else LAPLACE_WINDOW_STEPS
    steps = whole_number(steps_default if steps is None else steps, "steps",
                         "window_warmup(steps=...)", minimum=20)
    probability(target_acceptance, "target_acceptance", "window_warmup(target_acceptance=...)")
    key = as_key(rng_key, where="window_warmup(rng_key=...)")
    diagonal = not dense_enough(dim, steps) if diagonal is None else bool(diagonal)
    options = {"is_mass_matrix_diagonal": diagonal,
               "initial_step_size": float(step_size),
               "target_acceptance_rate": float(target_acceptance)}
    started_from = "identity"
    if inverse_mass_matrix is not None and _supports("initial_inverse_mass_matrix"):
        m0 = np.asarray(inverse_mass_matrix, starts.dtype)
        options["initial_inverse_mass_matrix"] = jnp.asarray(np.diag(m0) if diagonal else m0)
        started_from = "laplace"
        if shrinkage is None:
            shrinkage = SHRINKAGE
    if shrinkage and _supports("imm_shrinkage_to_previous"):
        options["imm_shrinkage_to_previous"] = float(shrinkage)
    adaptation = blackjax.window_adaptation(blackjax.nuts, flat_logdensity, **options)

    def one_chain(chain_key, position):
        (state, parameters), info = adaptation.run(chain_key, position, steps)
        return (state.position, state.logdensity, parameters["step_size"],
                parameters["inverse_mass_matrix"], info.info.acceptance_rate,
                info.info.is_divergent, info.info.num_integration_steps, info.state.position)

    keys = jax.random.split(key, chains)
    out = jax.device_get(jax.jit(jax.vmap(one_chain))(keys, jnp.asarray(starts)))
    position, logdensity, eps, imm, rate, divergent, n_grad, draws = out
    imm = np.asarray(imm, np.float64)
    metrics = np.stack([np.diag(m) for m in imm]) if diagonal else imm
    metric = metrics.mean(axis=0)
    metric = 0.5 * (metric + metric.T)
    quarter = max(1, steps // 4)
    eps = np.asarray(eps, np.float64)
    chosen = float(np.median(eps))
    if not math.isfinite(chosen) or chosen <= 0:
        chosen = float(step_size)
    return DrawsWarmup(np.asarray(position), np.asarray(logdensity), metric, diagonal,
                       chosen, eps, int(steps), float(np.mean(rate[:, -quarter:])),
                       int(np.sum(divergent)), int(np.sum(n_grad)), np.asarray(draws),
                       float(target_acceptance), started_from)
