"""Neal's funnel: does NUTS reach the neck, and if not, does the summary say so?

Neal (2003), "Slice sampling", Annals of Statistics 31(3), section 8: v ~ N(0, 3²),
x_i | v ~ N(0, e^v), i = 1..9 (d = 10). The marginal of v is exactly N(0, 9). The search
for a mode runs v down to about -40.5 (where x = 0 and the density along v peaks, with a
curvature ratio of e^40 between x and v: no usable Laplace approximation), so start()
warms NUTS up from draws (prepare/modeless.py).

The check, stated honestly: either v's mean and sd match N(0, 9) within 4 Monte Carlo
standard errors (results/diagnostics.py's MCSE; 4 MCSE, a 6e-5 false-failure rate per
statistic under the normal approximation), or the summary warns that the divergences
gather in the neck and that v's low tail is under-represented. What happened with these
keys (measured 2026-12-05, blackjax 1.7.1): NUTS at the default target 0.8 did NOT reach
the neck (v's sd about 2.4 against 3, 5% quantile about -2.3 against -4.9), and the
summary's divergence warning said so; the test asserts that branch explicitly, and fails
if the estimates are off with no such warning or the warning is given for a sampler that
got the answer.
"""

from __future__ import annotations

import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.results.diagnostics import mcse_mean, mcse_sd


def funnel(p):
    v, x = p["v"], p["x"]
    return -0.5 * (v / 3.0) ** 2 - 0.5 * jnp.sum(x**2) * jnp.exp(-v) - 4.5 * v


@pytest.mark.slow
def test_funnel_reaches_the_neck_or_says_it_did_not():
    p0 = {"v": jnp.zeros(()), "x": jnp.ones(9)}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        walker = fisherwalk.start(funnel, p0, jax.random.key(0), sampler="nuts",
                                  progress=False)
    assert walker.report.laplace.no_mode
    assert any("v toward −∞" in str(w.message) for w in caught)  # the scale, not an x_i
    walker = fisherwalk.refine(walker, jax.random.key(1), progress=False)
    trace = fisherwalk.walk(walker, jax.random.key(2), draws=2000, progress=False)
    v = np.asarray(trace.draws["v"])
    reached = (abs(v.mean()) < 4 * mcse_mean(v)) and (abs(v.std() - 3.0) < 4 * mcse_sd(v))
    neck = [w for w in trace.summary().warnings
            if "funnel" in w and "low values of v" in w and "under-represented" in w]
    assert not reached  # what happened with these keys (module docstring)
    assert neck, "v's N(0, 9) was missed with no warning that the neck was not reached"
    assert v.std() < 3.0  # the warning's direction: the low tail is missing
