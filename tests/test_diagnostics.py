"""Checks of fisherwalk.results.diagnostics against outside references.

References: arviz 0.23 (ESS, R-hat, MCSE of the mean, sd and quantiles, PSIS k-hat of the
same arrays), the Gaussian AR(1) and the asymptotic law of sample quantiles, statsmodels
(sample autocorrelation), the AR(1) integrated autocorrelation time, the generalized
Pareto law, and the Gaussian expected squared jump.
"""

import warnings

import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter

from fisherwalk.errors import InputError
from fisherwalk.results import diagnostics as dg


@pytest.fixture(autouse=True)
def _arviz_without_numba():
    """ArviZ (0.23) takes a numba path in its MCSE of the sd when numba is installed (pymc
    brings it), and that path fails on numpy 2.4 ("only 0-dimensional arrays can be
    converted"); the reference values here come from its numpy path."""
    try:
        import arviz as az
    except ImportError:
        yield
        return
    was = az.Numba.numba_flag
    az.Numba.disable_numba()
    yield
    if was:
        az.Numba.enable_numba()

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # arviz announces its refactor at import
    import arviz as az


def ar1(seed, rho, chains, draws, dim=None):
    """Stationary AR(1) chains x_t = rho x_{t-1} + e_t, e_t ~ N(0, 1)."""
    rng = np.random.default_rng(seed)
    shape = (chains, draws) if dim is None else (chains, draws, dim)
    noise = rng.normal(size=shape)
    noise[:, 0] /= np.sqrt(1.0 - rho**2)
    return lfilter([1.0], [1.0, -rho], noise, axis=1)


def arviz_value(method_fn, x, method):
    """arviz's statistic of draws (chains, draws, d), as a (d,) array."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return method_fn(az.convert_to_dataset(x), method=method)["x"].values


# ---------------------------------------------------------------------------------------
# integrated autocorrelation time of AR(1) chains
# ---------------------------------------------------------------------------------------

# True value (1 + rho) / (1 - rho): standard time-series result (e.g. Geyer 1992,
# "Practical Markov chain Monte Carlo", Statistical Science 7(4)).
# Tolerances from a replication study run once (200 seeds, 4 chains x 25000 draws,
# numpy default_rng(seed) for seed 0..199): relative sd of the estimate 0.93%, 1.98%,
# 4.31% and relative bias +0.51%, +0.37%, +0.66% for rho = 0, 0.5, 0.9. Tolerance =
# about 4 sd (bias included): 4%, 8%, 17%.
@pytest.mark.parametrize("rho, tolerance", [(0.0, 0.04), (0.5, 0.08), (0.9, 0.17)])
def test_iat_of_ar1_matches_theory(rho, tolerance):
    x = ar1(2024, rho, chains=4, draws=25_000)
    truth = (1.0 + rho) / (1.0 - rho)
    estimate = dg.integrated_autocorrelation_time(x)
    assert isinstance(estimate, float)
    assert abs(estimate / truth - 1.0) < tolerance


def test_iat_per_parameter_shape():
    x = np.stack([ar1(5, 0.0, 4, 20_000), ar1(6, 0.9, 4, 20_000)], axis=-1)
    tau = dg.integrated_autocorrelation_time(x)
    assert tau.shape == (2,)
    # wide bounds (8 sd at this length, same replication study): the two are told apart
    assert abs(tau[0] - 1.0) < 0.1 and abs(tau[1] - 19.0) < 6.0


# ---------------------------------------------------------------------------------------
# agreement with arviz (reference library) on the same arrays, to 1% relative
# ---------------------------------------------------------------------------------------


def _cases():
    rng = np.random.default_rng(11)
    shifted = ar1(12, 0.5, 4, 500, 3) + np.array([0.0, 0.0, 0.0, 1.5])[:, None, None]
    heavy = lfilter([1.0], [1.0, -0.3], rng.standard_t(1.5, size=(4, 800, 3)), axis=1)
    return {
        "ar1 rho 0.5": ar1(10, 0.5, 4, 1000, 3),
        "ar1 rho 0.9, odd draw count": ar1(13, 0.9, 4, 1001, 3),
        "chains with different means": shifted,
        "heavy tails (Student-t 1.5 df)": heavy,
        "antithetic (rho -0.9)": ar1(14, -0.9, 4, 1000, 3),
    }


CASES = _cases()


@pytest.mark.parametrize("case", sorted(CASES))
def test_agrees_with_arviz(case):
    x = CASES[case]
    for ours, method in ((dg.ess_bulk, "bulk"), (dg.ess_tail, "tail"), (dg.ess_mean, "mean")):
        np.testing.assert_allclose(ours(x), arviz_value(az.ess, x, method), rtol=0.01)
    np.testing.assert_allclose(dg.rhat(x), arviz_value(az.rhat, x, "rank"), rtol=0.01)
    np.testing.assert_allclose(dg.mcse_mean(x), arviz_value(az.mcse, x, "mean"), rtol=0.01)


@pytest.mark.parametrize("case", sorted(CASES))
def test_mcse_of_sd_and_quantiles_agree_with_arviz(case):
    # arviz 0.23's mcse(method="sd") and mcse(method="quantile") implement the MCSEs of
    # Vehtari et al. (2021), Bayesian Analysis 16(2). arviz rounds Phi(-1) and Phi(1) to
    # seven digits where fisherwalk uses them exactly; that could move the order
    # statistic picked by one place, but does not on these fixed arrays, so both agree
    # to rounding.
    x = CASES[case]
    np.testing.assert_allclose(dg.mcse_sd(x), arviz_value(az.mcse, x, "sd"), rtol=1e-12)
    for prob in (0.05, 0.25, 0.5, 0.95):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            reference = az.mcse(az.convert_to_dataset(x), method="quantile", prob=prob)
        np.testing.assert_allclose(dg.mcse_quantile(x, prob), reference["x"].values,
                                   rtol=1e-12)


def test_mcse_of_sd_of_ar1_matches_gaussian_theory():
    # Gaussian AR(1), coefficient rho, unit innovations: variance 1 / (1 - rho²); the
    # squared draws have autocorrelations rho^(2k) (Cov(x_s², x_t²) = 2 Cov(x_s, x_t)² for
    # jointly Gaussian variables), so their integrated autocorrelation time is
    # (1 + rho²) / (1 - rho²), and the delta method gives sd(s) = sigma / sqrt(2 N / tau).
    # Tolerance from a replication study run once (60 seeds, 4 x 10000 draws, d = 10,
    # averaging the d columns): ratio 1.0016, sd 0.006; 4 sd + bias = 0.03.
    rho, chains, draws = 0.5, 4, 10_000
    x = ar1(2025, rho, chains, draws, 10)
    tau = (1 + rho**2) / (1 - rho**2)
    truth = np.sqrt(1 / (1 - rho**2)) / np.sqrt(2 * chains * draws / tau)
    assert abs(np.mean(dg.mcse_sd(x)) / truth - 1) < 0.03


@pytest.mark.parametrize("prob, tolerance", [(0.05, 0.15), (0.5, 0.10)])
def test_mcse_of_quantiles_of_iid_normal_match_the_asymptotic_law(prob, tolerance):
    # Independent draws: the sample p-quantile has sd sqrt(p (1 - p) / N) / f(q_p)
    # (asymptotic normality of sample quantiles, e.g. Serfling 1980, Approximation
    # Theorems of Mathematical Statistics, section 2.3; recalled from memory).
    # Tolerance from a replication study run once (60 seeds, 4 x 10000 draws, d = 10,
    # averaging the d columns): ratio 1.012 (sd 0.035) at p = 0.05 and 1.008 (sd 0.024)
    # at p = 0.5; 4 sd + bias.
    x = ar1(2026, 0.0, 4, 10_000, 10)
    truth = np.sqrt(prob * (1 - prob) / x[..., 0].size) / stats.norm.pdf(stats.norm.ppf(prob))
    assert abs(np.mean(dg.mcse_quantile(x, prob)) / truth - 1) < tolerance


def test_mcse_of_sd_and_quantiles_of_stuck_parameters_are_infinite():
    x = np.full((4, 100), 2.5)
    assert dg.mcse_sd(x) == np.inf and dg.mcse_quantile(x, 0.5) == np.inf
    for prob in (0.0, 1.0, 1.5, "half", True):
        with pytest.raises(InputError, match="prob"):
            dg.mcse_quantile(x, prob)


def test_different_means_give_high_rhat():
    # the case above is only a useful check if R-hat is far from 1 there
    assert np.all(dg.rhat(CASES["chains with different means"]) > 1.1)
    assert np.all(dg.rhat(CASES["ar1 rho 0.5"]) < 1.01)


def test_ess_is_capped_for_antithetic_chains():
    # cap N log10 N as in arviz / Vehtari et al. (2021), Bayesian Analysis 16(2)
    x = CASES["antithetic (rho -0.9)"]
    size = 4 * 1000
    cap = size * np.log10(size)
    assert np.all(dg.ess_mean(x) <= cap * (1 + 1e-12))
    np.testing.assert_allclose(dg.ess_mean(x), cap, rtol=1e-12)


def test_scalar_and_vector_inputs():
    x = ar1(3, 0.5, 4, 400, 2)
    for fn in (dg.rhat, dg.ess_bulk, dg.ess_tail, dg.ess_mean, dg.mcse_mean, dg.mcse_sd,
               dg.integrated_autocorrelation_time):
        vector = fn(x)
        assert vector.shape == (2,)
        scalar = fn(x[:, :, 1])
        assert isinstance(scalar, float)
        assert scalar == pytest.approx(vector[1], rel=1e-12)


def test_single_chain_rhat_detects_a_trend():
    rng = np.random.default_rng(4)
    steady = rng.normal(size=(1, 1000))
    trending = steady + np.linspace(0.0, 3.0, 1000)
    assert dg.rhat(steady) < 1.01
    assert dg.rhat(trending) > 1.2


# ---------------------------------------------------------------------------------------
# edge cases
# ---------------------------------------------------------------------------------------


def test_constant_chains_have_zero_ess():
    # an ESS of 0, not the number of draws, for a stuck chain: follows from the
    # definitions (a known pitfall of ESS code; arviz returns the draw count here)
    for x in (np.full((1, 100), 2.5), np.full((4, 100), 2.5),
              np.arange(4.0)[:, None] * np.ones((4, 100))):
        assert dg.ess_bulk(x) == 0.0
        assert dg.ess_tail(x) == 0.0
        assert dg.ess_mean(x) == 0.0
        assert dg.mcse_mean(x) == np.inf
        assert dg.integrated_autocorrelation_time(x) == np.inf
    assert np.isnan(dg.rhat(np.full((4, 100), 2.5)))  # nothing to compare
    assert dg.rhat(np.arange(4.0)[:, None] * np.ones((4, 100))) == np.inf


def test_one_stuck_parameter_does_not_spoil_the_others():
    x = ar1(8, 0.3, 4, 500, 2)
    x[:, :, 0] = 1.0
    ess = dg.ess_bulk(x)
    assert ess[0] == 0.0 and 200 < ess[1] <= 2000


def test_one_frozen_chain_is_exposed_by_rhat():
    x = ar1(9, 0.3, 4, 1000)
    x[2] = 0.0  # stuck at the centre: only the folded R-hat can see it
    assert dg.rhat(x) > 1.05


def test_non_finite_draws_raise():
    x = ar1(1, 0.5, 4, 100, 2)
    x[2, 17, 1] = np.nan
    with pytest.raises(InputError, match="chain 2, draw 17, parameter index 1"):
        dg.ess_bulk(x)
    x[2, 17, 1] = np.inf
    with pytest.raises(InputError, match="non-finite"):
        dg.rhat(x)


def test_too_few_draws_raise():
    with pytest.raises(InputError, match="at least 4"):
        dg.ess_bulk(np.zeros((4, 3)))
    with pytest.raises(InputError, match="dimension"):
        dg.rhat(np.zeros(10))


# ---------------------------------------------------------------------------------------
# autocorrelation: statsmodels as reference
# ---------------------------------------------------------------------------------------


def test_autocorrelation_matches_statsmodels():
    from statsmodels.tsa.stattools import acf

    x = ar1(21, 0.7, 3, 2000, 2)
    ours = dg.autocorrelation(x, 30)
    assert ours.shape == (2, 31)
    for j in range(2):
        reference = np.mean([acf(x[c, :, j], nlags=30, fft=True) for c in range(3)], axis=0)
        np.testing.assert_allclose(ours[j], reference, atol=1e-10)
    assert dg.autocorrelation(x[:, :, 0], 5).shape == (6,)
    with pytest.raises(InputError):
        dg.autocorrelation(x, 2000)


# ---------------------------------------------------------------------------------------
# Pareto k-hat: arviz.psislw as reference; generalized Pareto known law
# ---------------------------------------------------------------------------------------


def _log_weight_cases():
    rng = np.random.default_rng(31)
    normal = rng.normal(size=4000)
    student = rng.standard_t(5, size=4000)
    wide = 1.3 * rng.standard_t(2, size=4000)
    return {
        # Student-t(3) target, normal proposal: heavy-tailed ratios
        "t3 / normal": stats.t.logpdf(normal, df=3) - stats.norm.logpdf(normal),
        # normal target, Student-t(5) proposal: bounded ratios (well behaved)
        "normal / t5": stats.norm.logpdf(student) - stats.t.logpdf(student, df=5),
        "cauchy / scaled t2": stats.t.logpdf(wide, df=1)
        - (stats.t.logpdf(wide / 1.3, df=2) - np.log(1.3)),
    }


@pytest.mark.parametrize("case", sorted(_log_weight_cases()))
def test_khat_matches_arviz(case):
    log_weights = _log_weight_cases()[case]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _, reference = az.psislw(log_weights.copy())
    assert dg.pareto_khat(log_weights) == pytest.approx(float(reference), abs=1e-8)


def test_khat_orders_good_and_bad_proposals():
    cases = _log_weight_cases()
    size = 4000
    assert dg.pareto_khat(cases["normal / t5"]) < dg.khat_threshold(size)
    assert dg.pareto_khat(cases["t3 / normal"]) > dg.pareto_khat(cases["normal / t5"]) + 1.0


@pytest.mark.parametrize("shape", [0.2, 0.5, 0.9])
def test_khat_recovers_generalized_pareto_shape(shape):
    # Weights drawn from a generalized Pareto law with shape xi: the excesses over the
    # tail threshold follow the same law, so k-hat estimates xi.
    # Tolerance: the asymptotic sd of the shape's maximum-likelihood estimate from M
    # excesses is (1 + xi) / sqrt(M) (Hosking & Wallis 1987, "Parameter and quantile
    # estimation for the generalized Pareto distribution", Technometrics 29(3); recalled
    # from memory). With R = 20 replicates of S = 20000 weights (M = 425) the mean has sd
    # (1 + xi) / sqrt(M R) <= 0.021; we allow 4 sd plus the shrinkage toward 0.5 from the
    # weakly informative prior, |0.5 - xi| * 10 / (M + 10) <= 0.01.
    size, replicates = 20_000, 20
    tail = int(np.ceil(3 * np.sqrt(size)))
    estimates = [
        dg.pareto_khat(np.log(stats.genpareto(c=shape).rvs(size=size, random_state=seed)))
        for seed in range(100, 100 + replicates)
    ]
    tolerance = 4 * (1 + shape) / np.sqrt(tail * replicates) + abs(0.5 - shape) * 10 / (tail + 10)
    assert abs(np.mean(estimates) - shape) < tolerance


def test_khat_threshold_formula():
    # min(1 - 1/log10 S, 0.7): Vehtari, Simpson, Gelman, Yao & Gabry (2024), JMLR 25(72)
    assert dg.khat_threshold(100) == pytest.approx(0.5)
    assert dg.khat_threshold(1000) == pytest.approx(2 / 3)
    assert dg.khat_threshold(100_000) == pytest.approx(0.7)


def test_khat_rejects_bad_weights():
    with pytest.raises(InputError, match="NaN"):
        dg.pareto_khat(np.array([0.0] * 50 + [np.nan]))
    # fewer than 5 tail weights to fit (S <= 20, or ties): inf, as arviz.psislw does
    assert dg.pareto_khat(np.random.default_rng(0).normal(size=20)) == np.inf
    # all weights equal: the proposal is the target (an exactly Gaussian posterior against
    # its Laplace approximation): -inf, the best possible value, never a false alarm.
    # (arviz returns inf here; fisherwalk departs on purpose.)
    assert dg.pareto_khat(np.zeros(100)) == -np.inf
    assert dg.pareto_khat(np.full(500, 3.0) + 1e-13 * np.arange(500)) == -np.inf
    assert np.isfinite(dg.pareto_khat(np.random.default_rng(1).normal(size=500)))


# ---------------------------------------------------------------------------------------
# whitened expected squared jump
# ---------------------------------------------------------------------------------------


def test_whitened_jump_of_independent_gaussian_draws():
    # theta ~ N(mode, H^-1) independently: L^T (theta' - theta) ~ N(0, 2 I), so the
    # expected squared jump is 2 d (Gaussian algebra). Per step the variance is
    # Var(2 chi2_d) = 8 d and consecutive steps share a draw, covariance 2 d, so the mean
    # of T steps has variance about (8 d + 2 * 2 d) / T = 12 d / T; tolerance 4 sd.
    rng = np.random.default_rng(41)
    dim, chains, steps = 3, 4, 5000
    a = rng.normal(size=(dim, dim))
    fisher = a @ a.T + dim * np.eye(dim)
    cholesky = np.linalg.cholesky(fisher)
    mode = np.array([1.0, -2.0, 0.5])
    z = rng.normal(size=(chains, steps + 1, dim))
    draws = mode + np.linalg.solve(cholesky.T, z[..., None])[..., 0]  # L^T (theta - mode) = z
    jump = dg.whitened_jump(draws, cholesky)
    assert jump.per_chain.shape == (chains,)
    assert abs(jump.mean - 2 * dim) < 4 * np.sqrt(12 * dim / (steps * chains))
    assert np.all(np.abs(jump.per_chain - 2 * dim) < 4 * np.sqrt(12 * dim / steps))


def test_whitened_jump_exact_small_case():
    # steps 1, 0, 2 scaled by L = 2: squared jumps 4, 0, 16
    jump = dg.whitened_jump(np.array([[0.0, 1.0, 1.0, 3.0]]), 2.0)
    assert jump.mean == pytest.approx(20 / 3)
    with pytest.raises(InputError, match="lower-triangular"):
        dg.whitened_jump(np.zeros((2, 10, 2)), np.array([[1.0, 0.5], [0.5, 1.0]]))
