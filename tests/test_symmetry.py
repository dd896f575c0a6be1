"""Label switching said, not missed: an exchangeable two-component mixture.

The posterior of an exchangeable mixture is invariant under permuting the labels
(Stephens 2000, "Dealing with label switching in mixture models", JRSS B 62(4)): the
log density at (μ₁, μ₂) equals the one at (μ₂, μ₁) exactly. The data are invented (a
demo scenario: 200 points from 0.5 N(-2, 1) + 0.5 N(2, 1)); the check is the symmetry
itself, which holds for any data, and its absence when the weights differ (0.3, 0.7).
"""

from __future__ import annotations

import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.fit.symmetry import label_swaps

rng = np.random.default_rng(5)
DATA = np.where(rng.random(200) < 0.5, -2.0, 2.0) + rng.standard_normal(200)


def mixture(weights):
    w = jnp.asarray(weights)

    def logdensity(p):
        mu = p["mu"]
        comp = jnp.log(w) - 0.5 * (jnp.asarray(DATA)[:, None] - mu) ** 2
        return jnp.sum(jax.scipy.special.logsumexp(comp, axis=1)) - 0.5 * jnp.sum(mu**2) / 25

    return logdensity


def _start(weights):
    p0 = {"mu": jnp.array([-1.0, 1.0])}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        walker = fisherwalk.start(mixture(weights), p0, jax.random.key(0), progress=False)
    return walker, [str(w.message) for w in caught if "Label switching" in str(w.message)]


@pytest.mark.slow
def test_an_exchangeable_mixture_is_said_to_be_symmetric():
    walker, said = _start([0.5, 0.5])
    mode = np.asarray(walker.report.laplace.mode_flat)
    assert mode[0] < -1.5 and mode[1] > 1.5  # one labelling's mode, near (-2, 2)
    assert said and "mu[0] <-> mu[1]" in said[0] and "one labelling" in said[0]
    assert any("Label switching" in n for n in walker.report.notes)


@pytest.mark.slow
def test_unequal_weights_break_the_symmetry_and_nothing_is_said():
    _, said = _start([0.3, 0.7])
    assert not said


def test_swaps_cover_leaves_that_share_labels():
    mode = {"mu": np.zeros(3), "log_sd": np.zeros(3), "a": np.zeros(2), "b": np.zeros(2)}
    described = [text for text, _ in label_swaps(mode)]
    assert "labels 0 <-> 1 of log_sd, mu together (first axis 3)" in described
    assert "a <-> b" in described
