"""refine()'s metric repair: the random walk learns its shape from its own draws.

The outside value: the covariance of an exact Gaussian N(0, Σ). The pooled covariance of
a random walk's draws estimates Σ (Haario, Saksman & Tamminen 2001, "An adaptive
Metropolis algorithm", Bernoulli 7(2)); each variance to within a relative error of about
sqrt(2 / ESS) (the chi-square law of a sample variance), ESS the effective draws.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

import fisherwalk
from fisherwalk.prepare.metric_repair import OWN_DRAWS_PER_DIM
from fisherwalk.results.diagnostics import ess_bulk

COV = np.array([[1.0, 0.6, 0.0], [0.6, 2.0, 0.3], [0.0, 0.3, 0.5]])
PREC = np.linalg.inv(COV)


def gaussian(x):
    return -0.5 * x @ jnp.asarray(PREC) @ x


def test_the_random_walk_learns_its_shape_from_its_own_draws():
    walker = fisherwalk.start(gaussian, jnp.zeros(3), jax.random.key(3), sampler="rwm",
                              progress=False)
    refined = fisherwalk.refine(walker, jax.random.key(4), reshape=True, progress=False)
    report = refined.report.warmup
    assert report.reshaped and refined.tuning.sampler == "rwm"
    note = next(n for n in report.notes if n.startswith("Learned the proposal shape"))
    assert f"{OWN_DRAWS_PER_DIM * 3} more steps" in note and "own loop" in note
    shape = np.asarray(refined.tuning.shape)
    learned = shape @ shape.T
    # 4 chains x 4/5 of 600 steps at the random walk's ESS per step (bulk ESS of the
    # walk's own draws of the same length stands in for it): 4 relative sds
    trace = fisherwalk.walk(refined, jax.random.key(5), draws=OWN_DRAWS_PER_DIM * 3 * 4 // 5,
                            progress=False)
    ess = np.atleast_1d(ess_bulk(np.asarray(trace.flat)))
    tolerance = 4 * np.sqrt(2 / ess)
    assert np.all(np.abs(np.diag(learned) / np.diag(COV) - 1) < tolerance)
    # and the walk at the learned shape answers correctly: means within 4 MCSE
    draws = np.asarray(trace.flat).reshape(-1, 3)
    assert np.all(np.abs(draws.mean(axis=0)) < 4 * np.sqrt(np.diag(COV) / ess))
