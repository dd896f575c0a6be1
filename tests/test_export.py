"""Trace.to_arviz(): the draws, statistics, pointwise log likelihood and settings handed to
ArviZ (results/export.py), checked against ArviZ's own diagnostics and LOO."""

import sys
import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import stats

import fisherwalk
from fisherwalk import InputError

az = pytest.importorskip("arviz")

CENTRE = np.array([1.0, -2.0, 0.5])


def _logdensity(p):
    # independent normals: beta ~ N(CENTRE, diag(1, 4, 0.25)), sigma ~ N(0, 1)
    scales = jnp.array([1.0, 2.0, 0.5])
    return (-0.5 * jnp.sum(((p["beta"] - CENTRE) / scales) ** 2)
            - 0.5 * p["sigma"] ** 2)


@pytest.fixture(scope="module")
def gaussian_run():
    position = {"beta": jnp.zeros(3), "sigma": jnp.asarray(0.3)}
    walker = fisherwalk.start(_logdensity, position, jax.random.key(11), chains=4)
    trace = fisherwalk.walk(walker, jax.random.key(12), 600, progress=False,
                            derived=lambda p: {"spread": jnp.exp(p["sigma"])})
    return trace, trace.to_arviz()


def test_posterior_is_the_draws_with_the_users_names_and_shapes(gaussian_run):
    trace, idata = gaussian_run
    post = idata.posterior
    assert post["beta"].dims[:2] == ("chain", "draw")
    assert post["beta"].shape == (4, 600, 3)
    assert post["sigma"].dims == ("chain", "draw") and post["sigma"].shape == (4, 600)
    np.testing.assert_array_equal(post["beta"].values, trace.draws["beta"])
    np.testing.assert_array_equal(post["sigma"].values, trace.draws["sigma"])
    np.testing.assert_array_equal(post["spread"].values, trace.derived["spread"])
    assert set(post.data_vars) == {"beta", "sigma", "spread"}


def test_sampler_statistics_and_settings(gaussian_run):
    trace, idata = gaussian_run
    ss = idata.sample_stats
    np.testing.assert_array_equal(ss["lp"].values, trace.logdensity)
    np.testing.assert_array_equal(ss["acceptance_rate"].values, trace.acceptance_rate)
    np.testing.assert_array_equal(ss["accepted"].values, trace.accepted)
    np.testing.assert_array_equal(ss["faults"].values, trace.faults)
    assert "diverging" not in ss  # random-walk Metropolis has none
    assert "log_likelihood" not in idata.groups()  # no pointwise= given
    tuning = trace.walker.tuning
    for attrs in (idata.attrs, idata.posterior.attrs, ss.attrs):
        assert attrs["scale"] == pytest.approx(tuning.scale, rel=0, abs=0)
        assert attrs["target_acceptance"] == tuning.target_acceptance
        assert attrs["shape_kind"] == tuning.shape_kind
        assert attrs["thin"] == 1 and attrs["seconds"] == trace.seconds
        assert attrs["fisherwalk_version"] == fisherwalk.__version__


def test_arviz_diagnostics_agree_with_the_summary(gaussian_run):
    # Both implement Vehtari, Gelman, Simpson, Carpenter & Bürkner (2021), "Rank-
    # normalization, folding, and localization: an improved R-hat", Bayesian Analysis 16(2):
    # on the same draws they agree to floating-point rounding (relative 1e-9 allows for a
    # different order of the sums).
    trace, idata = gaussian_run
    summary = trace.summary()
    row = {name: j for j, name in enumerate(summary.names)}
    checks = (("bulk", summary.ess_bulk), ("tail", summary.ess_tail))
    for method, ours in checks:
        theirs = az.ess(idata, method=method)
        for j in range(3):
            assert theirs["beta"].values[j] == pytest.approx(ours[row[f"beta[{j}]"]], rel=1e-9)
        assert float(theirs["sigma"]) == pytest.approx(ours[row["sigma"]], rel=1e-9)
        assert float(theirs["spread"]) == pytest.approx(ours[row["spread"]], rel=1e-9)
    rhat = az.rhat(idata)
    for j in range(3):
        assert rhat["beta"].values[j] == pytest.approx(summary.rhat[row[f"beta[{j}]"]], rel=1e-9)
    assert float(rhat["spread"]) == pytest.approx(summary.rhat[row["spread"]], rel=1e-9)
    mcse = az.mcse(idata)
    assert float(mcse["sigma"]) == pytest.approx(summary.mcse[row["sigma"]], rel=1e-9)


def test_missing_arviz_names_the_extra(gaussian_run, monkeypatch):
    trace, _ = gaussian_run
    monkeypatch.setitem(sys.modules, "arviz", None)  # makes `import arviz` fail
    with pytest.raises(InputError, match=r"pip install fisherwalk\[arviz\]"):
        trace.to_arviz()


# ---------------------------------------------------------------- LOO on a Poisson regression

# Open data shipped with statsmodels: statsmodels.datasets.cpunish, 17 US states in 1997,
# from J. Gill (2001), "Generalized Linear Models: A Unified Approach", Sage, the worked
# Poisson regression example there and in the statsmodels GLM documentation.
# Covariates standardised; coefficients a priori N(0, 2.5²).


@pytest.fixture(scope="module")
def poisson_run():
    cpunish = pytest.importorskip("statsmodels.datasets.cpunish")
    frame = cpunish.load_pandas().data
    y = frame["EXECUTIONS"].to_numpy(float)
    columns = ["INCOME", "PERPOVERTY", "PERBLACK", "VC100k96", "SOUTH", "DEGREE"]
    x = frame[columns].to_numpy(float)
    x = np.column_stack([np.ones(y.size), (x - x.mean(0)) / x.std(0)])
    xj, yj = jnp.asarray(x), jnp.asarray(y)

    def pointwise(p):
        eta = xj @ p["beta"]
        return yj * eta - jnp.exp(eta) - jax.scipy.special.gammaln(yj + 1.0)

    def logdensity(p):
        return jnp.sum(pointwise(p)) - 0.5 * jnp.sum(p["beta"] ** 2) / 2.5**2

    walker = fisherwalk.start(logdensity, {"beta": jnp.zeros(7)}, jax.random.key(3))
    walker = fisherwalk.refine(walker, jax.random.key(4), progress=False)
    trace = fisherwalk.walk(walker, jax.random.key(5), 1000, progress=False,
                            pointwise=pointwise)
    return trace, x, y


def test_pointwise_is_the_poisson_log_likelihood_of_each_record(poisson_run):
    trace, x, y = poisson_run
    assert trace.pointwise.shape == (4, 1000, 17)
    rate = np.exp(np.einsum("cdk,nk->cdn", trace.draws["beta"], x))
    np.testing.assert_allclose(trace.pointwise, stats.poisson.logpmf(y, rate), rtol=1e-10)


def test_arviz_loo_runs_on_the_pointwise_log_likelihood(poisson_run):
    trace, _, _ = poisson_run
    idata = trace.to_arviz()
    values = idata.log_likelihood["observations"]
    assert values.dims == ("chain", "draw", "observation")
    np.testing.assert_array_equal(values.values, trace.pointwise)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ArviZ warns about k > 0.7 on 17 records
        loo = az.loo(idata, pointwise=True)
    k = np.asarray(loo.pareto_k)
    assert k.shape == (17,) and np.all(np.isfinite(k))
    assert np.isfinite(loo.elpd_loo) and loo.elpd_loo < 0
    # ArviZ's p_loo is lppd - elpd_loo, with lppd the log pointwise predictive density of
    # the full data (Vehtari, Gelman & Gabry 2017, Statistics and Computing 27, eq. 3):
    # recomputed here from trace.pointwise, it shows ArviZ read the values we stored.
    lppd = np.sum(np.log(np.mean(np.exp(trace.pointwise.reshape(-1, 17)), axis=0)))
    assert loo.p_loo == pytest.approx(lppd - loo.elpd_loo, rel=1e-9)
    assert loo.p_loo > 0


@pytest.mark.slow
@pytest.mark.parametrize("sampler, title", [("nuts", "NUTS"), ("hmc", "HMC")])
def test_hamiltonian_samplers_hand_arviz_their_energy(sampler, title):
    # A 5-d standard normal: the whitened target is N(0, I_5) and the kinetic energy at a
    # kept draw, energy + log density (the log density has no constant here), averages
    # d/2 = 2.5 (momentum ~ N(0, I) is preserved by the flow; Neal 2011, "MCMC using
    # Hamiltonian dynamics", Handbook of MCMC, ch. 5). Its sd is sqrt(d/2) = 1.58 per draw;
    # over 4 x 500 draws with ESS above 500 the mean's error is below 0.07, so 0.35 is 5
    # of them. BFMI of such a target is near 1 (Betancourt 2016, "Diagnosing suboptimal
    # cotangent disintegrations in Hamiltonian Monte Carlo"); 0.3 is the common warning
    # threshold (common practice, no published source).
    def logdensity(x):
        return -0.5 * jnp.sum(x**2)

    keys = jax.random.split(jax.random.key(13), 3)
    walker = fisherwalk.start(logdensity, jnp.zeros(5), keys[0], chains=4, sampler=sampler,
                              progress=False)
    walker = fisherwalk.refine(walker, keys[1], progress=False)
    trace = fisherwalk.walk(walker, keys[2], 500, progress=False)
    data = trace.to_arviz()
    ss = data.sample_stats
    assert data.attrs["sampler"].startswith(title) and "step_size" in data.attrs
    np.testing.assert_array_equal(ss["energy"].values, trace.energy)
    assert ss["diverging"].dtype == bool and "accepted" not in ss
    kinetic = trace.energy + trace.logdensity
    assert np.all(kinetic >= -1e-9)
    assert kinetic.mean() == pytest.approx(2.5, abs=0.35)
    assert np.all(az.bfmi(data) > 0.3)
