"""start(..., chain_starts=...): chains start where the user says, and the report says how
far each start is from the mode in posterior sds."""

import re

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.spatial.distance import mahalanobis

import fisherwalk

# A correlated 2-d Gaussian: the Laplace approximation is exact, H = Σ⁻¹.
_MEAN = np.array([1.0, -2.0])
_COV = np.array([[2.0, 0.6], [0.6, 0.5]])
_PRECISION = np.linalg.inv(_COV)


def _logdensity(p):
    x = jnp.stack([p["a"], p["b"]]) - _MEAN
    return -0.5 * x @ jnp.asarray(_PRECISION) @ x


STARTS = {"a": np.array([1.0, 3.0, -1.0]), "b": np.array([-2.0, -1.0, 0.5])}


@pytest.mark.parametrize("sampler", ["rwm", "nuts"])
def test_chains_start_at_the_given_points(sampler):
    walker = fisherwalk.start(_logdensity, {"a": 0.0, "b": 0.0}, jax.random.key(1), chains=3,
                              chain_starts=STARTS, progress=False, sampler=sampler)
    given = np.stack([STARTS["a"], STARTS["b"]], axis=1)  # ravelled order: a, b
    np.testing.assert_allclose(walker.flat_positions(), given, rtol=0, atol=1e-12)
    np.testing.assert_allclose(np.asarray(walker.state.logdensity),
                               [float(_logdensity({"a": a, "b": b})) for a, b in given],
                               rtol=1e-12)


def test_report_gives_the_mahalanobis_distance_of_each_start():
    walker = fisherwalk.start(_logdensity, {"a": 0.0, "b": 0.0}, jax.random.key(1), chains=3,
                              chain_starts=STARTS, progress=False)
    note = next(n for n in walker.report.notes if "chain_starts" in n)
    quoted = [float(v) for v in re.findall(r"chain \d+ (\d+\.\d+)", note)]
    # reference: scipy's Mahalanobis distance with the exact precision Σ⁻¹
    given = np.stack([STARTS["a"], STARTS["b"]], axis=1)
    expected = [mahalanobis(x, _MEAN, _PRECISION) for x in given]
    np.testing.assert_allclose(quoted, expected, atol=0.006)  # quoted to 2 decimals
    # chain 0 starts at the mode, chain 1 1.58 sds out, chain 2 5.66: only chain 2 lies
    # beyond sqrt(chi2_2 quantile 0.999) = 3.72 and is named
    assert expected[0] == 0.0 and expected[1] < 3.72 < expected[2]
    assert "chain(s) 2 start beyond it" in note


def test_refusals_name_the_chain_and_the_parameter():
    key = jax.random.key(1)
    with pytest.raises(fisherwalk.InputError, match=r"must be \(4,\)"):
        fisherwalk.start(_logdensity, {"a": 0.0, "b": 0.0}, key, chains=4,
                         chain_starts=STARTS, progress=False)
    bad = {"a": np.array([1.0, np.nan, 0.0]), "b": np.zeros(3)}
    with pytest.raises(fisherwalk.InputError, match="chain 1, parameter a"):
        fisherwalk.start(_logdensity, {"a": 0.0, "b": 0.0}, key, chains=3,
                         chain_starts=bad, progress=False)
    with pytest.raises(fisherwalk.InputError, match="structure"):
        fisherwalk.start(_logdensity, {"a": 0.0, "b": 0.0}, key, chains=3,
                         chain_starts={"a": np.zeros(3)}, progress=False)
