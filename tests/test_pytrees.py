"""Positions of any pytree structure and dtype: property-based checks (hypothesis)."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from jax.flatten_util import ravel_pytree

import fisherwalk
from fisherwalk.base import pytrees

shapes = st.sampled_from([(), (1,), (3,), (2, 2), (1, 3)])
float_dtypes = st.sampled_from([np.float32, np.float64])


@st.composite
def positions(draw):
    """A dict or tuple of 1 to 3 floating leaves, possibly nested one level."""
    n = draw(st.integers(1, 3))
    leaves = [np.zeros(draw(shapes), dtype=draw(float_dtypes)) for _ in range(n)]
    kind = draw(st.sampled_from(["dict", "tuple", "nested"]))
    if kind == "dict":
        return {f"p{i}": leaf for i, leaf in enumerate(leaves)}
    if kind == "tuple":
        return tuple(leaves)
    return {"outer": {f"q{i}": leaf for i, leaf in enumerate(leaves)}}


def _gaussian_on(position):
    """An independent Gaussian on the ravelled position, mean 1, 2, 3, ..."""
    flat, _ = ravel_pytree(position)
    mean = jnp.arange(1.0, flat.size + 1.0)

    def logdensity(p):
        x, _ = ravel_pytree(p)
        return -0.5 * jnp.sum((x - mean) ** 2)

    return logdensity, np.asarray(mean)


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(positions())
def test_start_keeps_any_structure(position):
    # Whatever the structure and float dtypes, the mode comes back in the user's
    # structure, the chain states carry a leading chain axis on every leaf, and the
    # names count the scalar parameters in ravelled order.
    logdensity, mean = _gaussian_on(position)
    walker = fisherwalk.start(logdensity, position, jax.random.key(0), chains=2)
    fit = walker.report.laplace
    assert jax.tree.structure(fit.mode) == jax.tree.structure(position)
    np.testing.assert_allclose(ravel_pytree(fit.mode)[0], mean, atol=1e-6)
    for leaf, state_leaf in zip(jax.tree.leaves(position), jax.tree.leaves(walker.states.position),
                                strict=True):
        assert state_leaf.shape == (2, *np.shape(leaf))
    assert len(walker.names) == mean.size == walker.tuning.dim
    back = pytrees.unravel_batch(pytrees.ravel_batch(walker.states.position), fit.mode)
    for a, b in zip(jax.tree.leaves(back), jax.tree.leaves(walker.states.position), strict=True):
        np.testing.assert_array_equal(a, b)


@settings(max_examples=15, deadline=None)
@given(positions(), st.sampled_from([np.int32, np.int64, np.bool_]))
def test_non_floating_leaves_are_refused(position, bad_dtype):
    leaves, treedef = jax.tree.flatten(position)
    leaves[0] = np.zeros(np.shape(leaves[0]), dtype=bad_dtype)
    bad = jax.tree.unflatten(treedef, leaves)
    with pytest.raises(fisherwalk.InputError, match="dtype"):
        pytrees.flatten_position(bad)


def test_parameter_names_follow_ravel_order():
    position = {"b": np.zeros(2), "a": np.zeros((2, 2)), "c": np.asarray(0.0)}
    names = pytrees.parameter_names(position)
    assert names == ("a[0,0]", "a[0,1]", "a[1,0]", "a[1,1]", "b[0]", "b[1]", "c")
    flat, _ = ravel_pytree({"b": np.array([5.0, 6.0]), "a": np.arange(4.0).reshape(2, 2),
                            "c": np.asarray(7.0)})
    assert list(np.asarray(flat)) == [0.0, 1.0, 2.0, 3.0, 5.0, 6.0, 7.0]


def test_written_order_follows_the_dicts_as_written():
    from fisherwalk.base.pytrees import parameter_names, written_order

    position = {"span": np.zeros(2), "floor": 0.0, "noise": {"tau": 0.0, "log_sd": 0.0}}
    names = parameter_names(position)  # ravelled: floor, noise.log_sd, noise.tau, span[0..1]
    order = written_order(position)
    assert [names[j] for j in order] == ["span[0]", "span[1]", "floor", "noise.tau",
                                         "noise.log_sd"]
    assert sorted(order) == list(range(len(names)))
    assert written_order(np.zeros(3)) == (0, 1, 2)  # nothing to reorder
    assert written_order((1.0, {"b": 1.0, "a": 2.0})) == (0, 2, 1)
