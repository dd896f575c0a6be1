"""Gaussian-limit theory of the gradient samplers (fisherwalk.theory.gradient) against the
published limits, independent quadratures, direct simulations of the samplers' definitions
and BlackJAX's own kernels.

Every statistical tolerance is 4 Monte Carlo standard errors, the error estimated from
independent draws or independent chains (a false alarm rate of about 6e-5 per check).
"""

from __future__ import annotations

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import integrate, optimize, stats

from fisherwalk.errors import InputError
from fisherwalk.theory.gradient import (
    INTEGRATION_TIME,
    NUTS_TARGET_ACCEPTANCE,
    GradientChoice,
    hmc_acceptance,
    hmc_jump,
    hmc_steps_law,
    mala_acceptance,
    mala_jump,
    optimal_gradient_step,
    predicted_ess_per_evaluation,
    step_acceptance,
)
from fisherwalk.theory.randomwalk import optimal_scale


def _within(value, reference, error, what):
    assert abs(value - reference) <= 4.0 * error, (
        f"{what}: {value:.6f} vs {reference:.6f}, 4 SE = {4 * error:.2e}")


# ------------------------------------------------------------ the published limits


def test_mala_optimum_tends_to_published_limit():
    """Roberts & Rosenthal (1998), "Optimal scaling of discrete approximations to Langevin
    diffusions", JRSS B 60(1): as d → ∞ the optimal acceptance is 0.574, with
    h = l²d^(-1/3); l* ≈ 1.65 for unit-variance coordinates (recalled from memory).

    Their limiting speed is l²·2Φ(−K l³/2) with K² = E[(5g‴² − 3g″³)/48] = 1/16 for
    g = −x²/2, so the limit optimum solves Φ(−x) = (3/2)xφ(x), x = l³/8 (scipy's brentq).
    The finite-d gap decays like d^(-1/3) (the first neglected term of the log ratio is
    smaller by a factor h ∝ d^(-1/3)); Richardson extrapolation of d = 10⁶ and 10⁷ with
    that rate removes it. Tolerances: 5e-4 against the published three digits (their
    rounding); 2e-4 and 5e-4 against the limit formula (the O(d^(-2/3)) residual,
    ~1e-4 here).
    """
    x = optimize.brentq(lambda x: stats.norm.cdf(-x) - 1.5 * x * stats.norm.pdf(x), 0.1, 2)
    a_limit, l_limit = 2 * stats.norm.cdf(-x), (8 * x) ** (1 / 3)
    gaps = [abs(optimal_gradient_step("mala", d).acceptance - a_limit)
            for d in (10**3, 10**4, 10**5, 10**6)]
    assert all(later < earlier for earlier, later in zip(gaps, gaps[1:], strict=False))
    six, seven = optimal_gradient_step("mala", 10**6), optimal_gradient_step("mala", 10**7)
    ratio = 10 ** (1 / 3)
    a_ext = (ratio * seven.acceptance - six.acceptance) / (ratio - 1)
    l_ext = (ratio * seven.scale - six.scale) / (ratio - 1)
    assert abs(a_ext - 0.574) < 5e-4
    assert abs(l_ext - 1.65) < 5e-3
    assert abs(a_ext - a_limit) < 2e-4
    assert abs(l_ext - l_limit) < 5e-4


def test_hmc_optimum_tends_to_published_limit():
    """Beskos, Pillai, Roberts, Sanz-Serna & Stuart (2013), "Optimal tuning of the hybrid
    Monte Carlo algorithm", Bernoulli 19(5A): with ε = l d^(-1/4) the efficiency
    a(l)·l is maximised at acceptance 0.651 as d → ∞, for any fixed time t.

    On N(0, I_d) the limit energy error at time t is N(μ, 2μ) with μ = l⁴ sin²t/32, so
    a_t(l) = 2Φ(−l²|sin t|/8); with the module's time jitter the criterion is
    l·E_t[sin²t·a_t(l)]/E[t] (scipy quad and bounded minimiser). Fixed t: the optimum
    solves Φ(−x) = 2xφ(x), acceptance 0.6513; jittered: 0.6514. Tolerances: 5e-4
    against the published three digits; the finite-d optimum at d = 10⁶ within 5e-4 of
    the jittered limit (seen: 1e-3 at 10⁴, 6e-4 at 10⁵, 8e-5 at 10⁶).
    """
    x = optimize.brentq(lambda x: stats.norm.cdf(-x) - 2 * x * stats.norm.pdf(x), 0.1, 2)
    assert abs(2 * stats.norm.cdf(-x) - 0.651) < 5e-4
    lo, hi = INTEGRATION_TIME

    def accept(ell, t):
        return 2 * stats.norm.cdf(-ell * ell * abs(np.sin(t)) / 8)

    def efficiency(ell):
        return ell * integrate.quad(lambda t: np.sin(t) ** 2 * accept(ell, t), lo, hi,
                                    epsabs=1e-13)[0]

    best = optimize.minimize_scalar(lambda ell: -efficiency(ell), bounds=(1.0, 3.0),
                                    method="bounded", options={"xatol": 1e-10}).x
    a_limit = integrate.quad(lambda t: accept(best, t), lo, hi)[0] / (hi - lo)
    assert abs(a_limit - 0.651) < 5e-4
    choice = optimal_gradient_step("hmc", 10**6)
    assert abs(choice.acceptance - a_limit) < 5e-4
    assert abs(choice.scale - best) < 5e-3


# -------------------------------------------- exactness against independent computations


def _polar(log_ratio_at, weight_at):
    """E[min(1, e^(ρ² L(θ))) · ρ^(2k) m(θ)] for (x, z) ~ N(0, I_2) in polar coordinates,
    when the log ratio is the homogeneous quadratic ρ²L(θ) and the weight ρ^(2k)m(θ):
    ∫ρ^(2k+1) e^(−ρ²/2 + ρ² min(L, 0)) dρ = k!·2^k/(1 − 2 min(L, 0))^(k+1)."""
    def integrand(theta, k):
        tilt = min(log_ratio_at(theta), 0.0)
        return weight_at(theta) * np.prod(range(1, k + 1)) * 2**k / (1 - 2 * tilt) ** (k + 1)

    grid = np.linspace(0, 2 * np.pi, 721)
    signs = np.sign([log_ratio_at(t) for t in grid])
    cuts = [optimize.brentq(log_ratio_at, grid[i], grid[i + 1])
            for i in np.flatnonzero(signs[:-1] * signs[1:] < 0)]
    edges = np.concatenate([[0.0], cuts, [2 * np.pi]])
    return lambda k: sum(integrate.quad(integrand, a, b, args=(k,), epsabs=1e-13,
                                        epsrel=1e-12)[0]
                         for a, b in zip(edges[:-1], edges[1:], strict=True)) / (2 * np.pi)


def test_mala_one_dimension_matches_polar_quadrature():
    """d = 1: the Metropolis–Hastings log ratio of MALA (Roberts & Tweedie 1996) written
    from its densities is a homogeneous quadratic in (x, ξ); integrating the radius in
    closed form leaves a 1-D quadrature over the angle (scipy quad, split at the sign
    changes). Tolerance 1e-9: both sides are deterministic to ~1e-12."""
    for scale in (0.7, 1.6, 2.5):
        h = scale**2

        def log_ratio(theta, h=h):
            x, xi = np.cos(theta), np.sin(theta)
            y = (1 - h / 2) * x + np.sqrt(h) * xi
            log_q = lambda to, frm: -(to - (1 - h / 2) * frm) ** 2 / (2 * h)  # noqa: E731
            return -0.5 * y * y + 0.5 * x * x + log_q(x, y) - log_q(y, x)

        def jump(theta, h=h):
            x, xi = np.cos(theta), np.sin(theta)
            return (-(h / 2) * x + np.sqrt(h) * xi) ** 2

        moments_a = _polar(log_ratio, lambda t: 1.0)
        moments_j = _polar(log_ratio, jump)
        assert abs(mala_acceptance(scale, 1) - moments_a(0)) < 1e-9
        assert abs(mala_jump(scale, 1) - moments_j(1)) < 1e-9


def test_hmc_one_dimension_matches_polar_quadrature():
    """d = 1: n leapfrog steps on N(0, 1) are a linear map, so ΔH is a homogeneous
    quadratic in (q, p); same polar quadrature as for MALA, the map built by iterating
    the leapfrog itself. Tolerance 1e-9, as above. Includes an unstable step ε > 2."""
    for eps, steps in ((0.4, 3), (1.3, 2), (1.9, 5), (2.2, 3)):
        def leapfrog(theta, eps=eps, steps=steps):
            q, p = np.cos(theta), np.sin(theta)
            q0 = q
            for _ in range(steps):
                p = p - eps / 2 * q
                q = q + eps * p
                p = p - eps / 2 * q
            return -0.5 * (q * q + p * p) + 0.5, (q - q0) ** 2

        moments_a = _polar(lambda t: leapfrog(t)[0], lambda t: 1.0)
        moments_j = _polar(lambda t: leapfrog(t)[0], lambda t: leapfrog(t)[1])
        assert abs(hmc_acceptance(eps, steps, 1) - moments_a(0)) < 1e-9
        assert abs(hmc_jump(eps, steps, 1) - moments_j(1)) < 1e-9


def test_one_leapfrog_step_is_mala():
    """HMC with one leapfrog step of size ε is MALA with h = ε² (Neal 2011, "MCMC using
    Hamiltonian dynamics", Handbook of MCMC, §5.5; recalled from memory). The two
    reductions share no formula for the quadratic form; tolerance 1e-10."""
    for dim in (1, 3, 40, 5000):
        eps = np.array([0.2, 0.9, 1.7])
        scales = eps * dim ** (1 / 6)  # h = l² d^(-1/3) = ε²
        np.testing.assert_allclose(hmc_acceptance(eps, 1, dim), mala_acceptance(scales, dim),
                                   atol=1e-10)
        np.testing.assert_allclose(hmc_jump(eps, 1, dim), mala_jump(scales, dim), atol=1e-10)


@pytest.mark.parametrize("dim, scale", [(2, 1.2), (3, 1.7), (8, 2.2), (40, 1.5)])
def test_mala_matches_direct_simulation(dim, scale):
    """Fixed-key Monte Carlo of MALA's definition: x, ξ ~ N(0, I_d), the Metropolis–
    Hastings ratio from the target and proposal densities (not the module's reduction);
    4·10⁵ independent draws, tolerance 4 standard errors."""
    rng = np.random.default_rng(20240611 + dim)
    draws = 400_000
    h = scale**2 * dim ** (-1 / 3)
    x, xi = rng.standard_normal((2, draws, dim))
    y = (1 - h / 2) * x + np.sqrt(h) * xi
    log_q = lambda to, frm: -np.sum((to - (1 - h / 2) * frm) ** 2, 1) / (2 * h)  # noqa: E731
    log_ratio = -0.5 * np.sum(y * y - x * x, 1) + log_q(x, y) - log_q(y, x)
    accept = np.minimum(1.0, np.exp(log_ratio))
    jump = accept * np.sum((y - x) ** 2, 1) / dim
    _within(mala_acceptance(scale, dim), accept.mean(), accept.std() / np.sqrt(draws),
            "acceptance")
    _within(mala_jump(scale, dim), jump.mean(), jump.std() / np.sqrt(draws), "jump")


@pytest.mark.slow
@pytest.mark.parametrize("eps, steps, dim", [(0.9, 2, 2), (0.5, 3, 10), (0.25, 6, 100),
                                             (1.99, 4, 3), (0.7, 7, 25)])
def test_hmc_matches_direct_leapfrog(eps, steps, dim):
    """Fixed-key simulation of leapfrog on N(0, I_d): q, p ~ N(0, I_d), ``steps``
    leapfrog steps, acceptance min(1, e^(−ΔH)); 2·10⁵ draws, tolerance 4 standard errors."""
    rng = np.random.default_rng(7 + steps + dim)
    draws = 200_000
    q, p = rng.standard_normal((2, draws, dim))
    start_q, start_h = q, 0.5 * np.sum(q * q + p * p, 1)
    for _ in range(steps):
        p = p - eps / 2 * q
        q = q + eps * p
        p = p - eps / 2 * q
    accept = np.minimum(1.0, np.exp(start_h - 0.5 * np.sum(q * q + p * p, 1)))
    jump = accept * np.sum((q - start_q) ** 2, 1) / dim
    _within(hmc_acceptance(eps, steps, dim), accept.mean(), accept.std() / np.sqrt(draws),
            "acceptance")
    _within(hmc_jump(eps, steps, dim), jump.mean(), jump.std() / np.sqrt(draws), "jump")


def test_steps_law_matches_its_draw_rule():
    """The documented draw n = max(1, ⌊t/ε + u⌋), t ~ U(INTEGRATION_TIME), u ~ U(0, 1),
    simulated with 10⁶ fixed-key draws: each probability within 4 binomial SE."""
    rng = np.random.default_rng(3)
    for eps in (0.3, 1.1, 1.7):
        t = rng.uniform(*INTEGRATION_TIME, 1_000_000)
        n = np.maximum(1, np.floor(t / eps + rng.uniform(size=t.size))).astype(int)
        values, prob = hmc_steps_law(eps)
        assert set(np.unique(n)) <= set(values.tolist())
        for value, p in zip(values, prob, strict=True):
            _within(np.mean(n == value), p, np.sqrt(p * (1 - p) / n.size), f"P(n={value})")


# ---------------------------------------------------------- BlackJAX's own kernels


def _chains(step, init_position, dim, chains, steps, key):
    """Run ``step(key, state) -> (state, stats)`` vmapped over chains from N(0, I_d)
    (the stationary law), returning positions (steps + 1, chains, dim) and the stats."""
    start_key, run_key = jax.random.split(key)
    position = jax.random.normal(start_key, (chains, dim))
    state = jax.vmap(init_position)(position)

    def one(state, k):
        state, extra = jax.vmap(step)(jax.random.split(k, chains), state)
        return state, (state.position, extra)

    _, (positions, extra) = jax.lax.scan(one, state, jax.random.split(run_key, steps))
    positions = np.concatenate([np.asarray(position)[None], np.asarray(positions)])
    return positions, jax.tree.map(np.asarray, extra)


def _chain_errors(per_step):
    """Mean over (steps, chains) and its SE from the spread of the chain means."""
    chain_means = per_step.reshape(per_step.shape[0], per_step.shape[1], -1).mean(axis=(0, 2))
    return chain_means.mean(), chain_means.std(ddof=1) / np.sqrt(chain_means.size)


def _logdensity(x):
    return -0.5 * jnp.sum(x * x)


def _check_realised(positions, acceptance, choice):
    """Realised acceptance probability, J and J₂ against the prediction, 4 chain SE."""
    moved = positions[1:] - positions[:-1]
    squares = positions[1:] ** 2 - positions[:-1] ** 2
    _within(*_chain_errors(acceptance), choice.acceptance, "acceptance")
    _within(*_chain_errors(moved**2), choice.jump_distance, "E[(x' - x)²]")
    _within(*_chain_errors(squares**2), choice.square_jump, "E[(x'² - x²)²]")


@pytest.mark.slow
@pytest.mark.parametrize("dim", [3, 30])
def test_blackjax_mala_realises_the_prediction(dim):
    """blackjax.mala at the theory ``step_size`` on N(0, I_d): its mean acceptance
    probability and squared jumps of x and x² match the prediction (128 chains × 800
    steps from the stationary law; SE from the spread of chain means). This also pins
    the step-size convention: with step_size = h instead of h/2 the predicted acceptance
    at d = 30 would be 0.09 instead of 0.53."""
    choice = optimal_gradient_step("mala", dim)
    algorithm = blackjax.mala(_logdensity, choice.step_size)
    positions, acceptance = _chains(
        lambda k, s: (lambda out: (out[0], out[1].acceptance_rate))(algorithm.step(k, s)),
        algorithm.init, dim, 128, 800, jax.random.key(11))
    _check_realised(positions, acceptance, choice)


@pytest.mark.slow
def test_blackjax_hmc_realises_the_prediction():
    """blackjax.hmc's kernel at the theory step, the number of leapfrog steps drawn each
    step by the documented rule (t ~ U(INTEGRATION_TIME), n = max(1, ⌊t/ε + u⌋)), on
    N(0, I_20): acceptance, J, J₂ and the mean number of steps match (128 chains × 600
    steps; 4 chain SE). Also one fixed n against :func:`hmc_acceptance`."""
    dim = 20
    choice = optimal_gradient_step("hmc", dim)
    kernel = blackjax.hmc.build_kernel()
    metric = jnp.ones(dim)

    def step(key, state, eps=choice.step_size):
        time_key, round_key, move_key = jax.random.split(key, 3)
        t = jax.random.uniform(time_key, minval=INTEGRATION_TIME[0],
                               maxval=INTEGRATION_TIME[1])
        n = jnp.maximum(1, jnp.floor(t / eps + jax.random.uniform(round_key))).astype(int)
        state, info = kernel(move_key, state, _logdensity, eps, metric, n)
        return state, (info.acceptance_rate, n)

    init = lambda x: blackjax.hmc.init(x, _logdensity)  # noqa: E731
    positions, (acceptance, steps) = _chains(step, init, dim, 128, 600, jax.random.key(5))
    _check_realised(positions, acceptance, choice)
    _within(*_chain_errors(steps.astype(float)), choice.gradients_per_step, "mean steps")

    fixed = blackjax.hmc(_logdensity, 0.45, metric, num_integration_steps=4)
    _, acceptance = _chains(
        lambda k, s: (lambda out: (out[0], out[1].acceptance_rate))(fixed.step(k, s)),
        fixed.init, dim, 128, 300, jax.random.key(6))
    _within(*_chain_errors(acceptance), hmc_acceptance(0.45, 4, dim), "fixed-n acceptance")


@pytest.mark.slow
def test_blackjax_nuts_near_the_circle_model():
    """blackjax.nuts at the theory start step on N(0, I_50): its acceptance statistic is
    near the dual-averaging target 0.8 and its leapfrog steps per draw equal the circle
    model's. The model is exact only as d → ∞, so the tolerance on the acceptance is a
    model tolerance, 0.01 (seen: 0.800 at d = 50, 0.797 at d = 25), not a Monte Carlo one
    (whose 4 SE here are ~0.002)."""
    dim = 50
    choice = optimal_gradient_step("nuts", dim)
    algorithm = blackjax.nuts(_logdensity, choice.step_size, jnp.ones(dim))
    _, (acceptance, steps) = _chains(
        lambda k, s: (lambda out: (out[0], (out[1].acceptance_rate,
                                            out[1].num_integration_steps)))(
            algorithm.step(k, s)),
        algorithm.init, dim, 32, 200, jax.random.key(9))
    assert abs(acceptance.mean() - NUTS_TARGET_ACCEPTANCE) < 0.01
    assert np.median(steps) == choice.gradients_per_step


# ------------------------------------------------------------------ the public form


def test_choice_fields_and_conventions():
    for sampler in ("mala", "hmc", "nuts"):
        for dim in (1, 7, 300):
            choice = optimal_gradient_step(sampler, dim)
            assert isinstance(choice, GradientChoice)
            assert choice.sampler == sampler and choice.dim == dim
            assert 0.0 < choice.acceptance < 1.0 and choice.ess_per_gradient > 0.0
            assert optimal_gradient_step(sampler, dim) is choice  # cached
    mala = optimal_gradient_step("mala", 7)
    assert mala.step_size == pytest.approx(0.5 * mala.scale**2 * 7 ** (-1 / 3), rel=1e-14)
    assert step_acceptance("mala", mala.step_size, 7) == pytest.approx(mala.acceptance,
                                                                       abs=1e-12)
    hmc = optimal_gradient_step("hmc", 7)
    assert hmc.step_size == pytest.approx(hmc.scale * 7 ** (-0.25), rel=1e-14)
    values, prob = hmc_steps_law(hmc.step_size)
    assert (values[0], values[-1]) == hmc.integration_steps
    assert prob @ values == pytest.approx(hmc.gradients_per_step, rel=1e-12)
    assert step_acceptance("hmc", hmc.step_size, 7) == pytest.approx(hmc.acceptance,
                                                                     abs=1e-12)
    nuts = optimal_gradient_step("nuts", 7)
    assert nuts.integration_steps is None
    assert step_acceptance("nuts", nuts.step_size, 7) == pytest.approx(NUTS_TARGET_ACCEPTANCE,
                                                                       abs=1e-9)
    curve = step_acceptance("hmc", np.array([[0.2, 0.5], [0.9, 1.4]]), 7)
    assert curve.shape == (2, 2) and np.all(np.diff(curve.ravel()) < 0)


def test_random_walk_ess_prediction():
    """ESS per step of RWM at its optimal matched scale: AR(1) with the exact lag-1
    autocorrelation ρ = 1 − J/(2d) (Geyer 1992, Statistical Science 7(4)); for large d
    about J/(4d) with J → 1.3254 (Roberts, Gelman & Gilks 1997), i.e. ≈ 0.33/d."""
    for dim in (1, 10, 1000):
        jump = optimal_scale(dim).slowest_jump
        assert predicted_ess_per_evaluation("rwm", dim) == pytest.approx(
            jump / (4 - jump), rel=1e-12)
    assert predicted_ess_per_evaluation("rwm", 1000) * 1000 == pytest.approx(0.33, abs=0.01)
    for sampler in ("mala", "hmc", "nuts"):
        assert predicted_ess_per_evaluation(sampler, 50) == \
            optimal_gradient_step(sampler, 50).ess_per_gradient


@pytest.mark.parametrize("call", [
    lambda: optimal_gradient_step("langevin", 3),
    lambda: optimal_gradient_step(None, 3),
    lambda: optimal_gradient_step("mala", 0),
    lambda: optimal_gradient_step("hmc", -2),
    lambda: optimal_gradient_step("nuts", True),
    lambda: optimal_gradient_step("mala", 2.5),
    lambda: predicted_ess_per_evaluation("auto", 3),
    lambda: predicted_ess_per_evaluation("rwm", 0),
    lambda: mala_acceptance(0.0, 3),
    lambda: mala_jump(np.nan, 3),
    lambda: hmc_acceptance(0.5, 0, 3),
    lambda: hmc_acceptance(-0.5, 2, 3),
    lambda: hmc_jump(0.5, 2.0, 3),
    lambda: hmc_steps_law([0.1, 0.2]),
    lambda: step_acceptance("rwm", 0.1, 3),
])
def test_refused_inputs(call):
    with pytest.raises(InputError, match="where:"):
        call()
