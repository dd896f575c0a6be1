"""A model file that defines logdensity but forgets initial_position."""

import jax.numpy as jnp


def logdensity(position):
    return -0.5 * jnp.sum(position["x"] ** 2)
