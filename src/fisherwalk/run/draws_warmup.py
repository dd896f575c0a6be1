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
from typing import NamedTuple

import blackjax
import jax
import jax.numpy as jnp
import numpy as np

from ..base.checks import probability, whole_number
from ..base.keys import as_key

__all__ = ["DrawsWarmup", "window_warmup", "DENSE_LIMIT", "DRAWS_PER_DIM", "WINDOW_STEPS",
           "LAPLACE_WINDOW_STEPS", "metric_factors"]

DENSE_LIMIT = 100  # a dense metric up to this d, diagonal beyond (d² memory, d³ Cholesky);
#                    our choice, common practice, no published source
WINDOW_STEPS = 1000  # BlackJAX's (and Stan's) default warm-up length, for a start with no mode
LAPLACE_WINDOW_STEPS = 300  # started from the Laplace metric (benchmarks/RESULTS.md measures it)
DRAWS_PER_DIM = 20  # a dense estimate needs at least this many warm-up steps per parameter
#                   (Stan's last slow window holds about half of them: ~10 d draws per
#                   chain); with fewer, the noisy dense estimate made NUTS's trees 8x
#                   longer than a diagonal one did (benchmarks/phases.py, the random-
#                   intercept target at d = 53, 300 steps). Our choice, common practice,
#                   no published source.
SHRINKAGE = 0.2  # imm_shrinkage_to_previous when started from the Laplace metric (our choice)


class DrawsWarmup(NamedTuple):
    """What the draws-based warm-up learned (chain axis first)."""

    position: np.ndarray  # (chains, d) the chains at the end of the warm-up
    logdensity: np.ndarray  # (chains,)
    inverse_mass_matrix: np.ndarray  # (d, d) the shared metric (dense even when diagonal)
    diagonal: bool  # whether the metric was estimated as a diagonal
    step_size: float  # the shared step size (median of the chains')
    chain_step_sizes: np.ndarray  # (chains,)
    steps: int  # warm-up steps per chain
    acceptance: float  # mean acceptance probability over the last quarter
    divergent: int  # divergent transitions in the whole warm-up, all chains
    gradients: int  # gradient evaluations in the whole warm-up, all chains
    draws: np.ndarray  # (chains, steps, d) the warm-up draws
    target_acceptance: float  # what the step size aimed for
    started_from: str  # "laplace" or "identity"


def _supports(name: str) -> bool:
    return name in inspect.signature(blackjax.window_adaptation).parameters


def metric_factors(inverse_mass_matrix: np.ndarray):
    """(S, C): S Sᵀ = M (the shape) and C Cᵀ = M⁻¹ (the precision the walker believes),
    both lower triangular, from the metric M."""
    m = np.asarray(inverse_mass_matrix, np.float64)
    m = 0.5 * (m + m.T)
    shape = np.linalg.cholesky(m)
    precision = np.linalg.inv(m)
    return shape, np.linalg.cholesky(0.5 * (precision + precision.T))


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
        Estimate a diagonal metric; default: dense up to d = :data:`DENSE_LIMIT` when
        there are at least :data:`DRAWS_PER_DIM` steps per parameter, else diagonal.
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
    if diagonal is None:
        diagonal = dim > DENSE_LIMIT or steps < DRAWS_PER_DIM * dim
    diagonal = bool(diagonal)
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
