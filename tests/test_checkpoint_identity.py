"""A checkpoint belongs to one run: another walker is refused, and the message names what
differs by the family's own tuned parameter (the scale of the random walk, the step size
of a gradient family)."""

import jax
import jax.numpy as jnp
import pytest

import fisherwalk
from fisherwalk.samplers import registry


def _logdensity(x):
    return -0.5 * jnp.sum(x**2 / jnp.array([1.0, 4.0]))


@pytest.mark.slow
@pytest.mark.parametrize("sampler", registry.names())
def test_another_walker_is_refused_naming_the_family_parameter(sampler, tmp_path):
    walker = fisherwalk.start(_logdensity, jnp.zeros(2), jax.random.key(0), chains=2,
                              sampler=sampler, progress=False)
    path = tmp_path / "run.ckpt"
    fisherwalk.walk(walker, jax.random.key(1), draws=20, chunk=10, checkpoint=path,
                    progress=False)
    name, value = walker.tuning.parameter
    other = walker._replace(tuning=walker.tuning._replace(**{name: 2.0 * value}))
    with pytest.raises(fisherwalk.CheckpointError) as refused:
        fisherwalk.walk(other, jax.random.key(1), draws=20, chunk=10, checkpoint=path,
                        progress=False)
    message = str(refused.value)
    assert "belongs to another run" in message
    assert f"{name.replace('_', ' ')} {value}" in message and f"{2.0 * value}" in message
