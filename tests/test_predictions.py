"""walk(..., predict=fn): predictions with each draw's own key, reproducible whatever the
chunking, summarised after the derived quantities and exported as posterior_predictive."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.workflow.derive import PREDICT_STREAM

Y = np.random.default_rng(2).normal(3.0, 1.5, 30)  # invented demo data


def _logdensity(p):
    sigma = jnp.exp(p["log_sigma"])
    return (jnp.sum(-0.5 * ((jnp.asarray(Y) - p["mu"]) / sigma) ** 2) - Y.size * p["log_sigma"]
            - 0.5 * p["mu"] ** 2 / 100.0 - 0.5 * p["log_sigma"] ** 2)


def _predict(p, key):
    sigma = jnp.exp(p["log_sigma"])
    k1, k2 = jax.random.split(key)
    return {"y_new": p["mu"] + sigma * jax.random.normal(k1),
            "pair": p["mu"] + sigma * jax.random.normal(k2, (2,))}


@pytest.fixture(scope="module")
def walker():
    keys = jax.random.split(jax.random.key(8), 2)
    w = fisherwalk.start(_logdensity, {"mu": 0.0, "log_sigma": 0.0}, keys[0], chains=3,
                         progress=False)
    return fisherwalk.refine(w, keys[1], progress=False)


@pytest.mark.slow
def test_predictions_are_reproducible_and_do_not_depend_on_chunking(walker):
    key = jax.random.key(21)
    small = fisherwalk.walk(walker, key, 300, chunk=64, progress=False, predict=_predict)
    large = fisherwalk.walk(walker, key, 300, chunk=1000, progress=False, predict=_predict)
    for name in ("y_new", "pair"):
        np.testing.assert_array_equal(small.predictions[name], large.predictions[name])
    # each draw's key is fold_in(fold_in(fold_in(run key, PREDICT_STREAM), chain), draw)
    base = jax.random.fold_in(key, PREDICT_STREAM)
    for c, t in ((0, 0), (2, 137), (1, 299)):
        draw_key = jax.random.fold_in(jax.random.fold_in(base, c), t)
        position = {"mu": small.draws["mu"][c, t], "log_sigma": small.draws["log_sigma"][c, t]}
        want = _predict(position, draw_key)
        np.testing.assert_allclose(small.predictions["y_new"][c, t], want["y_new"], rtol=1e-12)
        np.testing.assert_allclose(small.predictions["pair"][c, t], want["pair"], rtol=1e-12)


def test_predictive_spread_follows_the_law_of_total_variance(walker):
    # Var(y_new) = E[sigma²] + Var(mu) over the posterior draws (law of total variance).
    # With 3 x 2000 = 6000 predictions the sample variance's relative sd is about
    # sqrt(2 / 6000) = 1.8% for iid normal draws (more for correlated ones, the chains'
    # ESS per draw is near 0.2 here): 10% is about 2.5 of those sds at an ESS of 1200.
    trace = fisherwalk.walk(walker, jax.random.key(3), 2000, progress=False, predict=_predict)
    sigma2 = np.exp(2 * trace.draws["log_sigma"])
    expected = sigma2.mean() + trace.draws["mu"].var()
    assert trace.predictions["y_new"].var() == pytest.approx(expected, rel=0.1)
    summary = trace.summary()
    assert summary.names[-3:] == ("y_new", "pair[0]", "pair[1]")  # in the order written
    pytest.importorskip("arviz")
    data = trace.to_arviz()
    assert data.posterior_predictive["y_new"].shape == (3, 2000)
    assert data.posterior_predictive["pair"].shape == (3, 2000, 2)


def test_a_prediction_function_without_a_key_is_refused(walker):
    with pytest.raises(fisherwalk.ModelError, match="predict"):
        fisherwalk.walk(walker, jax.random.key(3), 20, progress=False,
                        predict=lambda p: p["mu"])
