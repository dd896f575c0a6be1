"""The invented demo data sets: reproducible, shaped as documented, and their log
posteriors equal to independent computations with scipy and statsmodels."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import statsmodels.api as sm
from scipy import special, stats

import fisherwalk
from fisherwalk.cli import scenarios
from fisherwalk.errors import InputError


@pytest.fixture(scope="module")
def logistic():
    return scenarios.logistic()


@pytest.fixture(scope="module")
def poisson():
    return scenarios.poisson()


@pytest.fixture(scope="module", params=["logistic", "poisson"])
def scene(request, logistic, poisson):
    return {"logistic": logistic, "poisson": poisson}[request.param]


def _statsmodels_fit(scene):
    family = sm.families.Binomial() if scene.name == "logistic" else sm.families.Poisson()
    return sm.GLM(scene.y, scene.X, family=family, offset=scene.offset).fit()


def test_documented_sizes(logistic, poisson):
    assert logistic.X.shape == (20_000, 8) and logistic.y.shape == (20_000,)
    assert poisson.X.shape == (6_000, 6) and poisson.y.shape == (6_000,)
    for scene in (logistic, poisson):
        p = scene.X.shape[1]
        assert len(scene.names) == p == len(scene.true_beta) == len(scene.parameter_names)
        assert scene.raw.shape == (scene.X.shape[0], p - 1) == (scene.X.shape[0],
                                                                  len(scene.columns))
        np.testing.assert_array_equal(scene.X[:, 0], 1.0)
        np.testing.assert_allclose(scene.X[:, 1:].mean(axis=0), 0.0, atol=1e-12)
        np.testing.assert_allclose(scene.X[:, 1:].std(axis=0), 1.0, rtol=1e-12)
        assert scene.initial_position["beta"].shape == (p,)
        assert scene.story and "invented" in scene.story
    assert set(np.unique(logistic.y)) == {0.0, 1.0}
    assert np.all(poisson.y >= 0) and np.all(poisson.y == np.round(poisson.y))


def test_same_seed_same_data_other_seed_other_data():
    a, b = scenarios.logistic(n=500), scenarios.logistic(n=500)
    np.testing.assert_array_equal(a.X, b.X)
    np.testing.assert_array_equal(a.y, b.y)
    c = scenarios.logistic(n=500, seed=1)
    assert not np.array_equal(a.y, c.y)


def test_predictors_are_correlated_as_the_story_says(logistic):
    # temperature/humidity drawn with correlation 0.55; with n = 20,000 the sample
    # correlation's standard error is (1 - r²)/sqrt(n) ≈ 0.005, so 0.03 is 6 se.
    r = np.corrcoef(logistic.raw, rowvar=False)
    assert abs(r[0, 1] - 0.55) < 0.03
    # months in storage drive the number of openings (Poisson with log-linear mean)
    assert r[2, 6] > 0.3


@pytest.mark.parametrize("name", ["logistic", "poisson"])
def test_logdensity_equals_scipy_log_likelihood_plus_prior(name, logistic, poisson):
    scene = {"logistic": logistic, "poisson": poisson}[name]
    rng = np.random.default_rng(3)
    for _ in range(2):
        beta = scene.true_beta + 0.05 * rng.standard_normal(len(scene.true_beta))
        eta = scene.X @ beta + scene.offset
        if name == "logistic":
            loglik = stats.bernoulli.logpmf(scene.y, special.expit(eta)).sum()
            dropped = 0.0
        else:
            loglik = stats.poisson.logpmf(scene.y, np.exp(eta)).sum()
            dropped = -special.gammaln(scene.y + 1.0).sum()  # -log y! is left out
        prior = stats.norm.logpdf(beta, 0.0, scene.prior_sd).sum()
        prior_constant = -len(beta) * np.log(scene.prior_sd * np.sqrt(2 * np.pi))
        ours = float(scene.logdensity({"beta": jnp.asarray(beta)}))
        np.testing.assert_allclose(ours + dropped + prior_constant, loglik + prior,
                                   rtol=1e-12)


def test_fisher_is_the_negative_hessian(scene):
    # Canonical links: the expected information X^T W X equals the observed one
    # (McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed., section 2.5).
    beta = jnp.asarray(scene.true_beta)
    hessian = jax.jit(jax.hessian(lambda b: scene.logdensity({"beta": b})))(beta)
    np.testing.assert_allclose(np.asarray(jax.jit(scene.fisher)({"beta": beta})),
                               -np.asarray(hessian), rtol=1e-10)


def test_statsmodels_recovers_the_true_coefficients(scene):
    # The outcome was simulated from true_beta, so statsmodels' maximum-likelihood
    # estimate differs from it by sampling error only: the Wald statistic
    # (b - beta)' V^-1 (b - beta) is chi-square with p degrees of freedom. Its 0.999
    # quantile fails a correctly simulated data set once in a thousand seeds; a sign or
    # scaling error in the simulation would push it into the hundreds.
    fit = _statsmodels_fit(scene)
    diff = fit.params - scene.true_beta
    wald = diff @ np.linalg.solve(fit.cov_params(), diff)
    assert wald < stats.chi2.ppf(0.999, len(diff))


def test_posterior_mode_matches_statsmodels(scene):
    # The N(0, 2.5²) prior moves the mode from the MLE by about H⁻¹ beta / 2.5², below
    # 0.01 standard errors here; 0.05 standard errors is a tight bound that still
    # allows for it.
    fit = fisherwalk.laplace(scene.logdensity, scene.initial_position)
    reference = _statsmodels_fit(scene)
    mode = np.asarray(fit.mode_flat)
    assert np.all(np.abs(mode - reference.params) < 0.05 * reference.bse)
    assert fit.names == scene.parameter_names


def test_logdensity_under_jit_equals_eager(logistic):
    beta = jnp.asarray(logistic.true_beta)
    eager = logistic.logdensity({"beta": beta})
    jitted = jax.jit(logistic.logdensity)({"beta": beta})
    np.testing.assert_allclose(float(jitted), float(eager), rtol=1e-12)


def test_to_csv_round_trip(tmp_path, scene):
    path = scene.to_csv(tmp_path / f"{scene.name}.csv")
    table = np.genfromtxt(path, delimiter=",", names=True)
    header = path.read_text().splitlines()[0].split(",")
    expected = list(scene.columns) + (["exposure_km"] if scene.name == "poisson" else [])
    assert header == expected + [scene.outcome]
    assert len(table) == len(scene.y)
    np.testing.assert_array_equal(table[scene.outcome], scene.y)
    for j, column in enumerate(scene.columns):  # written with 4 significant digits
        np.testing.assert_allclose(table[column], scene.raw[:, j], rtol=5e-4)
    if scene.name == "poisson":
        np.testing.assert_allclose(np.log(table["exposure_km"]), scene.offset, atol=5e-4)


def test_bad_requests_are_refused():
    with pytest.raises(InputError, match="no demo scenario called 'probit'"):
        scenarios.scenario("probit")
    with pytest.raises(InputError, match="at least 50"):
        scenarios.logistic(n=10)
    assert scenarios.scenario("poisson", n=100).X.shape == (100, 6)
