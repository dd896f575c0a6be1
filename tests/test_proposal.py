"""The Metropolis kernel: same draws as BlackJAX's, the right proposal covariance,
and NaN/+inf proposals rejected."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from jax.flatten_util import ravel_pytree

from fisherwalk.engine import proposal


def _factor(d, seed=0):
    rng = np.random.default_rng(seed)
    m = rng.normal(size=(d, d))
    fisher = m @ m.T + d * np.eye(d)
    chol = jnp.asarray(np.linalg.cholesky(fisher))
    return fisher, proposal.proposal_factor(proposal.shape_from_cholesky(chol), 2.4)


def test_shape_from_cholesky_gives_inverse_fisher():
    fisher, _ = _factor(5)
    shape = proposal.shape_from_cholesky(jnp.asarray(np.linalg.cholesky(fisher)))
    np.testing.assert_allclose(shape @ shape.T, np.linalg.inv(fisher), rtol=1e-10, atol=1e-12)
    assert np.allclose(np.tril(shape, -1), 0.0)  # upper triangular


@pytest.mark.slow
def test_step_matches_blackjax_bit_for_bit():
    # The kernel the engine runs must be BlackJAX's normal random walk with sigma = factor.
    _, factor = _factor(3)
    template = {"a": jnp.zeros(2), "b": jnp.asarray(0.5)}
    flat0, unravel = ravel_pytree(template)

    def logdensity(p):
        return -0.5 * jnp.sum(p["a"] ** 2) - 2.0 * p["b"] ** 2

    algorithm = proposal.blackjax_algorithm(logdensity, factor)
    bj_state = algorithm.init(template)
    state = proposal.FlatState(flat0, logdensity(template))
    for i in range(200):
        key = jax.random.key(i)
        bj_state, bj_info = algorithm.step(key, bj_state)
        state, info = proposal.step(key, state, lambda v: logdensity(unravel(v)), factor)
        assert np.array_equal(ravel_pytree(bj_state.position)[0], state.position)
        assert bj_state.logdensity == state.logdensity
        assert bool(bj_info.is_accepted) == bool(info.is_accepted)


@pytest.mark.slow
@pytest.mark.parametrize("use_blackjax", [False, True])
def test_proposal_covariance(use_blackjax):
    # On a flat target every proposal is accepted, so the moves are the proposed steps.
    # Their covariance must be F Fᵀ = (l²/d) H⁻¹ (BlackJAX applies sigma as sigma @ z).
    # Monte Carlo error of a sample covariance entry: sd = sqrt((S_ii S_jj + S_ij²)/n);
    # we allow 5 sd per entry (16 entries: a false alarm has probability < 1e-5).
    d, n = 4, 100_000
    fisher, factor = _factor(d, seed=1)
    x0 = jnp.zeros(d)
    keys = jax.random.split(jax.random.key(42), n)
    if use_blackjax:
        algorithm = proposal.blackjax_algorithm(lambda x: 0.0 * jnp.sum(x), factor)
        states, _ = jax.vmap(algorithm.step, in_axes=(0, None))(keys, algorithm.init(x0))
        moves = np.asarray(states.position)
    else:
        state = proposal.FlatState(x0, jnp.asarray(0.0))
        states, info = jax.vmap(proposal.step, in_axes=(0, None, None, None))(
            keys, state, lambda x: 0.0 * jnp.sum(x), factor)
        assert bool(info.is_accepted.all())
        moves = np.asarray(states.position)
    expected = (2.4**2 / d) * np.linalg.inv(fisher)
    np.testing.assert_allclose(np.asarray(factor @ factor.T), expected, rtol=1e-10)
    empirical = moves.T @ moves / n  # the mean is zero by construction
    sd = np.sqrt((np.outer(np.diag(expected), np.diag(expected)) + expected**2) / n)
    assert np.all(np.abs(empirical - expected) < 5 * sd)


@pytest.mark.slow
@pytest.mark.parametrize("bad", [jnp.nan, jnp.inf])
def test_non_finite_proposals_are_rejected_and_flagged(bad):
    # Log density: standard normal, but `bad` (NaN or +inf) for x > 0.5.
    def logdensity(x):
        return jnp.where(x[0] > 0.5, bad, -0.5 * jnp.sum(x**2))

    factor = jnp.eye(1) * 2.0
    state = proposal.FlatState(jnp.zeros(1), jnp.asarray(0.0))
    keys = jax.random.split(jax.random.key(3), 2000)
    states, info = jax.vmap(proposal.step, in_axes=(0, None, None, None))(
        keys, state, logdensity, factor)
    pos = np.asarray(states.position[:, 0])
    faults = np.asarray(info.fault)
    assert faults.sum() > 100  # P(z*2 > 0.5) is about 0.4
    assert np.all(pos <= 0.5)  # never accepted
    assert np.all(np.isfinite(np.asarray(states.logdensity)))
    assert not np.asarray(info.is_accepted)[faults].any()
    # The same with BlackJAX's algorithm (guarded log density): never accepted either.
    algorithm = proposal.blackjax_algorithm(logdensity, factor)
    bj_states, _ = jax.vmap(algorithm.step, in_axes=(0, None))(keys, algorithm.init(jnp.zeros(1)))
    assert np.all(np.asarray(bj_states.position) <= 0.5)


def test_multiplier_one_changes_nothing():
    _, factor = _factor(3)
    state = proposal.FlatState(jnp.ones(3), jnp.asarray(-1.5))
    f = lambda x: -0.5 * jnp.sum(x**2)  # noqa: E731
    a, _ = proposal.step(jax.random.key(0), state, f, factor)
    b, _ = proposal.step(jax.random.key(0), state, f, factor, jnp.exp(0.0))
    assert np.array_equal(a.position, b.position)
