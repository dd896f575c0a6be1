"""Raw errors of the adversarial round become the package's messages (issue 21, item 11).

- a log density returning float32 with x64 on, in a gradient sampler's refine (it failed
  with JAX's "Custom JVP rule must produce..."): cast at the edge, as the random walk;
- a band of NaN gradient at the mode: a FitError that says NaN gradient and where;
- a NaN gradient during walk: counted and named as a gradient fault;
- Neal's funnel (Neal 2003, "Slice sampling", Ann. Statist. 31, section 8: v ~ N(0, 3²),
  x_i | v ~ N(0, e^v)): the fit says the curvature spans more than float64 resolves (a
  funnel), not only "not positive definite".
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.errors import FitError

KEY = jax.random.key(0)


@pytest.mark.slow
def test_float32_log_density_with_x64_in_a_gradient_sampler_refine():
    def float32_normal(x):
        return (-0.5 * jnp.sum(x**2)).astype(jnp.float32)

    walker = fisherwalk.start(float32_normal, jnp.zeros(2), KEY, chains=2, sampler="mala",
                              progress=False)
    walker = fisherwalk.refine(walker, jax.random.key(1), progress=False)
    trace = fisherwalk.walk(walker, jax.random.key(2), 50, progress=False)
    assert trace.flat.dtype == np.float64 and np.isfinite(trace.flat).all()


def _band(x):  # finite everywhere; the gradient in x[0] is NaN wherever |x[0]| < 0.1
    return -0.5 * jnp.sum((x - 0.02) ** 2) + 0.0 * jnp.sqrt(
        jnp.maximum(jnp.abs(x[0]) - 0.1, 0.0))


def test_nan_gradient_band_at_the_mode_is_a_fit_error_saying_nan_gradient_and_where():
    with pytest.raises(FitError, match="gradient of the log density is NaN") as info:
        fisherwalk.start(_band, jnp.array([1.0, 1.0]), KEY, chains=2, progress=False)
    assert "x[0] = 0.0" in str(info.value)  # where: inside the band, |x[0]| < 0.1


@pytest.mark.slow
def test_nan_gradient_during_walk_is_named_a_gradient_fault():
    def kink(x):  # the gradient in x[0] is NaN for x[0] > 1.5, the value stays finite
        return -0.5 * jnp.sum(x**2) + 0.0 * jnp.sqrt(jnp.maximum(1.5 - x[0], 0.0))

    walker = fisherwalk.start(kink, jnp.zeros(2), KEY, chains=4, sampler="mala",
                              progress=False)
    trace = fisherwalk.walk(walker, jax.random.key(3), 2000, progress=False)
    assert trace.faults.sum() > 0  # N(0, 1) visits x[0] > 1.5 about 7% of the time
    text = " ".join(trace.summary().warnings)
    assert "gradient that is not finite" in text


def _funnel(p):  # Neal's funnel in d = 10
    v, x = p[0], p[1:]
    return -0.5 * v**2 / 9.0 - 0.5 * jnp.sum(x**2) * jnp.exp(-v) - 0.5 * x.shape[0] * v


def test_neals_funnel_is_explained_not_called_not_positive_definite():
    with pytest.raises(FitError, match="funnel") as info:
        fisherwalk.start(_funnel, jnp.zeros(10), KEY, chains=2, progress=False)
    assert "more than float64 resolves" in str(info.value)
