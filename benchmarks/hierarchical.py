"""Hierarchical and heavy-tailed benchmark targets (issue 22): invented data, fixed seeds.

Where the large-sample picture fails: group effects informed by a few observations each,
funnels, posteriors with no mode, a heavy-tailed likelihood.

* ``rilogit-centred-g50`` / ``rilogit-noncentred-g50``: random-intercept logistic
  regression, 50 groups of 12 binary outcomes, an intercept and one covariate,
  u_j ~ N(0, σ²) (centred) or u_j = σ z_j, z_j ~ N(0, 1) (non-centred); priors
  β ~ N(0, 5²), σ ~ half-normal(1) on log σ with its Jacobian. d = 53. The centred form
  has no mode (log σ → −∞ with every u_j = 0).
* ``eight-centred`` / ``eight-noncentred``: the 8-group normal model of Gelman et al.
  (2013), Bayesian Data Analysis, 3rd ed., section 5.4, with the invented data of
  tests/test_no_mode.py (moderate: s_j from 3 to 6). d = 10.
* ``funnel-d10``: Neal's funnel (Neal 2003, "Slice sampling", Ann. Statist. 31(3)):
  v ~ N(0, 3²), x_i | v ~ N(0, e^v), i = 1..9.
* ``studentt-n20000-d10``: linear regression with a Student-t likelihood (ν = 3), an
  intercept and 8 correlated covariates plus log σ (d = 10), n = 20 000, priors
  N(0, 5²).

Every log density takes the ravelled position (d,), as the other targets do; the
parameter order is given in each note.
"""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
from targets import PRIOR_SD, Target, _design

EIGHT_Y = np.array([18.0, 5.0, -6.0, 10.0, 1.0, 3.0, 21.0, 7.0])
EIGHT_S = np.array([5.0, 4.0, 6.0, 4.0, 3.0, 5.0, 4.0, 6.0])


def _rilogit_data(groups: int, per_group: int, seed: int):
    rng = np.random.default_rng(seed)
    g = np.repeat(np.arange(groups), per_group)
    x = rng.standard_normal(g.size)
    u = 0.4 * rng.standard_normal(groups)  # weak group effects: σ = 0.4
    eta = -0.3 + 0.8 * x + u[g]
    y = (rng.random(g.size) < 1 / (1 + np.exp(-eta))).astype(float)
    return g, x, y


def random_intercept_logistic(centred: bool, groups: int = 50, per_group: int = 12,
                              seed: int = 51) -> Target:
    g_np, x_np, y_np = _rilogit_data(groups, per_group, seed)
    dim = groups + 3

    def make():
        g, x, y = jnp.asarray(g_np), jnp.asarray(x_np), jnp.asarray(y_np)

        def logdensity(p):
            b0, b1, log_sigma, w = p[0], p[1], p[2], p[3:]
            sigma = jnp.exp(log_sigma)
            u = w if centred else sigma * w
            eta = b0 + b1 * x + u[g]
            loglik = jnp.sum(y * eta - jnp.logaddexp(0.0, eta))
            prior = -0.5 * (b0**2 + b1**2) / PRIOR_SD**2 - 0.5 * sigma**2 + log_sigma
            if centred:
                prior += jnp.sum(-0.5 * (w / sigma) ** 2 - log_sigma)
            else:
                prior += jnp.sum(-0.5 * w**2)
            return loglik + prior

        return logdensity

    form = "centred" if centred else "noncentred"
    return Target(f"rilogit-{form}-g{groups}", "hierarchical", dim, groups * per_group, make,
                  np.zeros(dim), f"random-intercept logistic, {groups} groups of {per_group}, "
                  f"{form}; order (b0, b1, log σ, u or z)")


def eight_groups(centred: bool) -> Target:
    def make():
        y, s = jnp.asarray(EIGHT_Y), jnp.asarray(EIGHT_S)

        def logdensity(p):
            mu, log_tau, w = p[0], p[1], p[2:]
            tau = jnp.exp(log_tau)
            theta = w if centred else mu + tau * w
            prior = -0.5 * (mu / 5.0) ** 2 - 0.5 * (tau / 5.0) ** 2 + log_tau
            prior += (jnp.sum(-0.5 * ((w - mu) / tau) ** 2 - log_tau) if centred
                      else jnp.sum(-0.5 * w**2))
            return prior + jnp.sum(-0.5 * ((y - theta) / s) ** 2)

        return logdensity

    form = "centred" if centred else "noncentred"
    return Target(f"eight-{form}", "hierarchical", 10, 8, make, np.zeros(10),
                  f"8-group normal model (BDA3 5.4), {form}; order (μ, log τ, θ or z)")


def funnel(dim: int = 10) -> Target:
    def make():
        def logdensity(p):
            v, x = p[0], p[1:]
            return -0.5 * (v / 3.0) ** 2 - 0.5 * jnp.sum(x**2) * jnp.exp(-v) - 0.5 * (dim - 1) * v

        return logdensity

    initial = np.concatenate([[0.0], np.ones(dim - 1)])
    return Target(f"funnel-d{dim}", "hierarchical", dim, 0, make, initial,
                  "Neal's funnel (Neal 2003); order (v, x)")


def student_t_regression(n: int = 20_000, d: int = 10, nu: float = 3.0,
                         seed: int = 61) -> Target:
    rng = np.random.default_rng(seed)
    x_np = _design(rng, n, d - 1)
    beta = rng.normal(0.0, 1.0, d - 1)
    y_np = x_np @ beta + 0.7 * rng.standard_t(nu, n)

    def make():
        x, y = jnp.asarray(x_np), jnp.asarray(y_np)

        def logdensity(p):
            b, log_sigma = p[:-1], p[-1]
            r = (y - x @ b) / jnp.exp(log_sigma)
            loglik = jnp.sum(-0.5 * (nu + 1) * jnp.log1p(r**2 / nu)) - n * log_sigma
            return loglik - 0.5 * jnp.sum(p**2) / PRIOR_SD**2

        return logdensity

    return Target(f"studentt-n{n}-d{d}", "heavy", d, n, make, np.zeros(d),
                  f"linear regression, Student-t likelihood (ν = {nu:g}); order (β, log σ)")


def hierarchical_targets() -> list[Target]:
    return [random_intercept_logistic(True), random_intercept_logistic(False),
            eight_groups(True), eight_groups(False), funnel(), student_t_regression()]


HIERARCHICAL = tuple(t.name for t in hierarchical_targets())
