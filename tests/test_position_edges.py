"""Positions and models the trial broke (issue 13, items 1 and 7): float32 leaves with
x64 on, an empty leaf, a host callback inside the model, and a large dimension."""

import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk as fw
from fisherwalk.errors import FisherwalkWarning, Float32Warning, InputError, ModelError


def test_float32_leaves_with_x64_are_cast_and_announced_at_the_callers_line():
    # Trial: start() with a float32 leaf, then walk(), raised "scan body function carry
    # input and carry output must have equal types", and no Float32Warning.
    with pytest.warns(Float32Warning, match="narrower than float64") as caught:
        walker = fw.start(lambda p: -0.5 * jnp.sum(p["x"] ** 2),
                          {"x": np.zeros(2, np.float32)}, jax.random.key(0), chains=2)
    assert caught[0].filename == __file__  # the user's line, not a line of the package
    trace = fw.walk(walker, jax.random.key(1), draws=20, progress=False)
    assert trace.flat.dtype == np.float64 and trace.draws["x"].dtype == np.float64
    assert np.isfinite(trace.flat).all()


def test_float64_leaves_do_not_warn():
    with warnings.catch_warnings():
        warnings.simplefilter("error", Float32Warning)
        fw.start(lambda x: -0.5 * jnp.sum(x**2), np.zeros(2), jax.random.key(0), chains=2)


def test_an_empty_leaf_is_refused_by_name():
    with pytest.raises(InputError, match="Leaf 'b' of the position is empty"):
        fw.start(lambda p: -0.5 * jnp.sum(p["a"] ** 2), {"a": jnp.zeros(2), "b": jnp.zeros(0)},
                 jax.random.key(0))


def test_a_host_callback_in_the_model_is_explained():
    def logdensity(x):
        return jax.pure_callback(lambda v: np.asarray(-0.5 * np.sum(v**2)),
                                 jax.ShapeDtypeStruct((), jnp.float64), x)

    with pytest.raises(ModelError, match="calls back to Python"):
        fw.start(logdensity, jnp.zeros(2), jax.random.key(0))


def test_large_dimension_is_announced_before_the_fit():
    # A log density returning a vector fails the structure check, right at the start of
    # the fit: the note must already have been given by then.
    with pytest.warns(FisherwalkWarning, match="gradient-based sampler such as NUTS"), \
            pytest.raises(ModelError, match="not a floating scalar"):
        fw.start(lambda x: x, jnp.zeros(1000), jax.random.key(0))
