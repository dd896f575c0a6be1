"""A model file whose log density returns one value per observation, not their sum."""

import jax.numpy as jnp

data = jnp.array([0.3, -1.2, 0.8])


def logdensity(position):
    return -0.5 * (data - position["mu"]) ** 2


initial_position = {"mu": jnp.asarray(0.0)}
