"""walk(): reproducibility, compilation, thinning, faults."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk


def _model(counter=None):
    prec = jnp.asarray([[2.0, 0.6, 0.0], [0.6, 1.0, 0.2], [0.0, 0.2, 0.5]])

    def logdensity(x):
        if counter is not None:
            counter.append(1)  # runs only when JAX traces the function
        return -0.5 * x @ prec @ x

    return logdensity


@pytest.fixture(scope="module")
def walker():
    return fisherwalk.start(_model(), jnp.ones(3), jax.random.key(0), chains=4)


def test_same_key_same_draws_whatever_the_chunking(walker):
    a = fisherwalk.walk(walker, jax.random.key(1), draws=230, progress=False)
    b = fisherwalk.walk(walker, jax.random.key(1), draws=230, progress=False)
    c = fisherwalk.walk(walker, jax.random.key(1), draws=230, chunk=37, progress=False)
    assert np.array_equal(a.flat, b.flat)
    assert np.array_equal(a.flat, c.flat)
    assert np.array_equal(a.logdensity, c.logdensity)
    d = fisherwalk.walk(walker, jax.random.key(2), draws=230, progress=False)
    assert not np.array_equal(a.flat, d.flat)


def test_thinning_keeps_every_kth_state(walker):
    full = fisherwalk.walk(walker, jax.random.key(4), draws=120, progress=False)
    thin = fisherwalk.walk(walker, jax.random.key(4), draws=40, thin=3, progress=False)
    # Step keys depend only on the global step index, so thinning picks states 3, 6, 9, ...
    assert np.array_equal(thin.flat, full.flat[:, 2::3])
    np.testing.assert_allclose(thin.accepted, full.accepted.reshape(4, 40, 3).mean(axis=2))
    assert thin.flat.shape == (4, 40, 3)


def test_walk_compiles_once():
    # Count how often JAX traces the log density: a second walk with a new key, and a walk
    # after refine() (same engine, same chunk), must not trace it again.
    counter = []
    w = fisherwalk.start(_model(counter), jnp.ones(3), jax.random.key(0), chains=4)
    w = fisherwalk.refine(w, jax.random.key(1), progress=False)
    after_refine = len(counter)
    fisherwalk.walk(w, jax.random.key(2), draws=200, progress=False)
    fisherwalk.walk(w, jax.random.key(3), draws=300, progress=False)
    assert len(counter) == after_refine


def test_trace_continues_from_its_last_state(walker):
    one = fisherwalk.walk(walker, jax.random.key(5), draws=50, progress=False)
    last = one.flat[:, -1]
    np.testing.assert_array_equal(np.asarray(one.walker.flat_positions()), last)


def test_nan_region_never_reaches_the_draws():
    # Standard normal in 2-D, but the model returns NaN for x0 > 1 (a numerical fault in
    # a corner of parameter space). No NaN may be accepted; every fault is counted.
    def logdensity(x):
        value = -0.5 * jnp.sum(x**2)
        return jnp.where(x[0] > 1.0, jnp.nan, value)

    walker = fisherwalk.start(logdensity, jnp.zeros(2), jax.random.key(0), chains=4)
    trace = fisherwalk.walk(walker, jax.random.key(1), draws=2000, progress=False)
    assert np.isfinite(trace.flat).all()
    assert (trace.flat[:, :, 0] <= 1.0).all()
    assert trace.faults.sum() > 0
    summary = trace.summary()
    assert any("NaN" in w or "fault" in w.lower() for w in summary.warnings)


def test_bad_arguments(walker):
    with pytest.raises(fisherwalk.InputError, match="draws"):
        fisherwalk.walk(walker, jax.random.key(0), draws=0)
    with pytest.raises(fisherwalk.InputError, match="thin"):
        fisherwalk.walk(walker, jax.random.key(0), draws=10, thin=1.5)
    with pytest.raises(fisherwalk.InputError, match="random key"):
        fisherwalk.walk(walker, "seed", draws=10)
    logdensity = np.array(walker.state.logdensity)
    logdensity[2] = np.nan
    broken = walker._replace(state=walker.state._replace(logdensity=logdensity))
    with pytest.raises(fisherwalk.SamplingError, match="chain 2"):
        fisherwalk.walk(broken, jax.random.key(0), draws=10)
