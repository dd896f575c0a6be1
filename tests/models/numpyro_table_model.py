"""A NumPyro model of a data table, for the command-line tests (invented scenario).

Counts of seedlings in plots of a trial field against the hours of shade, a Poisson
regression written in NumPyro; ``make(data)`` returns the model and its arguments.
"""

import jax.numpy as jnp
import numpyro
import numpyro.distributions as dist

columns = ("count", "hours")


def model(hours, count=None):
    a = numpyro.sample("a", dist.Normal(0.0, 2.0))
    b = numpyro.sample("b", dist.Normal(0.0, 2.0))
    numpyro.deterministic("rate_at_zero", jnp.exp(a))
    with numpyro.plate("plots", hours.shape[0]):
        numpyro.sample("count", dist.Poisson(jnp.exp(a + b * hours)), obs=count)


def make(data):
    return {"model": model, "model_args": (jnp.asarray(data["hours"]),),
            "model_kwargs": {"count": jnp.asarray(data["count"])}}
