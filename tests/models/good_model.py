"""A small model file for the command-line tests (invented data).

Six invented readings of a bench scale weighing the same object: a normal model with
unknown mean ``mu`` and log standard deviation ``log_sigma``, priors mu ~ N(0, 10²) and
log_sigma ~ N(0, 1²).
"""

import jax.numpy as jnp

readings = jnp.array([10.31, 10.12, 10.45, 10.27, 10.18, 10.39])


def logdensity(position):
    mu, log_sigma = position["mu"], position["log_sigma"]
    sigma = jnp.exp(log_sigma)
    loglik = jnp.sum(-0.5 * ((readings - mu) / sigma) ** 2 - log_sigma)
    return loglik - 0.5 * (mu / 10.0) ** 2 - 0.5 * log_sigma**2


initial_position = {"log_sigma": jnp.asarray(0.0), "mu": jnp.asarray(10.0)}
names = ["log sd of a reading", "true weight"]  # ravelled order: dict keys sorted
