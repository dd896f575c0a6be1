"""A NumPyro model file for `fisherwalk run`: invented pump-flow data (a normal
regression with an unknown positive sd), defined as `model`, `model_args`, `model_kwargs`."""

import jax.numpy as jnp
import numpy as np
import numpyro
import numpyro.distributions as dist

_rng = np.random.default_rng(7)
load = jnp.asarray(np.linspace(-1.0, 1.0, 40))
flow = jnp.asarray(2.0 + 0.8 * np.linspace(-1.0, 1.0, 40) + 0.3 * _rng.normal(size=40))


def model(load, flow=None):
    intercept = numpyro.sample("intercept", dist.Normal(0.0, 5.0))
    slope = numpyro.sample("slope", dist.Normal(0.0, 5.0))
    noise = numpyro.sample("noise", dist.HalfNormal(2.0))
    numpyro.deterministic("noise_variance", noise**2)
    with numpyro.plate("runs", load.shape[0]):
        numpyro.sample("flow", dist.Normal(intercept + slope * load, noise), obs=flow)


model_args = (load,)
model_kwargs = {"flow": flow}
