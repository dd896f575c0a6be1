"""A model file of a data table, for the command-line tests (invented scenario).

Counts of seedlings in plots of a trial field against the hours of shade: a Poisson
regression, log rate = a + b * hours, with priors a, b ~ N(0, 2²). The data come from the
CSV given with --data; ``columns`` names the two the model needs.
"""

import jax.numpy as jnp
from jax.scipy.special import gammaln

columns = ("count", "hours")


def make(data):
    count = jnp.asarray(data["count"])
    hours = jnp.asarray(data["hours"])

    def pointwise(p):
        eta = p["a"] + p["b"] * hours
        return count * eta - jnp.exp(eta) - gammaln(count + 1.0)

    def logdensity(p):
        return jnp.sum(pointwise(p)) - 0.5 * (p["a"] ** 2 + p["b"] ** 2) / 4.0

    return {
        "logdensity": logdensity,
        "initial_position": {"a": jnp.asarray(0.0), "b": jnp.asarray(0.0)},
        "pointwise": pointwise,
        "derived": lambda p: {"rate_at_zero": jnp.exp(p["a"])},
    }
