"""handoff(..., chains=1): one unbatched BlackJAX state that a plain single-chain loop runs."""

import warnings

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk

_PRECISION = jnp.array([[2.0, 0.5], [0.5, 1.0]])


def _logdensity(p):
    return -0.5 * p["x"] @ _PRECISION @ p["x"]


@pytest.mark.slow
@pytest.mark.parametrize("algorithm", [blackjax.nuts, blackjax.hmc,
                                       blackjax.additive_step_random_walk])
def test_single_chain_state_runs_in_a_plain_blackjax_loop(algorithm):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", fisherwalk.FisherwalkWarning)  # chains=1 warns
        state, parameters = fisherwalk.handoff(algorithm, _logdensity, {"x": jnp.zeros(2)},
                                               jax.random.key(3), chains=1, progress=False)
    assert state.position["x"].shape == (2,)  # not (1, 2)
    assert np.shape(state.logdensity) == ()
    if algorithm is blackjax.additive_step_random_walk:
        kernel = algorithm.normal_random_walk(_logdensity, parameters["sigma"])
    else:
        kernel = algorithm(_logdensity, **parameters)
    step = jax.jit(kernel.step)
    key = jax.random.key(4)
    for i in range(10):  # the loop of BlackJAX's own examples
        state, info = step(jax.random.fold_in(key, i), state)
    assert np.isfinite(float(state.logdensity))
    np.testing.assert_allclose(float(state.logdensity), float(_logdensity(state.position)),
                               rtol=1e-12)
