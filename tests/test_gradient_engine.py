"""The gradient samplers' compiled loop, warm-up, refused input and BlackJAX hand-off.

Targets are exact Gaussians, whose mean and Fisher information are known in closed form
(mode = mean, H = covariance⁻¹), so the checks compare with exact values; the
tolerances come from the Monte Carlo error of the same draws (ESS-based), 4 standard
errors unless said otherwise. Fixed keys throughout.
"""

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
import pytest

from fisherwalk.engine import gradient, stepsize
from fisherwalk.engine.gradient_checks import check_gradients
from fisherwalk.errors import ModelError
from fisherwalk.results.diagnostics import mcse_mean
from fisherwalk.samplers import registry
from fisherwalk.theory.gradient import hmc_steps_law, optimal_gradient_step
from fisherwalk.workflow import handoff

CHAINS = 4
DIM = 5
SAMPLERS = registry.gradient_names()  # every registered gradient family
# Every sampler aims at its finite-d theory target (fisherwalk.theory.gradient): MALA and
# HMC at the optimum for d = 5, NUTS at BlackJAX's 0.8.
TARGETS = {"mala": None, "hmc": None, "nuts": None}


def _gaussian():
    """An invented correlated Gaussian N(mean, cov) in d = 5 (condition number ~ 20)."""
    rng = np.random.default_rng(20240611)
    a = rng.standard_normal((DIM, DIM))
    cov = a @ a.T / DIM + 0.3 * np.eye(DIM)
    mean = np.linspace(-2.0, 3.0, DIM)
    precision = np.linalg.inv(cov)
    p, m = jnp.asarray(precision), jnp.asarray(mean)

    def logdensity(x):
        r = x - m
        return -0.5 * r @ (p @ r)

    return mean, cov, np.linalg.cholesky(precision), logdensity


MEAN, COV, CHOLESKY, LOGDENSITY = _gaussian()


def _starts(seed):
    z = np.random.default_rng(seed).standard_normal((CHAINS, DIM))
    return MEAN + z @ np.linalg.cholesky(COV).T


def _choice(sampler):
    return optimal_gradient_step(sampler, DIM)


@pytest.fixture(scope="module")
def engines():
    return {s: registry.gradient_engine(s, LOGDENSITY, MEAN, CHOLESKY, CHAINS,
                                             target_acceptance=TARGETS[s])
            for s in SAMPLERS}


@pytest.fixture(scope="module")
def runs(engines):
    """Warm-up (200 steps) then 1000 sampling steps per chain, for every sampler."""
    out = {}
    for k, sampler in enumerate(SAMPLERS):
        engine, choice = engines[sampler], _choice(sampler)
        state = check_gradients(engine, _starts(k))
        warm = stepsize.warm_up(engine, jax.random.key(10 + k), state, choice.step_size)
        state, ctrl, chunks = warm.state, warm.control, []
        for c in range(10):
            chunk = engine.run(jax.random.key(20 + k), 100 * c, state, ctrl, 100)
            state = chunk.state
            chunks.append(jax.device_get(chunk))
        cat = {f: np.swapaxes(np.concatenate([getattr(c, f) for c in chunks]), 0, 1)
               for f in ("position", "acceptance_rate", "divergent", "faults", "gradients")}
        out[sampler] = warm, cat, state
    return out


def _chunk_fields(chunks):
    fields = ("position", "logdensity", "acceptance_rate", "divergent", "gradients", "faults",
              "step_size")
    return {f: np.concatenate([np.asarray(getattr(c, f)) for c in chunks]) for f in fields}


@pytest.mark.slow
@pytest.mark.parametrize("sampler", SAMPLERS)
def test_chunking_does_not_change_the_draws(engines, sampler):
    # Step s draws only from fold_in(key, s): one call of 20 kept draws must equal calls
    # of 7 and 13, bit for bit, adaptation included (its state is carried as data).
    engine, choice = engines[sampler], _choice(sampler)
    state = check_gradients(engine, _starts(5))
    ctrl = gradient.control(choice.step_size, adapt=True)
    key = jax.random.key(3)
    whole = engine.run(key, 0, state, ctrl, 20)
    first = engine.run(key, 0, state, ctrl, 7)
    second = engine.run(key, 7, first.state, first.control, 13)
    one, two = _chunk_fields([whole]), _chunk_fields([first, second])
    for field in one:
        assert np.array_equal(one[field], two[field]), field
    for a, b in zip(jax.tree.leaves((whole.state, whole.control)),
                    jax.tree.leaves((second.state, second.control)), strict=True):
        assert np.array_equal(np.asarray(a), np.asarray(b))
    assert not np.array_equal(one["position"][0], one["position"][-1])  # the chains moved


@pytest.mark.slow
def test_thinning_keeps_every_thin_th_state(engines):
    # Thinning runs the same steps and keeps the last of each group: 4 kept draws of 5
    # steps are steps 4, 9, 14, 19 of a run that keeps all 20 (same key, same start).
    engine, choice = engines["mala"], _choice("mala")
    state = check_gradients(engine, _starts(5))
    ctrl = gradient.control(choice.step_size, adapt=True)
    every = engine.run(jax.random.key(3), 0, state, ctrl, 20)
    thinned = engine.run(jax.random.key(3), 0, state, ctrl, 4, thin=5)
    kept = np.arange(4, 20, 5)
    assert np.array_equal(np.asarray(thinned.position), np.asarray(every.position)[kept])
    assert np.array_equal(np.asarray(thinned.logdensity), np.asarray(every.logdensity)[kept])
    assert np.array_equal(np.asarray(thinned.gradients), np.full((4, CHAINS), 5))
    assert np.allclose(np.asarray(thinned.acceptance_rate),
                       np.asarray(every.acceptance_rate).reshape(4, 5, CHAINS).mean(axis=1))


@pytest.mark.slow
@pytest.mark.parametrize("sampler", SAMPLERS)
def test_acceptance_after_warm_up_matches_the_target(runs, sampler):
    # The realised acceptance at the warmed-up step size against the target dual averaging
    # aimed for. Tolerance: 4 x the combined Monte Carlo error of the sampling phase's mean
    # acceptance probability and of the warm-up's (second half), each sd / sqrt(ESS) of the
    # per-step probabilities: the step size cannot pin the acceptance more precisely than
    # the 200 warm-up steps measured it.
    warm, cat, _ = runs[sampler]
    rates = cat["acceptance_rate"]
    tolerance = 4.0 * np.hypot(stepsize.pooled_mcse(rates), warm.acceptance_mcse)
    assert abs(rates.mean() - warm.target_acceptance) < tolerance, (
        rates.mean(), warm.target_acceptance, tolerance)


@pytest.mark.slow
@pytest.mark.parametrize("sampler", SAMPLERS)
def test_dual_averaging_recovers_from_a_poor_start(engines, sampler):
    # Started at a third of the theory step (acceptance near 1), the warm-up's pooled
    # acceptance over its second half must reach the target within 4 of its Monte Carlo
    # standard errors (ESS of the per-step probabilities).
    engine, choice = engines[sampler], _choice(sampler)
    state = check_gradients(engine, _starts(8))
    warm = stepsize.warm_up(engine, jax.random.key(12), state, choice.step_size / 3.0)
    assert warm.acceptance_rate[:, :10].mean() > warm.target_acceptance + 0.1  # off at first
    assert abs(warm.acceptance - warm.target_acceptance) < 4.0 * warm.acceptance_mcse
    assert warm.step_size > 2.0 * warm.start_step_size


@pytest.mark.parametrize("sampler", SAMPLERS)
def test_posterior_means_within_four_mcse(runs, sampler):
    # Exact mean of the Gaussian; MCSE of each coordinate's mean from the draws' ESS.
    _, cat, _ = runs[sampler]
    draws = cat["position"]  # (chains, draws, d), original coordinates
    error = draws.reshape(-1, DIM).mean(axis=0) - MEAN
    mcse = np.asarray(mcse_mean(draws))
    assert np.all(np.abs(error) < 4.0 * mcse), (error, mcse)
    assert cat["faults"].sum() == 0 and cat["divergent"].sum() == 0
    if sampler == "mala":
        assert np.all(cat["gradients"] == 1)
    elif sampler == "hmc":  # the jittered leapfrog count: values of its law, shared by chains
        values, _ = hmc_steps_law(runs[sampler][0].step_size)
        assert set(np.unique(cat["gradients"])) <= set(values.tolist())
        assert np.all(cat["gradients"] == cat["gradients"][:1])
    else:
        assert cat["gradients"].min() >= 1


@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["hmc", "nuts"])
def test_divergences_are_counted(engines, sampler):
    # A step forced far past the leapfrog's stability limit ε < 2. On the whitened target
    # N(0, I) the leapfrog map of one coordinate is [[1 - e²/2, e], [-e(1 - e²/4), 1 - e²/2]]
    # (theory.md, section 5; Neal 2011, "MCMC using Hamiltonian dynamics", Handbook of
    # MCMC, ch. 5): at e = 8 one step multiplies a coordinate's energy by about
    # (e²/2)² ~ 10³ per dimension, past BlackJAX's divergence threshold (an energy error of
    # 1000) for most starts; HMC's jittered time then gives a single step (t/ε < 1).
    # Either way the counts must be BlackJAX's own, transition by transition.
    engine = engines[sampler]
    state = check_gradients(engine, _starts(6))
    out = engine.run(jax.random.key(4), 0, state, gradient.control(8.0), 20)
    _, infos = _blackjax_path(sampler, 8.0, jax.random.key(4), _starts(6), 20)
    divergent = np.asarray(out.divergent)
    assert np.array_equal(divergent, infos.is_divergent.astype(int))
    assert divergent.mean() > 0.5
    assert np.asarray(out.faults).sum() == 0  # a divergence is not a model fault


def test_nonfinite_gradient_at_the_mode_is_refused():
    def logdensity(x):  # |b| = sqrt(b²): finite value, gradient 0/0 = NaN at b = 0
        return -0.5 * jnp.sum(x**2) + jnp.sqrt(x[1] ** 2)

    engine = registry.gradient_engine("nuts", logdensity, np.zeros(3), np.eye(3), CHAINS)
    with pytest.raises(ModelError) as info:
        check_gradients(engine, np.full((CHAINS, 3), 0.5), names=("a", "b", "c"))
    message = str(info.value)
    assert "b (nan)" in message and "a (" not in message and "c (" not in message
    assert "the mode" in message and 'sampler="rwm"' in message


@pytest.mark.slow
@pytest.mark.parametrize("sampler", SAMPLERS)
def test_nonfinite_gradient_along_the_warm_up_is_refused(sampler):
    def logdensity(x):  # finite value everywhere; gradient NaN in c wherever c >= 1
        return -0.5 * jnp.sum(x**2) + 0.0 * jnp.sqrt(jnp.maximum(1.0 - x[2], 0.0))

    engine = registry.gradient_engine(sampler, logdensity, np.zeros(3), np.eye(3),
                                           CHAINS)
    starts = np.random.default_rng(7).standard_normal((CHAINS, 3))
    starts[:, 2] = -np.abs(starts[:, 2])  # finite gradients at the starts
    state = check_gradients(engine, starts, names=("a", "b", "c"))
    choice = optimal_gradient_step(sampler, 3)
    with pytest.raises(ModelError) as info:  # N(0, 1) puts 16% of c's mass above 1
        stepsize.warm_up(engine, jax.random.key(8), state, choice.step_size, steps=100,
                         names=("a", "b", "c"))
    message = str(info.value)
    assert "c (nan)" in message and "warm-up step" in message and 'sampler="rwm"' in message


def _plain_loop(algorithm, positions, keys):
    """A user's loop: vmapped BlackJAX step in a lax.scan."""
    states = jax.vmap(algorithm.init)(positions)

    def body(states, key):
        states, _ = jax.vmap(algorithm.step)(jax.random.split(key, CHAINS), states)
        return states, states.position

    return np.swapaxes(np.asarray(jax.lax.scan(body, states, keys)[1]), 0, 1)


@pytest.mark.slow
@pytest.mark.parametrize("sampler", SAMPLERS)
def test_blackjax_parameters_run_in_a_plain_loop(runs, sampler):
    # The returned dict in BlackJAX's own call, from the warmed-up chains; the exact mean
    # within 4 MCSE. MALA runs on the whitened density (BlackJAX's MALA has no metric).
    warm, _, state = runs[sampler]
    parameters = handoff.blackjax_parameters(sampler, warm.step_size, CHOLESKY)
    keys = jax.random.split(jax.random.key(30), 1000)
    if sampler == "mala":
        logdensity_z, to_original = handoff.whitened_problem(LOGDENSITY, MEAN, CHOLESKY)
        draws = np.asarray(to_original(_plain_loop(
            blackjax.mala(logdensity_z, **parameters), jnp.asarray(state.position), keys)))
    else:
        algorithm = getattr(blackjax, sampler)(LOGDENSITY, **parameters)
        start = MEAN + np.asarray(state.position) @ gradient.whitening_factor(CHOLESKY).T
        draws = _plain_loop(algorithm, jnp.asarray(start), keys)
    error = draws.reshape(-1, DIM).mean(axis=0) - MEAN
    assert np.all(np.abs(error) < 4.0 * np.asarray(mcse_mean(draws))), error


def _blackjax_path(sampler, step_size, key, starts, draws):
    """BlackJAX's own kernel on the ORIGINAL coordinates, inverse_mass_matrix = H⁻¹, fed
    the engine's per-step keys (and, for HMC, the engine's leapfrog count of each step):
    positions (draws, chains, d) and the infos."""
    parameters = handoff.blackjax_parameters(sampler, step_size, CHOLESKY)
    parameters.pop("num_integration_steps", None)
    if sampler == "hmc":
        kernel = blackjax.hmc.build_kernel()
        init = blackjax.hmc.init
    else:
        algorithm = blackjax.nuts(LOGDENSITY, **parameters)
        init = algorithm.init
        step = jax.jit(jax.vmap(algorithm.step))  # compiled once, not once per step
    states = jax.vmap(lambda x: init(x, LOGDENSITY))(jnp.asarray(starts)) \
        if sampler == "hmc" else jax.vmap(init)(jnp.asarray(starts))
    path, infos = [], []
    for s in range(draws):
        key_jitter, keys = gradient.step_keys(key, s, CHAINS)
        if sampler == "hmc":
            n = int(gradient.integration_steps(key_jitter, jnp.asarray(step_size)))
            states, info = jax.vmap(
                lambda k, st, n=n: kernel(k, st, LOGDENSITY, step_size,
                                          parameters["inverse_mass_matrix"], n))(keys, states)
        else:
            states, info = step(keys, states)
        path.append(np.asarray(states.position))
        infos.append(jax.device_get(info))
    return np.stack(path), jax.tree.map(lambda *a: np.stack(a), *infos)


@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["hmc", "nuts"])
def test_whitened_run_follows_blackjax_on_original_coordinates(engines, runs, sampler):
    # Whitened chains with an identity metric and BlackJAX's kernel on the original
    # coordinates with inverse_mass_matrix = H⁻¹, fed the same per-step keys, take the same
    # path up to rounding (theta = mode + W z, momentum p_theta = W⁻ᵀ p_z; W = chol(H⁻¹) is
    # the factor BlackJAX takes itself). So the step size means the same in both.
    engine, warm = engines[sampler], runs[sampler][0]
    state = check_gradients(engine, _starts(9))
    ours = engine.run(jax.random.key(11), 0, state, gradient.control(warm.step_size), 20)
    path, _ = _blackjax_path(sampler, warm.step_size, jax.random.key(11), _starts(9), 20)
    assert np.allclose(np.asarray(ours.position), path, rtol=0.0, atol=1e-9)
    assert not np.allclose(path[0], path[-1])
