"""A metric learned from draws in windows, on a gradient family's own compiled engine.

When the Laplace metric is wrong (PSIS k̂ high, a warm-up covariance far from H⁻¹) or
there is none (no mode), the metric has to come from draws. The schedule is Stan's
(Carpenter et al. 2017, "Stan: a probabilistic programming language", J. Stat. Softw.
76(1)): a first window that only moves the chains and the step size, then windows of
doubling length, after each of which the metric is re-estimated from that window's
draws alone (so that early, unrepresentative draws are forgotten), with dual averaging
of the step size (Hoffman & Gelman 2014, JMLR 15, section 3.2.1) restarted at every
change of metric.

What differs from BlackJAX's ``window_adaptation`` (which :mod:`fisherwalk.prepare.draws_warmup`
delegates to for the random walk) is where it runs: on the family's own engine
(:mod:`fisherwalk.engine.gradient`), whose compiled loop takes the metric and the step size
as data. A new metric is a new argument, not a new program, so learning it compiles
nothing beyond the program that the warm-up and the walk use anyway (one compilation
instead of two; benchmarks/phases.py counts them). The draws of all chains are pooled
for each estimate (chains × window draws, where BlackJAX estimates one metric per chain
from that chain's draws alone).

The estimate of each window: the pooled sample covariance, shrunk toward its own
diagonal with weight d / (d + n) for n pooled draws (the sample eigenvalues spread as
(1 ± √(d/n))², Marchenko & Pastur 1967, Math. USSR Sbornik 1(4); the weight is our
choice, common practice, no published source), diagonal beyond d = :data:`DENSE_LIMIT`,
and then regularised toward the previous metric as Stan regularises toward a multiple of
the identity, n/(n + 5) Σ̂ + 5/(n + 5) M_previous.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import jax
import numpy as np

from ..engine.stepsize import warm_up
from .stepfamily import dual_averaging_target

__all__ = ["LearnedMetric", "learn_on_engine", "estimate_metric", "metric_factors",
           "schedule", "DENSE_LIMIT", "WINDOW_CHUNK"]

DENSE_LIMIT = 100  # a dense metric up to this d, diagonal beyond (d² memory, d³ Cholesky);
#                    our choice, common practice, no published source
WINDOW_CHUNK = 100  # every window is whole calls of this many steps: the walk's own program
REGULARISATION = 5.0  # Stan's n / (n + 5) weight on the window's estimate


class LearnedMetric(NamedTuple):
    """What a warm-up that learns the metric from draws learned (chain axis first)."""

    position: np.ndarray  # (chains, d) the chains at the end of the warm-up
    logdensity: np.ndarray  # (chains,)
    inverse_mass_matrix: np.ndarray  # (d, d) the shared metric (dense even when diagonal)
    diagonal: bool  # whether the metric was estimated as a diagonal
    step_size: float  # the shared step size
    chain_step_sizes: np.ndarray  # (chains,)
    steps: int  # warm-up steps per chain
    acceptance: float  # mean acceptance probability over the last quarter
    divergent: int  # divergent transitions in the whole warm-up, all chains
    gradients: int  # gradient evaluations in the whole warm-up, all chains
    draws: np.ndarray  # (chains, steps, d) the warm-up draws
    target_acceptance: float  # what the step size aimed for
    started_from: str  # "laplace", "identity" or "warm-up"
    how: str = "BlackJAX's window adaptation"  # who learned it, in words


def metric_factors(inverse_mass_matrix: np.ndarray):
    """(S, C): S Sᵀ = M (the shape) and C Cᵀ = M⁻¹ (the precision the walker believes),
    both lower triangular, from the metric M."""
    m = np.asarray(inverse_mass_matrix, np.float64)
    m = 0.5 * (m + m.T)
    shape = np.linalg.cholesky(m)
    precision = np.linalg.inv(m)
    return shape, np.linalg.cholesky(0.5 * (precision + precision.T))


def schedule(steps: int) -> tuple[int, tuple[int, ...], int]:
    """(burn, windows, final) for a warm-up of ``steps`` per chain from no metric at all,
    in whole chunks: a first and a last window of :data:`WINDOW_CHUNK` (Stan's fast
    windows, 75 and 50 steps there), and between them windows of doubling length from
    one chunk, the last taking what remains (Stan's 25, 50, ...; Carpenter et al. 2017).
    1000 steps give 100 | 100, 200, 500 | 100."""
    chunk = WINDOW_CHUNK
    slow = max(chunk, int(np.ceil(steps / chunk) * chunk) - 2 * chunk)
    windows, size, used = [], chunk, 0
    while used + size + 2 * size <= slow:
        windows.append(size)
        used += size
        size *= 2
    windows.append(slow - used)
    return chunk, tuple(windows), chunk


def estimate_metric(draws: np.ndarray, previous: np.ndarray,
                    diagonal: bool = False) -> tuple[np.ndarray, bool]:
    """The metric from one window's draws (chains, steps, d), and whether it is diagonal
    (module docstring: shrunk toward its diagonal, regularised toward ``previous``;
    ``diagonal`` asks for a diagonal one at any d)."""
    pooled = np.asarray(draws, np.float64).reshape(-1, draws.shape[-1])
    n, d = pooled.shape
    cov = np.atleast_2d(np.cov(pooled, rowvar=False))
    diagonal = bool(diagonal) or d > DENSE_LIMIT
    if diagonal:
        estimate = np.diag(np.diag(cov))
    else:
        weight = d / (d + n)
        estimate = (1.0 - weight) * cov + weight * np.diag(np.diag(cov))
    previous = np.asarray(previous, np.float64)
    metric = (n * estimate + REGULARISATION * previous) / (n + REGULARISATION)
    return 0.5 * (metric + metric.T), diagonal


def learn_on_engine(family, flat_logdensity, tuning, centre, chains: int, devices: Any,
                    positions, rng_key, names, *, first_draws=None, burn: int = 0,
                    windows: tuple[int, ...] = (100, 200), final: int = 0,
                    started_from: str = "laplace", diagonal: bool = False) -> LearnedMetric:
    """Learn a gradient family's metric and step size in windows on its own engine.

    Parameters
    ----------
    family
        A gradient family (:class:`~fisherwalk.samplers.family.Family` with
        ``learns_metric``), e.g. the registry's NUTS.
    flat_logdensity
        The log posterior on the ravelled position.
    tuning
        The family's tuning to start from: its metric (S Sᵀ) and step size; its aim.
    centre, chains, devices
        What the family's engine is built with (``Family.engine``).
    positions
        (chains, d) where the chains start, original coordinates.
    rng_key
        A typed JAX key.
    names
        Parameter names, for the engine's fault messages.
    first_draws
        (chains, steps, d) draws already made at ``tuning``'s metric (refine's phase 1):
        the first estimate is made from them, before any step here.
    burn
        Steps run first whose draws are not used for the metric (chains far from the
        bulk; Stan's initial fast window).
    windows
        Lengths of the windows after each of which the metric is re-estimated.
    final
        Steps of a last window that adapts only the step size, at the final metric.
    diagonal
        Estimate a diagonal metric at any d (a posterior with no mode: a funnel's global
        covariance is no metric for its neck; on the centred 8-group model a dense one
        left the lower tail of log τ under-visited, 5.5 MCSE, with no divergence to say
        so, where a diagonal one was within 0.3 MCSE).
    """
    dtype = np.asarray(tuning.shape).dtype
    metric = np.asarray(tuning.shape, np.float64) @ np.asarray(tuning.shape, np.float64).T
    estimated_diagonal = bool(diagonal)
    if first_draws is not None:
        metric, estimated_diagonal = estimate_metric(first_draws, metric, diagonal)
    step = float(tuning.step_size)
    positions = np.asarray(positions)
    draws, divergent, gradients, steps, last = [], 0, 0, 0, None
    plan = ([(burn, False)] if burn else []) + [(w, True) for w in windows] + \
        ([(final, False)] if final else [])
    for index, (length, estimate) in enumerate(plan):
        length = int(np.ceil(length / WINDOW_CHUNK) * WINDOW_CHUNK)
        shape, precision_chol = metric_factors(metric)
        current = tuning._replace(shape=shape.astype(dtype), whitening=precision_chol.astype(dtype),
                                  shape_kind="warm-up", step_size=step)
        engine = family.engine(flat_logdensity, current, centre, chains, devices)
        state = family.init(engine, positions.astype(dtype), None, None, names)
        last = warm_up(engine, jax.random.fold_in(rng_key, index), state, step,
                       steps=length, chunk=WINDOW_CHUNK, names=names)
        positions = family.positions(engine, last.state)
        step = float(last.step_size)
        draws.append(last.position)
        divergent += int(last.divergent.sum())
        gradients += int(last.gradients.sum())
        steps += length
        if estimate:
            metric, estimated_diagonal = estimate_metric(last.position, metric, diagonal)
    if last is None:  # nothing to run: the estimate from first_draws alone
        return LearnedMetric(positions, np.full(chains, np.nan), metric, estimated_diagonal,
                             step,
                             np.full(chains, step), 0, float("nan"), 0, 0,
                             np.zeros((chains, 0, positions.shape[-1])),
                             dual_averaging_target(tuning), started_from,
                             "draws already made")
    quarter = max(1, last.acceptance_rate.shape[1] // 4)
    return LearnedMetric(
        np.asarray(positions), np.asarray(last.logdensity[:, -1]), metric, estimated_diagonal,
        step,
        np.full(chains, step), steps, float(np.mean(last.acceptance_rate[:, -quarter:])),
        divergent, gradients, np.concatenate(draws, axis=1), float(last.target_acceptance),
        started_from, "windows on the sampler's own engine")
