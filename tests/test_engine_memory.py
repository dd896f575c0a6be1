"""The engine makes its random numbers in bounded blocks: splitting a call changes no bit.

Issue 13: ``walk(draws=100, thin=4000)`` at d = 100 made the noise of all 400,000 steps
at once (5.4 GB). The engine now splits a call whose steps need more than
``engine.NOISE_BUDGET`` random numbers; these tests shrink the budget so that both kinds
of split (fewer kept draws per call; part of one kept draw's thin steps per call) happen
on a small run, and compare with the unsplit run bit for bit.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk as fw
from fisherwalk.run import engine


def _logdensity(x):
    return -0.5 * jnp.sum(x**2 * jnp.arange(1.0, 4.0))


def _walk(budget, monkeypatch, thin):
    monkeypatch.setattr(engine, "NOISE_BUDGET", budget)
    walker = fw.start(_logdensity, jnp.zeros(3), jax.random.key(0), chains=2)
    return fw.walk(walker, jax.random.key(1), draws=7, thin=thin, chunk=7, progress=False)


@pytest.mark.parametrize("budget", [
    2 * 4 * 5 * 2,  # two kept draws per call (chains 2 x (d + 1) = 8 numbers per step)
    2 * 4 * 2,      # one kept draw per call, two of its thin steps per call
    8 * 3,          # three thin steps per call: pieces of 3 and a remainder of 2
    1,              # one step per call
])
def test_split_calls_give_the_same_draws(budget, monkeypatch):
    whole = _walk(engine.NOISE_BUDGET, monkeypatch, thin=5)
    split = _walk(budget, monkeypatch, thin=5)
    for name in ("flat", "logdensity", "accepted", "acceptance_rate", "faults"):
        assert np.array_equal(getattr(whole, name), getattr(split, name)), name
    assert np.array_equal(np.asarray(whole.walker.state.position),
                          np.asarray(split.walker.state.position))
