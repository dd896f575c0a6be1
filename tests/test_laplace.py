"""Tests of the Laplace fit: mode, observed Fisher information, checks and restarts.

References beside the checks: GLM fits of scikit-learn and statsmodels on open datasets
shipped inside those packages; the Fisher information of GLMs (McCullagh & Nelder 1989,
Generalized Linear Models, 2nd ed.); the Hessian of a Gaussian log density (its precision
matrix, a handbook identity). No check here is Monte Carlo: tolerances are numerical.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from jax.flatten_util import ravel_pytree
from scipy.optimize import brentq, minimize_scalar
from scipy.special import expit
from scipy.stats import norm

from fisherwalk.errors import FitError, InputError, ModelError
from fisherwalk.fit.laplace import LaplaceFit, check_fisher, fisher_from_cholesky, laplace

TAU = 2.0  # prior sd of the regression coefficients, N(0, TAU² I)
CANCER_NAMES = tuple(f"beta[{i}]" for i in range(10))


def _design(X: np.ndarray) -> np.ndarray:
    X = (X - X.mean(axis=0)) / X.std(axis=0)
    return np.column_stack([np.ones(len(X)), X])


def _logistic(X: np.ndarray, y: np.ndarray, tau: float | None):
    X, y = jnp.asarray(X), jnp.asarray(y, float)

    def logdensity_fn(position):
        beta = position["beta"]
        eta = X @ beta
        prior = 0.0 if tau is None else -0.5 * jnp.sum(beta**2) / tau**2
        return jnp.sum(y * eta - jnp.logaddexp(0.0, eta)) + prior

    return logdensity_fn


def _logistic_information(X: np.ndarray, beta: np.ndarray, tau: float) -> np.ndarray:
    # McCullagh & Nelder (1989), Generalized Linear Models, 2nd ed.: Xᵀ diag(p(1-p)) X;
    # plus the prior precision I / tau².
    p = expit(X @ beta)
    return X.T @ (X * (p * (1 - p))[:, None]) + np.eye(X.shape[1]) / tau**2


@pytest.fixture(scope="module")
def cancer():
    from sklearn.datasets import load_breast_cancer

    X, y = load_breast_cancer(return_X_y=True)  # open dataset bundled with scikit-learn
    return _design(X[:, :9]), y.astype(float)  # intercept + 9 columns: d = 10


@pytest.fixture(scope="module")
def cancer_fit(cancer):
    X, y = cancer
    return laplace(_logistic(X, y, TAU), {"beta": jnp.zeros(10)})


def test_logistic_regression_matches_sklearn_and_glm_information(cancer, cancer_fit):
    from sklearn.linear_model import LogisticRegression

    X, y = cancer
    fit = cancer_fit
    assert isinstance(fit, LaplaceFit) and fit.fisher_source == "hessian"
    assert fit.names == CANCER_NAMES and len(fit.modes) == 1 and fit.warnings == ()
    assert fit.evaluations > fit.iterations > 0
    # scikit-learn minimises ½|w|² + C Σ logloss: the posterior mode for C = tau².
    reference = LogisticRegression(C=TAU**2, fit_intercept=False, tol=1e-12, solver="newton-cg",
                                   max_iter=1000).fit(X, y).coef_[0]
    beta = np.asarray(fit.mode["beta"])
    assert np.max(np.abs(beta - reference)) <= 1e-7 * np.max(np.abs(reference))
    information = _logistic_information(X, beta, TAU)  # McCullagh & Nelder (1989)
    assert np.max(np.abs(np.asarray(fit.fisher) - information)) <= 1e-8 * np.max(information)
    cholesky = np.asarray(fit.cholesky)
    assert np.allclose(np.triu(cholesky, 1), 0.0)
    assert np.allclose(np.asarray(fisher_from_cholesky(fit.cholesky)), information, rtol=1e-8)
    assert fit.gradient_norm <= 1e-8 * abs(fit.logdensity)


@pytest.mark.slow
def test_poisson_regression_matches_statsmodels_and_sklearn():
    import statsmodels.api as sm
    from sklearn.linear_model import PoissonRegressor

    data = sm.datasets.randhie.load_pandas().data  # RAND health insurance data, statsmodels
    y = data["mdvis"].to_numpy(float)
    X = _design(data.drop(columns="mdvis").to_numpy(float))  # intercept + 9: d = 10
    n, d = X.shape
    Xj, yj = jnp.asarray(X), jnp.asarray(y)

    def loglik(beta):
        eta = Xj @ beta
        return jnp.sum(yj * eta - jnp.exp(eta))

    # Flat prior: the mode is the maximum-likelihood fit of statsmodels' GLM (IRLS).
    flat = laplace(loglik, jnp.zeros(d))
    glm = sm.GLM(y, X, family=sm.families.Poisson()).fit(tol=1e-13)
    beta = np.asarray(flat.mode)
    assert np.max(np.abs(beta - glm.params)) <= 1e-8 * np.max(np.abs(glm.params))
    # McCullagh & Nelder (1989): Fisher information Xᵀ diag(mu) X (log link).
    information = X.T @ (X * np.exp(X @ beta)[:, None])
    assert np.max(np.abs(np.asarray(flat.fisher) - information)) <= 1e-8 * np.max(information)
    covariance = np.linalg.inv(np.asarray(flat.fisher))
    assert np.allclose(covariance, glm.cov_params(), rtol=1e-7, atol=1e-12)

    # Prior N(0, I): scikit-learn minimises (1/2n) deviance + (alpha/2)|w|², alpha = 1/n.
    ridge = laplace(lambda b: loglik(b) - 0.5 * jnp.sum(b**2), jnp.zeros(d))
    reference = PoissonRegressor(alpha=1.0 / n, fit_intercept=False, tol=1e-12, max_iter=1000,
                                 solver="newton-cholesky").fit(X, y).coef_
    beta = np.asarray(ridge.mode)
    assert np.max(np.abs(beta - reference)) <= 1e-7 * np.max(np.abs(reference))
    information = X.T @ (X * np.exp(X @ beta)[:, None]) + np.eye(d)
    assert np.max(np.abs(np.asarray(ridge.fisher) - information)) <= 1e-8 * np.max(information)


def test_pytree_position_round_trips_with_names():
    position = {"v": jnp.zeros(3), "s": jnp.asarray(0.0), "W": jnp.zeros((2, 2))}
    rng = np.random.default_rng(7)
    A = rng.normal(size=(8, 8))
    precision = A @ A.T + 8 * np.eye(8)
    mean = rng.normal(size=8)
    P, m = jnp.asarray(precision), jnp.asarray(mean)

    def logdensity_fn(p):  # log N(mean, precision⁻¹) up to a constant
        delta = ravel_pytree(p)[0] - m
        return -0.5 * delta @ P @ delta

    fit = laplace(logdensity_fn, position)
    assert fit.names == ("W[0,0]", "W[0,1]", "W[1,0]", "W[1,1]", "s", "v[0]", "v[1]", "v[2]")
    assert jax.tree_util.tree_structure(fit.mode) == jax.tree_util.tree_structure(position)
    assert {k: np.shape(v) for k, v in fit.mode.items()} == {"v": (3,), "s": (), "W": (2, 2)}
    assert np.allclose(np.asarray(fit.mode["W"]), mean[:4].reshape(2, 2), atol=1e-10)
    assert np.allclose(np.asarray(fit.mode_flat), mean, atol=1e-10)
    # The Hessian of a Gaussian log density is minus its precision matrix.
    assert np.allclose(np.asarray(fit.fisher), precision, rtol=1e-12)
    assert np.allclose(np.asarray(fit.cholesky), np.linalg.cholesky(precision), rtol=1e-10)


def test_user_fisher_matrix_and_callable(cancer, cancer_fit):
    X, y = cancer
    logdensity_fn = _logistic(X, y, TAU)
    start = {"beta": jnp.zeros(10)}
    mode = np.asarray(cancer_fit.mode_flat)
    expected = _logistic_information(X, mode, TAU)
    fit = laplace(logdensity_fn, start, fisher=expected)
    assert fit.fisher_source == "user"
    assert np.allclose(np.asarray(fit.fisher), expected, rtol=1e-12)
    assert np.allclose(np.asarray(fit.mode_flat), mode, rtol=1e-6, atol=1e-8)
    # For the canonical (logit) link the expected information equals the observed one at
    # any point (McCullagh & Nelder 1989), so the callable reproduces the Hessian.
    fit = laplace(logdensity_fn, start,
                  fisher=lambda p: _logistic_information(X, np.asarray(p["beta"]), TAU))
    assert fit.fisher_source == "user"
    hessian = -np.asarray(jax.hessian(logdensity_fn)(fit.mode)["beta"]["beta"])
    assert np.max(np.abs(np.asarray(fit.fisher) - hessian)) <= 1e-8 * np.max(expected)


def test_user_fisher_is_validated(cancer, cancer_fit):
    X, y = cancer
    logdensity_fn, start = _logistic(X, y, TAU), {"beta": jnp.zeros(10)}
    good = np.asarray(cancer_fit.fisher)
    with pytest.raises(InputError, match=r"shape \(9, 9\); expected \(10, 10\)") as info:
        laplace(logdensity_fn, start, fisher=good[:9, :9])
    assert "beta[0], beta[1]" in str(info.value)
    skew = good.copy()
    skew[2, 5] *= 1.5
    with pytest.raises(InputError, match="not symmetric") as info:
        laplace(logdensity_fn, start, fisher=skew)
    assert "beta[2]" in str(info.value) and "beta[5]" in str(info.value)
    u = np.zeros(10)
    u[[1, 4]] = [0.6, -0.8]
    indefinite = good - 2 * np.max(np.linalg.eigvalsh(good)) * np.outer(u, u)
    with pytest.raises(InputError, match="not positive definite") as info:
        laplace(logdensity_fn, start, fisher=indefinite)
    message = str(info.value)
    assert "beta[1]" in message and "beta[4]" in message and "beta[0]" not in message
    with pytest.raises(InputError, match="non-finite"):
        check_fisher(np.full((10, 10), np.nan), CANCER_NAMES)
    cholesky = check_fisher(good, CANCER_NAMES)
    assert np.allclose(np.asarray(fisher_from_cholesky(cholesky)), good, rtol=1e-12)


@pytest.mark.slow
def test_model_errors_at_the_start():
    with pytest.raises(ModelError, match=r"shape \(3,\)") as info:
        laplace(lambda x: -(x**2), jnp.zeros(3))
    assert "scalar" in str(info.value) and "sum over observations" in str(info.value)
    with pytest.raises(ModelError, match="called with"):
        laplace(lambda p: -p["a"] ** 2, jnp.zeros(3))
    with pytest.raises(InputError, match="dtype int"):
        laplace(lambda x: -jnp.sum(x**2), jnp.zeros(3, dtype=int))
    data = np.ones((5, 2))
    data[2, 1] = np.nan
    X = jnp.asarray(data)
    with pytest.raises(ModelError, match="NaN") as info:
        laplace(lambda b: -jnp.sum((X @ b) ** 2), jnp.zeros(2))
    assert "data" in str(info.value) and "jnp.isfinite" in str(info.value)
    assert "(5, 2) with 1 non-finite" in str(info.value)
    with pytest.raises(ModelError, match=r"-inf at the starting point") as info:
        laplace(lambda x: jnp.sum(jax.scipy.stats.expon.logpdf(x)), jnp.asarray([-1.0, 1.0]))
    assert "support" in str(info.value)
    with pytest.raises(InputError, match="random key"):
        laplace(lambda x: -jnp.sum(x**2), jnp.zeros(2), restarts=3)
    key = jax.random.key(0)
    with pytest.raises(InputError, match="box must be"):
        laplace(lambda x: -jnp.sum(x**2), jnp.zeros(2), restarts=3, rng_key=key,
                box=(0.0, [1.0, 2.0, 3.0]))
    with pytest.raises(InputError, match="lower < upper") as info:
        laplace(lambda x: -jnp.sum(x**2), jnp.zeros(2), restarts=3, rng_key=key,
                box=([0.0, 1.0], 0.5))
    assert "x[1]" in str(info.value) and "x[0]" not in str(info.value)

    @jax.custom_vjp
    def square(x):
        return jnp.sum(x**2)

    square.defvjp(lambda x: (square(x), x), lambda x, g: (2 * x * g,))
    with pytest.raises(ModelError, match="could not differentiate") as info:
        laplace(lambda x: -square(x), jnp.ones(2))  # reverse mode only: no Hessian
    assert "fisher=" in str(info.value)


def _rosenbrock(p):
    # Rosenbrock (1960), "An automatic method for finding the greatest or least value of a
    # function", Computer Journal 3(3): a curved, ill-conditioned valley, optimum (1, 1).
    return -((1.0 - p[0]) ** 2) - 100.0 * (p[1] - p[0] ** 2) ** 2


def test_not_converged_then_converged_on_rosenbrock():
    start = jnp.asarray([-1.2, 1.0])
    with pytest.raises(FitError, match="did not converge") as info:
        laplace(_rosenbrock, start, max_iterations=2)
    message = str(info.value)
    assert "2 of 2 iterations" in message and "max_iterations" in message and "x[0]" in message
    fit = laplace(_rosenbrock, start)
    assert np.allclose(np.asarray(fit.mode_flat), [1.0, 1.0], atol=1e-8)
    # -Hessian of the log density at (1, 1), by hand: [[802, -400], [-400, 200]].
    assert np.allclose(np.asarray(fit.fisher), [[802.0, -400.0], [-400.0, 200.0]], rtol=1e-10)


@pytest.mark.slow
def test_complete_separation_is_a_runaway_mode():
    from sklearn.datasets import load_iris

    # Fisher (1936), "The use of multiple measurements in taxonomic problems", Annals of
    # Eugenics 7(2): setosa is linearly separable from versicolor, so with a flat prior the
    # logistic likelihood has no maximum (Albert & Anderson 1984, Biometrika 71(1)).
    X, y = load_iris(return_X_y=True)
    keep = y < 2
    X, y = _design(X[keep]), (y[keep] == 1).astype(float)
    with pytest.raises(FitError, match="Runaway mode") as info:
        laplace(_logistic(X, y, None), {"beta": jnp.zeros(5)})
    message = str(info.value)
    assert "separation" in message and "prior" in message
    assert "beta[3]" in message or "beta[4]" in message  # the petal measurements
    # An improper log density rising without bound along x[0] (no curvature there).
    with pytest.raises(FitError, match="Runaway mode") as info:
        laplace(lambda x: x[0] - 0.5 * x[1] ** 2, jnp.zeros(2))
    assert "unbounded" in str(info.value) and "x[0] (+1.00)" in str(info.value)


@pytest.mark.slow
def test_saddle_and_unidentified_parameter_are_not_positive_definite():
    # log density x² - y²: from (0, 1) the search slides down y to the saddle at 0.
    with pytest.raises(FitError, match="not positive definite") as info:
        laplace(lambda p: p[0] ** 2 - p[1] ** 2, jnp.asarray([0.0, 1.0]))
    assert "x[0]" in str(info.value) and "x[1]" not in str(info.value)
    assert "saddle" in str(info.value)
    # Only a + b enters the log density: a - b is unidentified.
    with pytest.raises(FitError, match="not positive definite") as info:
        laplace(lambda p: -0.5 * (p["a"] + p["b"] - 1.0) ** 2,
                {"a": jnp.asarray(0.0), "b": jnp.asarray(0.0)})
    assert "a (" in str(info.value) and "b (" in str(info.value)
    assert "unidentified" in str(info.value)


def _mixture(weight: float):
    def logdensity_fn(x):
        return jnp.logaddexp(jnp.log(weight) + jax.scipy.stats.norm.logpdf(x[0], -3.0, 1.0),
                             jnp.log(1 - weight) + jax.scipy.stats.norm.logpdf(x[0], 3.0, 1.0))

    def slope(x):  # derivative of the mixture density, for scipy's root finder
        return (-weight * (x + 3) * norm.pdf(x, -3.0, 1.0)
                - (1 - weight) * (x - 3) * norm.pdf(x, 3.0, 1.0))

    return logdensity_fn, slope


@pytest.mark.slow
def test_restarts_find_both_modes_of_a_mixture():
    logdensity_fn, slope = _mixture(0.5)
    # Uniform starts in (-8, 8): each lands in the other basin (x < 0) with probability
    # 1/2, so 8 starts all miss it with probability 0.004; the fixed key is one draw.
    fit = laplace(logdensity_fn, jnp.asarray([2.0]), restarts=8, rng_key=jax.random.key(3),
                  box=(-8.0, 8.0))
    found = sorted(float(np.asarray(m)[0]) for m, _ in fit.modes)
    right = brentq(slope, 1.0, 5.0)  # scipy root of the density's derivative
    assert np.allclose(found, [-right, right], atol=1e-7)
    assert abs(fit.modes[0][1] - fit.modes[1][1]) < 1e-10  # equal heights, two modes
    assert float(fit.mode_flat[0]) > 0  # equal heights: the search from 2.0 keeps its mode
    assert any("does not describe the posterior" in w for w in fit.warnings)
    assert not any("higher mode" in w for w in fit.warnings)


@pytest.mark.slow
def test_restarts_move_to_a_higher_mode():
    logdensity_fn, slope = _mixture(0.3)
    # Starts from N(mode, spread² H⁻¹) with H ≈ 1 at -3: spread 5 crosses 0 with probability
    # P(z > 0.6) = 0.27 per start; 16 starts all miss with probability 0.006.
    fit = laplace(logdensity_fn, jnp.asarray([-2.0]), restarts=16,
                  rng_key=jax.random.PRNGKey(0), spread=5.0)
    assert np.isclose(float(fit.mode_flat[0]), brentq(slope, 1.0, 5.0), atol=1e-7)
    assert fit.logdensity == fit.modes[0][1] > fit.modes[1][1]
    assert any("higher mode" in w for w in fit.warnings)
    assert any("does not describe the posterior" in w for w in fit.warnings)


@pytest.mark.slow
def test_runaway_restarts_are_recorded_not_raised():
    def logdensity_fn(x):  # a mode near 0, and a tail rising to log 0.1 as x -> +inf
        return jnp.logaddexp(jax.scipy.stats.norm.logpdf(x[0]), jnp.log(0.1) - jnp.exp(-x[0]))

    fit = laplace(logdensity_fn, jnp.asarray([0.5]), restarts=6, rng_key=jax.random.key(1),
                  box=(-3.0, 30.0))
    reference = minimize_scalar(lambda x: -float(logdensity_fn(jnp.asarray([x]))),
                                bounds=(-2.0, 2.0), method="bounded",
                                options={"xatol": 1e-10}).x
    assert np.isclose(float(fit.mode_flat[0]), reference, atol=1e-6)
    assert len(fit.modes) == 1
    assert any("runaway" in w for w in fit.warnings)


@pytest.mark.slow
def test_float32_warns_once_with_the_enabling_line():
    script = textwrap.dedent("""
        import warnings
        import jax.numpy as jnp
        from fisherwalk.errors import Float32Warning
        from fisherwalk.fit.laplace import laplace
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            fit = laplace(lambda x: -0.5 * jnp.sum((x - 1.0) ** 2), jnp.zeros(2))
            laplace(lambda x: -0.5 * jnp.sum((x - 2.0) ** 2), jnp.zeros(2))
        found = [w for w in caught if issubclass(w.category, Float32Warning)]
        print(len(found), fit.mode_flat.dtype, float(fit.mode_flat[0]))
        print(found[0].message)
    """)
    env = dict(os.environ, JAX_ENABLE_X64="0", JAX_PLATFORMS="cpu")
    done = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    count, dtype, value = done.stdout.splitlines()[0].split()
    assert (count, dtype) == ("1", "float32")
    assert abs(float(value) - 1.0) < 1e-3
    assert 'jax.config.update("jax_enable_x64", True)' in done.stdout
