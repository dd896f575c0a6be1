"""walk(pointwise=..., derived=...): functions of the kept draws (workflow/derive.py), their rows
in the summary, their chunked evaluation, their refusals, and checkpoint/resume."""

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import stats

import fisherwalk
from fisherwalk import InputError, ModelError
from fisherwalk.results.diagnostics import ess_mean
from fisherwalk.workflow import derive

# ----------------------------------------------------------------- log-normal: k = exp(log k)

MU, S = 0.4, 0.6  # log k ~ N(MU, S²), so k is log-normal(MU, S)


def _log_k_density(p):
    return -0.5 * ((p["log_k"] - MU) / S) ** 2


@pytest.fixture(scope="module")
def lognormal_run():
    walker = fisherwalk.start(_log_k_density, {"log_k": jnp.asarray(0.0)}, jax.random.key(21))
    return fisherwalk.walk(walker, jax.random.key(22), 4000, progress=False,
                           derived=lambda p: {"k": jnp.exp(p["log_k"])})


def _mcse_quantile(x: np.ndarray, prob: float) -> float:
    """MCSE of a quantile by the method of Vehtari, Gelman, Simpson, Carpenter & Bürkner
    (2021), Bayesian Analysis 16(2), section 4.3: the ESS of the indicator I(x <= q) (here
    fisherwalk's own ess_mean, split chains), then the draws at the central 68.3% interval
    of Beta(ESS p + 1, ESS (1 - p) + 1); half their distance."""
    quantile = np.quantile(x, prob)
    ess = float(ess_mean((x <= quantile).astype(float)))
    low, high = stats.beta.ppf([0.1586553, 0.8413447], ess * prob + 1, ess * (1 - prob) + 1)
    ordered = np.sort(x.ravel())
    n = ordered.size
    return float(ordered[min(math.ceil(high * n), n - 1)]
                 - ordered[max(math.floor(low * n), 0)]) / 2.0


def test_derived_lognormal_matches_the_analytic_moments(lognormal_run):
    # Log-normal distribution: mean exp(MU + S²/2), p-quantile exp(MU + S z_p) with z_p the
    # standard normal quantile (Johnson, Kotz & Balakrishnan 1994, Continuous Univariate
    # Distributions vol. 1, 2nd ed., ch. 14, sections 1-3; formulas from memory, standard).
    # Each estimate must lie within 4 of its Monte Carlo standard errors (mean: the
    # summary's MCSE; quantiles: Vehtari et al. 2021 as above): a chance failure has
    # probability about 6e-5 per check.
    trace = lognormal_run
    summary = trace.summary()
    assert summary.names == ("log_k", "k")
    j = summary.names.index("k")
    k = trace.derived["k"]
    assert k.shape == (4, 4000)
    np.testing.assert_allclose(k, np.exp(trace.draws["log_k"]), rtol=1e-15)
    mean = math.exp(MU + S**2 / 2)
    assert abs(summary.mean[j] - mean) < 4 * summary.mcse[j]
    for prob, estimate, error in ((0.05, summary.lower[j], summary.mcse_lower[j]),
                                  (0.5, summary.median[j], summary.mcse_median[j]),
                                  (0.95, summary.upper[j], summary.mcse_upper[j])):
        exact = math.exp(MU + S * stats.norm.ppf(prob))
        assert abs(estimate - exact) < 4 * _mcse_quantile(k, prob), prob
        assert error == pytest.approx(_mcse_quantile(k, prob), rel=0.05)  # the summary's own
    # the quantile MCSE helper agrees with ArviZ's implementation of the same method
    az = pytest.importorskip("arviz")
    for prob in (0.05, 0.5, 0.95):
        assert _mcse_quantile(k, prob) == pytest.approx(
            float(az.mcse(k, method="quantile", prob=prob)), rel=0.05)
    # the derived row carries the same diagnostics as a parameter row
    assert summary.ess_bulk[j] > 400 and summary.rhat[j] < 1.01
    assert summary.ess_bulk[j] == pytest.approx(summary.ess_bulk[0], rel=1e-12)  # monotone map


def test_derived_names_follow_the_pytree(lognormal_run):
    trace = derive.attach(lognormal_run, derived=lambda p: {
        "ratio": jnp.stack([p["log_k"], 2 * p["log_k"]]), "k": jnp.exp(p["log_k"])})
    # in the order the function wrote them (ratio before k), not sorted
    assert trace.summary().names == ("log_k", "ratio[0]", "ratio[1]", "k")
    bare = derive.attach(lognormal_run, derived=lambda p: jnp.exp(p["log_k"]))
    assert bare.summary().names == ("log_k", "derived")


# ------------------------------------------------------------------- chunks, memory, refusals


def test_chunked_evaluation_is_exact_and_compiles_once(lognormal_run, monkeypatch):
    trace = lognormal_run
    y = np.linspace(-1.0, 2.0, 7)
    traced = []

    def pointwise(p):
        traced.append(1)  # runs at tracing time only
        return stats_logpdf(y, p["log_k"])

    expected = stats.norm.logpdf(y[None, None, :], loc=trace.draws["log_k"][..., None])
    counts = []
    for values in (1 << 22, 7 * 1000, 7 * 999):  # chunks of 4096, 1000, 999 draws of 16000
        monkeypatch.setattr(derive, "CHUNK_VALUES", values)
        traced.clear()
        out = derive.evaluate_pointwise(pointwise, trace.flat, trace.walker.unravel)
        np.testing.assert_allclose(out, expected, rtol=1e-13)
        counts.append(len(traced))
    assert counts[0] == counts[1] == counts[2]  # the chunk count does not add compilations


def stats_logpdf(y, mu):
    return -0.5 * (y - mu) ** 2 - 0.5 * jnp.log(2 * jnp.pi)


def test_bad_functions_are_refused_before_sampling(lognormal_run):
    walker = lognormal_run.walker
    key = jax.random.key(1)
    with pytest.raises(ModelError, match="not a vector"):
        fisherwalk.walk(walker, key, 10, progress=False, pointwise=lambda p: p["log_k"])
    with pytest.raises(ModelError, match="KeyError"):
        fisherwalk.walk(walker, key, 10, progress=False, derived=lambda p: p["nope"])
    with pytest.raises(InputError, match="function"):
        fisherwalk.walk(walker, key, 10, progress=False, derived=3.0)
    with pytest.raises(InputError, match="log_k"):
        fisherwalk.walk(walker, key, 10, progress=False, derived=lambda p: {"log_k": p["log_k"]})


def test_derived_leaf_named_like_a_parameter_leaf_is_refused():
    walker = fisherwalk.start(lambda p: -0.5 * jnp.sum(p["beta"] ** 2),
                              {"beta": jnp.zeros(2)}, jax.random.key(8), chains=2)
    with pytest.raises(InputError, match="beta"):  # summary rows beta[0] vs beta, same leaf
        fisherwalk.walk(walker, jax.random.key(9), 20, progress=False,
                        derived=lambda p: {"beta": jnp.sum(p["beta"])})


def test_non_finite_derived_value_names_chain_and_draw(lognormal_run):
    with pytest.raises(ModelError, match=r"chain \d+, draw \d+"):
        derive.evaluate_derived(lambda p: {"bad": jnp.log(p["log_k"])}, lognormal_run.flat,
                                lognormal_run.walker.unravel, lognormal_run.names)


def test_nan_in_derived_at_some_draws_keeps_the_draws(lognormal_run):
    # issue 21, item 6: a NaN at some draws discarded the whole run after sampling
    walker = lognormal_run.walker
    with pytest.warns(fisherwalk.FisherwalkWarning, match=r"walk\(derived=...\) failed"):
        trace = fisherwalk.walk(walker, jax.random.key(1), 200, progress=False,
                                derived=lambda p: {"bad": jnp.log(p["log_k"])})
    reference = fisherwalk.walk(walker, jax.random.key(1), 200, progress=False)
    np.testing.assert_array_equal(trace.flat, reference.flat)  # the parameters intact
    assert trace.derived is None and len(trace.failures) == 1
    failure = trace.failures[0]
    negative = np.argwhere(reference.flat[..., 0] < 0)  # log of a negative log_k: NaN
    assert failure.function == "derived" and failure.count == len(negative) > 0
    assert [list(d) for d in failure.draws] == negative[:20].tolist()
    assert "chain" in failure.message


def test_exception_in_pointwise_keeps_the_draws(lognormal_run):
    def failing(p):  # traces fine, fails when run
        def host(x):
            raise ValueError("the observations file moved")
        return jax.pure_callback(host, jax.ShapeDtypeStruct((2,), p["log_k"].dtype),
                                 p["log_k"], vmap_method="sequential")

    with pytest.warns(fisherwalk.FisherwalkWarning, match="pointwise"):
        trace = fisherwalk.walk(lognormal_run.walker, jax.random.key(1), 50, progress=False,
                                pointwise=failing, derived=lambda p: {"k": jnp.exp(p["log_k"])})
    assert trace.pointwise is None and trace.derived is not None
    (failure,) = trace.failures
    assert failure.function == "pointwise" and failure.count == 0
    assert "observations file moved" in failure.message


# ------------------------------------------------------------------- checkpoint and resume


def test_resume_recomputes_pointwise_and_derived(lognormal_run, tmp_path):
    walker = lognormal_run.walker
    y = jnp.array([0.1, 0.9])

    def pointwise(p):
        return stats_logpdf(y, p["log_k"])

    def derived(p):
        return {"k": jnp.exp(p["log_k"])}

    reference = fisherwalk.walk(walker, jax.random.key(5), 300, chunk=100, progress=False,
                                pointwise=pointwise, derived=derived)
    directory = tmp_path / "run.ckpt"
    calls = []

    def engine(*args, **kwargs):  # interrupted during the third chunk
        calls.append(1)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return walker.engine(*args, **kwargs)

    with pytest.raises(KeyboardInterrupt):
        fisherwalk.walk(walker._replace(model=walker.model._replace(engine=engine)),
                        jax.random.key(5), 300, chunk=100, progress=False,
                        checkpoint=directory, pointwise=pointwise, derived=derived)
    trace = fisherwalk.resume(directory, _log_k_density, progress=False,
                              pointwise=pointwise, derived=derived)
    assert trace.complete
    np.testing.assert_array_equal(trace.flat, reference.flat)
    np.testing.assert_array_equal(trace.pointwise, reference.pointwise)
    np.testing.assert_array_equal(trace.derived["k"], reference.derived["k"])
