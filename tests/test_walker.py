"""start(): the tuned walker. Checks against the Gaussian limit of random-walk Metropolis
(Roberts, Gelman & Gilks 1997, "Weak convergence and optimal scaling of random walk
Metropolis algorithms", Ann. Appl. Probab. 7(1)) and the package's own contracts."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.results import diagnostics


def _gaussian(d, condition, seed):
    """N(m, C) with C's eigenvalues log-spaced over `condition`, random rotation."""
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.normal(size=(d, d)))
    eig = np.logspace(0, np.log10(condition), d) if d > 1 else np.array([condition])
    cov = (q * eig) @ q.T
    prec = jnp.asarray(np.linalg.inv(cov))
    mean = jnp.asarray(rng.normal(size=d) * 3)

    def logdensity(x):
        r = x - mean
        return -0.5 * r @ prec @ r

    return logdensity, np.asarray(mean), cov


@pytest.mark.slow
@pytest.mark.parametrize("d", [1, 4, 20])
def test_acceptance_matches_theory_on_gaussian(d):
    # On an exactly Gaussian target the Laplace fit is exact, so the chains start in
    # stationarity and the mean acceptance probability must equal a*(d), the Gaussian-limit
    # acceptance at l*(d), for every finite d (the finite-d formula of optimal_scale).
    # Condition number 10^4: the Fisher-shaped proposal removes it entirely.
    # Tolerance: 4 Monte Carlo standard errors of the mean acceptance probability,
    # estimated from the run itself (ESS of the per-step acceptance probabilities).
    logdensity, mean, cov = _gaussian(d, 1e4, seed=d)
    walker = fisherwalk.start(logdensity, jnp.zeros(d), jax.random.key(d), chains=16)
    choice = fisherwalk.optimal_scale(d)
    assert walker.tuning.scale == pytest.approx(choice.scale)
    assert walker.tuning.target_acceptance == pytest.approx(choice.acceptance)
    np.testing.assert_allclose(np.asarray(walker.report.laplace.mode_flat), mean, atol=1e-6)
    trace = fisherwalk.walk(walker, jax.random.key(100 + d), draws=1500, progress=False)
    rates = trace.acceptance_rate
    mcse = rates.std() / np.sqrt(diagnostics.ess_mean(rates))
    assert abs(rates.mean() - choice.acceptance) < 4 * mcse + 1e-3, (rates.mean(), mcse)


def test_pytree_round_trip():
    # A dict position with a scalar, a vector and a matrix leaf keeps its structure
    # through the mode, the chain states and the draws.
    def logdensity(p):
        return (-0.5 * (p["s"] - 1.0) ** 2 - 0.5 * jnp.sum((p["v"] + 2.0) ** 2)
                - 0.5 * jnp.sum(p["m"] ** 2))

    position = {"s": jnp.asarray(0.0), "v": jnp.zeros(3), "m": jnp.zeros((2, 2))}
    walker = fisherwalk.start(logdensity, position, jax.random.key(0), chains=3)
    fit = walker.report.laplace
    assert jax.tree.structure(fit.mode) == jax.tree.structure(position)
    np.testing.assert_allclose(fit.mode["s"], 1.0, atol=1e-8)
    np.testing.assert_allclose(fit.mode["v"], -2.0, atol=1e-8)
    assert walker.states.position["m"].shape == (3, 2, 2)
    assert walker.states.position["s"].shape == (3,)
    trace = fisherwalk.walk(walker, jax.random.key(1), draws=50, progress=False)
    assert trace.draws["m"].shape == (3, 50, 2, 2)
    assert trace.draws["v"].shape == (3, 50, 3)
    assert trace.draws["s"].shape == (3, 50)
    assert walker.names[:4] == ("m[0,0]", "m[0,1]", "m[1,0]", "m[1,1]")
    # The flat draws and the pytree draws are the same numbers.
    np.testing.assert_array_equal(trace.flat[:, :, 4], trace.draws["s"])


@pytest.mark.slow
def test_states_run_in_the_users_blackjax_loop():
    # The walker's algorithm is BlackJAX's random walk: vmap(step) over the batched states.
    logdensity, _, _ = _gaussian(3, 10.0, seed=0)
    walker = fisherwalk.start(logdensity, jnp.zeros(3), jax.random.key(0), chains=4)
    keys = jax.random.split(jax.random.key(5), 4)
    states, info = jax.vmap(walker.algorithm.step)(keys, walker.states)
    assert states.position.shape == (4, 3)
    assert info.is_accepted.shape == (4,)


@pytest.mark.parametrize("shape", ["diagonal", "identity"])
def test_other_shapes_use_their_spectrum(shape):
    logdensity, _, cov = _gaussian(5, 100.0, seed=2)
    walker = fisherwalk.start(logdensity, jnp.zeros(5), jax.random.key(0), shape=shape)
    prec = np.linalg.inv(cov)
    s = np.asarray(walker.tuning.shape)
    expected = np.sort(np.linalg.eigvalsh(s.T @ prec @ s))
    np.testing.assert_allclose(walker.tuning.spectrum, expected, rtol=1e-6)
    choice = fisherwalk.optimal_scale(5, expected)
    assert walker.tuning.scale == pytest.approx(choice.scale, rel=1e-6)
    assert walker.tuning.target_acceptance < fisherwalk.optimal_scale(5).acceptance


def test_bad_inputs_are_refused():
    logdensity, _, _ = _gaussian(2, 10.0, seed=0)
    key = jax.random.key(0)
    with pytest.raises(fisherwalk.InputError, match="chains"):
        fisherwalk.start(logdensity, jnp.zeros(2), key, chains=0)
    with pytest.raises(fisherwalk.InputError, match="not a known proposal shape"):
        fisherwalk.start(logdensity, jnp.zeros(2), key, shape="round")
    with pytest.raises(fisherwalk.InputError, match="not symmetric"):
        fisherwalk.start(logdensity, jnp.zeros(2), key, shape=np.array([[1.0, 0.5], [0.0, 1.0]]))
    with pytest.raises(fisherwalk.InputError, match="not positive definite"):
        fisherwalk.start(logdensity, jnp.zeros(2), key, shape=np.array([[1.0, 2.0], [2.0, 1.0]]))
    with pytest.raises(fisherwalk.InputError, match="random key"):
        fisherwalk.start(logdensity, jnp.zeros(2), 7)
    # Old-style uint32 keys are accepted and give the same walker as the typed key.
    a = fisherwalk.start(logdensity, jnp.zeros(2), jax.random.PRNGKey(3))
    b = fisherwalk.start(logdensity, jnp.zeros(2), jax.random.key(3))
    np.testing.assert_array_equal(a.states.position, b.states.position)


@pytest.mark.slow
def test_start_warns_when_restarts_find_another_mode():
    # An equal mixture of N(-3, 1) and N(3, 1): restarts from a box around both modes
    # find both, and start() says out loud that one Laplace approximation cannot
    # describe this posterior (the walker is still returned, for the user to judge).
    def logdensity(x):
        return jnp.logaddexp(-0.5 * (x[0] - 3.0) ** 2, -0.5 * (x[0] + 3.0) ** 2)

    with pytest.warns(fisherwalk.FisherwalkWarning, match="does not describe the posterior"):
        walker = fisherwalk.start(logdensity, jnp.asarray([2.0]), jax.random.key(3),
                                  restarts=8, box=(-8.0, 8.0))
    assert len(walker.report.laplace.modes) == 2
    assert any("does not describe the posterior" in n for n in walker.report.notes)
