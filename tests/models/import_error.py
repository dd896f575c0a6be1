"""A model file whose import fails: it divides by zero at the top level."""

import jax.numpy as jnp

scale = 1 / 0


def logdensity(position):
    return -0.5 * jnp.sum(position["x"] ** 2) / scale


initial_position = {"x": jnp.zeros(2)}
