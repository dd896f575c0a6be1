"""Test configuration: the suite runs in float64, as the README tells users to."""

import jax

jax.config.update("jax_enable_x64", True)
