"""Benchmark targets: invented posteriors with fixed seeds (no real data).

Each target is built by a factory, so that every call returns a *new* log-density
closure: a repeat of a benchmark then compiles afresh, as a new process would.
Data are numpy arrays turned into JAX arrays inside the factory and closed over, the
way a user writes a model.

Families
--------
* ``gauss-d{d}``: N(mu, Sigma) with Sigma = Q diag(lam) Q^T, lam log-spaced from 1 to
  1e-3 (condition number 10^3), Q a random rotation, mu = 1 (every coordinate).
* ``logistic-n{n}-d{d}``: Bayesian logistic regression, an intercept plus d - 1
  correlated Gaussian covariates (correlation 0.6^|i-j|), coefficients drawn once,
  prior N(0, 5^2) on every coefficient.
* ``poisson-n{n}-d{d}``: Poisson regression with log link, same design, prior N(0, 5^2).
* ``skewed-n30-d3``: logistic regression with n = 30 and two covariates whose classes
  almost separate (a few overlapping points), prior N(0, 5^2): a skewed posterior far
  from its Laplace approximation.
* ``costlygrad-n2000-d5``: the logistic regression of ``logistic-n2000-d5`` whose
  gradient is made deliberately expensive (see :func:`costly_gradient`): a model where a
  gradient costs tens of log densities, so that a random walk can beat the gradient
  samplers on time.

Everyone starts from the same ``initial`` position (the one a user would type:
zeros for the regressions; the origin, 1 from the mean in every coordinate, for the
Gaussian).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np

PRIOR_SD = 5.0  # N(0, 5^2) on every regression coefficient (a weakly informative choice)


@dataclass(frozen=True)
class Target:
    """A posterior to benchmark on."""

    name: str
    family: str  # "gauss", "logistic", "poisson", "skewed" or "reference"
    dim: int
    n: int  # observations (0 for the Gaussians)
    make: Callable[[], Callable]  # () -> a fresh logdensity_fn(position (d,)) -> scalar
    initial: np.ndarray  # (d,) the starting position everyone is given
    note: str


def _design(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    """An intercept and d - 1 Gaussian covariates with correlation 0.6^|i-j|."""
    k = d - 1
    idx = np.arange(k)
    corr = 0.6 ** np.abs(idx[:, None] - idx[None, :])
    z = rng.standard_normal((n, k)) @ np.linalg.cholesky(corr).T
    return np.column_stack([np.ones(n), z])


def _coefficients(rng: np.random.Generator, d: int, spread: float) -> np.ndarray:
    """Coefficients giving a linear predictor of standard deviation about ``spread``."""
    beta = rng.standard_normal(d)
    beta[0] = 0.3
    # the covariates have unit variance and positive correlations: keep the predictor tame
    beta[1:] *= spread / np.sqrt(max(d - 1, 1) * 2.0)
    return beta


def gaussian(d: int, seed: int = 11) -> Target:
    rng = np.random.default_rng(seed + d)
    lam = np.logspace(0.0, -3.0, d)
    q, r = np.linalg.qr(rng.standard_normal((d, d)))
    q = q * np.sign(np.diag(r))
    precision = (q / lam) @ q.T
    precision = 0.5 * (precision + precision.T)
    mean = np.ones(d)

    def make():
        p = jnp.asarray(precision)
        m = jnp.asarray(mean)

        def logdensity(x):
            r = x - m
            return -0.5 * r @ (p @ r)

        return logdensity

    return Target(f"gauss-d{d}", "gauss", d, 0, make, np.zeros(d),
                  "Gaussian, covariance eigenvalues 1 .. 1e-3 (condition number 1e3), rotated")


def reference(d: int) -> Target:
    """N(0, I_d): the exactly Gaussian target on which a random walk reaches its limit."""

    def make():
        def logdensity(x):
            return -0.5 * jnp.sum(x**2)

        return logdensity

    return Target(f"reference-d{d}", "reference", d, 0, make, np.zeros(d),
                  "standard Gaussian (the random walks' limit)")


def _logistic_logdensity(x_np: np.ndarray, y_np: np.ndarray):
    def make():
        x = jnp.asarray(x_np)
        y = jnp.asarray(y_np)

        def logdensity(beta):
            eta = x @ beta
            loglik = jnp.sum(y * eta - jnp.logaddexp(0.0, eta))
            return loglik - 0.5 * jnp.sum(beta**2) / PRIOR_SD**2

        return logdensity

    return make


def _logistic_data(n: int, d: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Design and labels of the logistic targets (fixed by n, d and seed)."""
    rng = np.random.default_rng(seed + 1000 * d + n)
    x = _design(rng, n, d)
    beta = _coefficients(rng, d, spread=1.5)
    prob = 1.0 / (1.0 + np.exp(-(x @ beta)))
    return x, (rng.uniform(size=n) < prob).astype(float)


def logistic(n: int, d: int, seed: int = 21) -> Target:
    x, y = _logistic_data(n, d, seed)
    return Target(f"logistic-n{n}-d{d}", "logistic", d, n, _logistic_logdensity(x, y),
                  np.zeros(d), "logistic regression, correlated covariates (0.6^|i-j|)")


def poisson(n: int = 5000, d: int = 8, seed: int = 31) -> Target:
    rng = np.random.default_rng(seed)
    x = _design(rng, n, d)
    beta = _coefficients(rng, d, spread=0.6)
    beta[0] = 1.0
    y = rng.poisson(np.exp(x @ beta)).astype(float)

    def make():
        xj = jnp.asarray(x)
        yj = jnp.asarray(y)

        def logdensity(b):
            eta = xj @ b
            loglik = jnp.sum(yj * eta - jnp.exp(eta))
            return loglik - 0.5 * jnp.sum(b**2) / PRIOR_SD**2

        return logdensity

    return Target(f"poisson-n{n}-d{d}", "poisson", d, n, make, np.zeros(d),
                  "Poisson regression, log link, correlated covariates")


def skewed(seed: int = 41) -> Target:
    """n = 30, two covariates, classes separated except for a few overlapping points."""
    rng = np.random.default_rng(seed)
    n = 30
    z = rng.standard_normal((n, 2))
    score = z @ np.array([2.0, 1.0])
    y = (score > 0).astype(float)
    # flip the labels of the three points closest to the boundary: overlap, so the
    # likelihood alone has a finite maximum, but only just
    closest = np.argsort(np.abs(score))[:3]
    y[closest] = 1.0 - y[closest]
    x = np.column_stack([np.ones(n), z])
    return Target("skewed-n30-d3", "skewed", 3, n, _logistic_logdensity(x, y), np.zeros(3),
                  "logistic regression, n = 30, nearly separated (skewed posterior)")


GRADIENT_REPEATS = 100  # costly_gradient: the exact gradient is computed this many times


def costly_gradient(n: int = 2000, d: int = 5, seed: int = 21) -> Target:
    """``logistic-n2000-d5``'s posterior (same data), whose gradient is computed 100 times over.

    The log density is the same closed form; its derivative is given by a
    ``jax.custom_jvp`` whose rule computes the exact gradient Xᵀ(y − σ(Xβ)) − β/5²
    ``GRADIENT_REPEATS`` times in a ``lax.fori_loop``, each pass fed the previous one's
    result through a 1e-30 nudge of β so that XLA cannot hoist or merge the passes (the
    nudge is below float64 resolution for any β not exactly zero, and at most 1e-30 off
    at β = 0). What makes it expensive is therefore this deliberate repetition, nothing
    inherent in the model: it stands in for models whose derivative needs a costly path
    (an adjoint solve, an implicit function, a simulator with a differentiated
    surrogate) while their value is cheap. The posterior, mode and Hessian are exactly
    those of the logistic regression, so every sampler's answer is comparable.
    """
    x_np, y_np = _logistic_data(n, d, seed)

    def make():
        x = jnp.asarray(x_np)
        y = jnp.asarray(y_np)

        def value(beta):
            eta = x @ beta
            loglik = jnp.sum(y * eta - jnp.logaddexp(0.0, eta))
            return loglik - 0.5 * jnp.sum(beta**2) / PRIOR_SD**2

        def exact_gradient(beta):
            return x.T @ (y - jax.nn.sigmoid(x @ beta)) - beta / PRIOR_SD**2

        @jax.custom_jvp
        def logdensity(beta):
            return value(beta)

        @logdensity.defjvp
        def _jvp(primals, tangents):
            (beta,), (dbeta,) = primals, tangents

            def again(_, g):
                return exact_gradient(beta + 1e-30 * g)

            g = jax.lax.fori_loop(0, GRADIENT_REPEATS, again, jnp.zeros_like(beta))
            return value(beta), g @ dbeta

        return logdensity

    return Target(f"costlygrad-n{n}-d{d}", "costly", d, n, make, np.zeros(d),
                  f"logistic-n{n}-d{d}'s posterior; gradient computed {GRADIENT_REPEATS}x "
                  "on purpose (costs tens of log densities)")


def all_targets() -> dict[str, Target]:
    """Every benchmark target, smallest first within each family."""
    targets = [gaussian(2), gaussian(10), gaussian(50)]
    targets += [logistic(n, d) for n, d in ((2000, 5), (10000, 10), (10000, 25), (20000, 50),
                                            (20000, 100), (20000, 200))]
    targets += [poisson(), skewed(), costly_gradient()]
    return {t.name: t for t in targets}


# --quick: the smaller targets (the cache probe runs on logistic-n10000-d10 anyway)
QUICK = ("gauss-d2", "gauss-d10", "logistic-n2000-d5", "poisson-n5000-d8", "skewed-n30-d3",
         "costlygrad-n2000-d5")
