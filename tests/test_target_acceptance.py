"""target_acceptance= for HMC and NUTS, and the divergence warning's advice.

Dual averaging (Hoffman & Gelman 2014, "The No-U-Turn sampler", JMLR 15, section 3.2.1)
moves the step size until the mean acceptance probability meets its target; the checks
below read the realised acceptance against the target the user gave.

The divergence rule (results/divergences.py) is checked on exact draws of Neal's funnel
(Neal 2003, "Slice sampling", Annals of Statistics 31(3): v ~ N(0, 3²), x_i | v ~
N(0, e^v)), drawn directly, and of its non-centred form (v and z_i = x_i e^(-v/2)
independent standard normals up to v's scale), with divergences placed where v is low:
the funnel must be called a funnel and the non-centred form must not be told to
non-centre.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.results.divergences import divergence_site, divergence_warning


def gaussian(x):
    return -0.5 * jnp.sum(x**2 * jnp.arange(1.0, 5.0))


@pytest.mark.slow
def test_nuts_aims_at_the_given_acceptance_and_records_it(tmp_path):
    walker = fisherwalk.start(gaussian, jnp.ones(4), jax.random.key(0), sampler="nuts",
                              target_acceptance=0.95, progress=False)
    assert walker.tuning.target_acceptance == 0.95
    assert walker.model.engine.target_acceptance == 0.95
    walker = fisherwalk.refine(walker, jax.random.key(1), progress=False)
    trace = fisherwalk.walk(walker, jax.random.key(2), draws=1000, progress=False)
    summary = trace.summary()
    # dual averaging's residual after 200 steps is a few hundredths on a Gaussian (measured
    # 0.003-0.025 at 0.8, stepsize.py); the realised acceptance at the averaged step must
    # be within 0.03 + 4 MCSE of the aim (our tolerance, no published source)
    assert abs(summary.acceptance_pooled - 0.95) < 0.03 + 4 * summary.acceptance_mcse
    default = fisherwalk.refine(
        fisherwalk.start(gaussian, jnp.ones(4), jax.random.key(0), sampler="nuts",
                         progress=False), jax.random.key(1), progress=False)
    assert walker.tuning.step_size < default.tuning.step_size  # a higher aim, a smaller step
    path = fisherwalk.save_tuning(walker, tmp_path / "tuning.json")
    saved = fisherwalk.load_tuning(path)
    assert saved.tuning.aim == 0.95 and saved.record["tuning"]["aim"] == 0.95
    assert default.tuning.aim is None


def _funnel_draws(rng, n=4000, dim=9, noncentred=False):
    v = 3.0 * rng.standard_normal((4, n))
    z = rng.standard_normal((4, n, dim))
    x = z if noncentred else z * np.exp(v / 2)[..., None]
    return np.concatenate([v[..., None], x], axis=2)


def test_divergences_in_a_funnel_advise_non_centring():
    rng = np.random.default_rng(3)
    flat = _funnel_draws(rng)
    divergent = np.zeros(flat.shape[:2], int)
    divergent[:, 1:] = flat[:, :-1, 0] < -4.0  # transitions started deep in the neck
    site = divergence_site(flat, divergent)
    assert site.funnel and site.index == 0
    names = ("v",) + tuple(f"x[{i}]" for i in range(9))
    text = divergence_warning(flat, divergent, names, None)
    assert "funnel" in text and "non-centred" in text and "low values of v" in text


def test_divergences_in_a_non_centred_model_advise_a_higher_target():
    rng = np.random.default_rng(4)
    flat = _funnel_draws(rng, noncentred=True)
    divergent = np.zeros(flat.shape[:2], int)
    divergent[:, 1:] = flat[:, :-1, 0] < -4.0
    site = divergence_site(flat, divergent)
    assert not site.funnel and site.index == 0  # low v, but z's spread does not collapse
    names = ("v",) + tuple(f"z[{i}]" for i in range(9))
    text = divergence_warning(flat, divergent, names, 0.9)
    assert "non-centred" not in text and "raise target_acceptance to 0.95" in text
