"""A planned walk far slower than predicted switches once to NUTS, and says so (workflow/switch.py).

The outside values: on an exact Gaussian the random walk's realised rate is close to its
Gaussian-limit prediction (Roberts, Gelman & Gilks 1997, Ann. Appl. Probab. 7(1)), so it
never switches. On a spike-and-slab mixture 0.3 N(0, 0.03²) + 0.7 N(0, 1) the Laplace
fit sees only the spike (its sd is about 0.03 against the posterior's 0.84), the random
walk's steps are 27 times too short and its rate falls far below the prediction; after the
switch NUTS must answer, with the mixture's mean 0 and variance 0.3 · 0.03² + 0.7
(a mixture's variance is the weighted mean of the components' second moments).
"""

from __future__ import annotations

import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.results.diagnostics import ess_bulk
from fisherwalk.samplers import registry
from fisherwalk.workflow.switch import SWITCH_FACTOR, switch_reason

SPIKE_WEIGHT, SPIKE_SD = 0.3, 0.03
MIXTURE_VARIANCE = SPIKE_WEIGHT * SPIKE_SD**2 + (1 - SPIKE_WEIGHT)


def spike_and_slab(x):  # one coordinate: 0.3 N(0, 0.03²) + 0.7 N(0, 1)
    spike = jnp.log(SPIKE_WEIGHT) - 0.5 * (x / SPIKE_SD) ** 2 - jnp.log(SPIKE_SD)
    slab = jnp.log(1 - SPIKE_WEIGHT) - 0.5 * x**2
    return jnp.sum(jnp.logaddexp(spike, slab))


COV = np.array([[1.0, 0.6, 0.0], [0.6, 2.0, 0.3], [0.0, 0.3, 0.5]])
PREC = np.linalg.inv(COV)


def gaussian(x):
    return -0.5 * x @ jnp.asarray(PREC) @ x


def _switch_notes(trace):
    return [n for n in trace.walker.report.notes if n.startswith("Switched to")]


def test_the_rule_switches_below_a_tenth_of_the_prediction_only():
    walker = fisherwalk.start(gaussian, jnp.zeros(3), jax.random.key(0), sampler="rwm",
                              progress=False)
    predicted = float(walker.family.ess_per_step(walker.tuning))
    draws, steps = 1000, 1000 * walker.chains
    just_above = 1.01 * predicted / SWITCH_FACTOR * steps
    just_below = 0.99 * predicted / SWITCH_FACTOR * steps
    assert switch_reason(walker, just_above, 1.0, draws, 1) == ""
    reason = switch_reason(walker, just_below, 1.0, draws, 1)
    assert "below a tenth" in reason and "'rwm'" in reason
    assert switch_reason(walker, 0.0, float("inf"), draws, 1) != ""  # no ESS at all
    nuts = fisherwalk.start(gaussian, jnp.zeros(3), jax.random.key(0), sampler="nuts",
                            progress=False)
    assert not registry.family("nuts").relies_on_limit
    assert switch_reason(nuts, 0.0, 2.0, draws, 1) == ""  # NUTS is the last resort


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_an_exact_gaussian_never_switches(seed):
    key = jax.random.key(seed)
    walker = fisherwalk.start(gaussian, jnp.zeros(3), key, sampler="rwm", progress=False)
    walker = fisherwalk.refine(walker, jax.random.fold_in(key, 1), progress=False)
    trace = fisherwalk.walk(walker, jax.random.fold_in(key, 2), progress=False)
    assert trace.length.stopped == "targets met"
    assert trace.walker.tuning.sampler == "rwm" and not _switch_notes(trace)


@pytest.mark.slow
def test_a_badly_wrong_prediction_switches_once_and_answers():
    key = jax.random.key(5)
    # no refine: the Laplace tuning (the spike's scale) is what the walk was planned on
    walker = fisherwalk.start(spike_and_slab, jnp.zeros(2), key, sampler="rwm",
                              progress=False)
    assert float(np.sqrt(np.diag(np.linalg.inv(np.asarray(
        walker.report.laplace.fisher))))[0]) < 0.05  # the fit sees the spike only
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        trace = fisherwalk.walk(walker, jax.random.fold_in(key, 1), progress=False)
    notes = _switch_notes(trace)
    assert len(notes) == 1 and "'rwm'" in notes[0]
    assert any("Switched to" in str(w.message) for w in caught)
    assert trace.walker.tuning.sampler == registry.FALLBACK
    assert trace.length.stopped == "targets met"
    flat = np.asarray(trace.flat)  # (chains, draws, d)
    pooled = flat.reshape(-1, flat.shape[-1])
    ess = np.atleast_1d(ess_bulk(flat))
    # Monte Carlo errors: sd / sqrt(ESS) for the mean; for the variance the delta-method
    # sd of x² over sqrt(ESS) (the mixture's 4th moment is 0.7 · 3 + 0.3 · 3 · 0.03⁴)
    fourth = 3 * (1 - SPIKE_WEIGHT) + 3 * SPIKE_WEIGHT * SPIKE_SD**4
    sd_square = np.sqrt(fourth - MIXTURE_VARIANCE**2)
    for j in range(2):
        assert abs(pooled[:, j].mean()) < 4 * np.sqrt(MIXTURE_VARIANCE / ess[j])
        assert abs(np.mean(pooled[:, j] ** 2) - MIXTURE_VARIANCE) < 4 * sd_square / np.sqrt(ess[j])
