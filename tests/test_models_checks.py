"""Outside checks of models with constrained parameters (fisherwalk.models): the draws in
the model's own space against closed-form posteriors and reference libraries.

Tolerances: a Monte Carlo estimate is compared with the exact value within 4 of its
Monte Carlo standard errors, computed by the project's own MCSE functions
(fisherwalk.results.diagnostics: mcse_mean, mcse_sd, mcse_quantile, after Vehtari,
Gelman, Simpson, Carpenter & Bürkner 2021, Bayesian Analysis 16(2)). With a correct
MCSE, |z| > 4 happens with probability 6e-5 per check; fixed keys make each test
deterministic. Two Monte Carlo estimates are compared within 4 x sqrt(MCSE₁² + MCSE₂²).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import stats

import fisherwalk
from fisherwalk.results import diagnostics

numpyro = pytest.importorskip("numpyro")
dist = pytest.importorskip("numpyro.distributions")
datasets = pytest.importorskip("statsmodels.datasets")

KEY = jax.random.key(0)


def _run(problem, sampler="rwm", draws=2000, seed=0):
    keys = jax.random.split(jax.random.key(seed), 3)
    walker = fisherwalk.start(problem.logdensity_fn, problem.position, keys[0], chains=4,
                              sampler=sampler, progress=False)
    walker = fisherwalk.refine(walker, keys[1], progress=False)
    return fisherwalk.walk(walker, keys[2], draws=draws, progress=False)


def _within_mcse(draws, law, what):
    """Mean, sd, 5% and 95% quantiles of ``draws`` (chains, draws) against ``law``
    (a frozen scipy distribution), each within 4 MCSE."""
    pooled = np.asarray(draws).ravel()
    checks = [("mean", pooled.mean(), law.mean(), diagnostics.mcse_mean(draws)),
              ("sd", pooled.std(ddof=1), law.std(), diagnostics.mcse_sd(draws))]
    for p in (0.05, 0.95):
        checks.append((f"{p:.0%} quantile", np.quantile(pooled, p), law.ppf(p),
                       diagnostics.mcse_quantile(draws, p)))
    for name, estimate, exact, error in checks:
        assert abs(estimate - exact) <= 4 * error, (what, name, estimate, exact, error)


# --- normal data, unknown mean and variance, conjugate normal-inverse-gamma prior -------
# Gelman, Carlin, Stern, Dunson, Vehtari & Rubin (2013), Bayesian Data Analysis, 3rd ed.,
# §3.3: with mu | s2 ~ N(mu0, s2/k0) and s2 ~ Inv-Gamma(a0, b0), the posterior of s2 is
# Inv-Gamma(a0 + n/2, b0 + ((n - 1) v + k0 n (ybar - mu0)² / (k0 + n)) / 2), v the sample
# variance. Data: the annual flow of the Nile at Aswan 1871-1970 (statsmodels' bundled
# `nile` dataset; Cobb 1978, Biometrika 65(2)), in 10^10 m^3.
MU0, K0, A0, B0 = 9.0, 1.0, 1.0, 1.0


def _nile():
    return jnp.asarray(datasets.nile.load_pandas().data["volume"].to_numpy() / 100.0)


def _variance_law(y):
    y = np.asarray(y)
    n, ybar, v = y.size, y.mean(), y.var(ddof=1)
    a = A0 + n / 2
    b = B0 + 0.5 * ((n - 1) * v + K0 * n * (ybar - MU0) ** 2 / (K0 + n))
    return stats.invgamma(a, scale=b)


def _nig_model(y):
    s2 = numpyro.sample("s2", dist.InverseGamma(A0, B0))
    mu = numpyro.sample("mu", dist.Normal(MU0, jnp.sqrt(s2 / K0)))
    with numpyro.plate("years", y.shape[0]):
        numpyro.sample("y", dist.Normal(mu, jnp.sqrt(s2)), obs=y)


def _nig_logdensity(y):
    def logdensity(p):  # in the parameters' own terms: s2 > 0
        s2, mu = p["s2"], p["mu"]
        prior = (-(A0 + 1) * jnp.log(s2) - B0 / s2
                 + jax.scipy.stats.norm.logpdf(mu, MU0, jnp.sqrt(s2 / K0)))
        return prior + jnp.sum(jax.scipy.stats.norm.logpdf(y, mu, jnp.sqrt(s2)))
    return logdensity


@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["rwm", "nuts"])
def test_numpyro_variance_matches_inverse_gamma(sampler):
    y = _nile()
    trace = _run(fisherwalk.model_problem(_nig_model, (y,)), sampler,
                 draws=3000 if sampler == "rwm" else 1000)
    assert list(trace.draws) == ["s2", "mu"]  # the model's order, constrained values
    assert (trace.draws["s2"] > 0).all()
    _within_mcse(trace.draws["s2"], _variance_law(y), f"NumPyro model, {sampler}")


@pytest.mark.parametrize("sampler", ["rwm", pytest.param("nuts", marks=pytest.mark.slow)])
def test_declared_positive_variance_matches_inverse_gamma(sampler):
    y = _nile()
    problem = fisherwalk.constrained_problem(_nig_logdensity(y), {"s2": 2.0, "mu": 9.0},
                                             {"s2": "positive"})
    trace = _run(problem, sampler, draws=3000 if sampler == "rwm" else 1000, seed=1)
    _within_mcse(trace.draws["s2"], _variance_law(y), f"declared positive, {sampler}")


@pytest.mark.slow
def test_forgotten_jacobian_is_caught_by_the_closed_form():
    # the check above can fail: exp() without its log-Jacobian shifts the posterior of s2
    # to Inv-Gamma(a - 1, b) (the density loses a factor s2), which the test must reject
    y = _nile()
    plain = _nig_logdensity(y)
    walker = fisherwalk.start(lambda p: plain({"s2": jnp.exp(p["log_s2"]), "mu": p["mu"]}),
                              {"log_s2": 0.0, "mu": 9.0}, KEY, progress=False)
    trace = fisherwalk.walk(fisherwalk.refine(walker, KEY, progress=False), KEY, draws=3000,
                            progress=False)
    s2 = np.exp(trace.draws["log_s2"])
    with pytest.raises(AssertionError):
        _within_mcse(s2, _variance_law(y), "no Jacobian")


@pytest.mark.slow
def test_pymc_variance_matches_inverse_gamma():
    # the same conjugate model written in PyMC (its JAX graphs: log density with the
    # Jacobian of s2's log transform, the map back, the observed pointwise log likelihood)
    pm = pytest.importorskip("pymc")
    y = np.asarray(_nile())
    with pm.Model() as model:
        s2 = pm.InverseGamma("s2", alpha=A0, beta=B0)
        mu = pm.Normal("mu", MU0, sigma=pm.math.sqrt(s2 / K0))
        pm.Normal("y", mu, sigma=pm.math.sqrt(s2), observed=y)
    trace = _run(fisherwalk.model_problem(model), draws=3000, seed=2)
    assert list(trace.draws) == ["s2", "mu"] and trace.pointwise.shape[-1] == y.size
    _within_mcse(trace.draws["s2"], _variance_law(y), "PyMC model, rwm")


# --- a hand-written transform with its Jacobian against the declared one --------------
@pytest.mark.slow
def test_manual_jacobian_and_declared_transform_agree():
    # the same posterior written twice: log s2 with its log-Jacobian by hand, and s2
    # declared positive; their s2 means, sds and quantiles agree within 4 combined MCSE
    # (different keys, so two independent Monte Carlo estimates)
    y = _nile()
    plain = _nig_logdensity(y)

    def by_hand(p):
        return plain({"s2": jnp.exp(p["log_s2"]), "mu": p["mu"]}) + p["log_s2"]

    walker = fisherwalk.start(by_hand, {"log_s2": 0.0, "mu": 9.0}, jax.random.key(5),
                              progress=False)
    manual = np.exp(fisherwalk.walk(fisherwalk.refine(walker, jax.random.key(6),
                                                      progress=False),
                                    jax.random.key(7), draws=3000,
                                    progress=False).draws["log_s2"])
    declared = _run(fisherwalk.constrained_problem(plain, {"s2": 2.0, "mu": 9.0},
                                                   {"s2": "positive"}), draws=3000,
                    seed=11).draws["s2"]
    for stat, error in ((np.mean, diagnostics.mcse_mean), (np.std, diagnostics.mcse_sd)):
        gap = abs(stat(manual) - stat(declared))
        assert gap <= 4 * np.hypot(error(manual), error(declared))
    for p in (0.05, 0.95):
        gap = abs(np.quantile(manual, p) - np.quantile(declared, p))
        assert gap <= 4 * np.hypot(diagnostics.mcse_quantile(manual, p),
                                   diagnostics.mcse_quantile(declared, p))


# --- a simplex: Dirichlet-multinomial ---------------------------------------------------
# Dirichlet(alpha) prior and multinomial counts give the Dirichlet(alpha + counts)
# posterior, whose marginals are Beta(alpha_k + n_k, sum(alpha + n) - alpha_k - n_k)
# (e.g. Gelman et al. 2013, Bayesian Data Analysis, 3rd ed., §3.4). Counts: the three
# cultivars of the wine data bundled with scikit-learn (Forina et al.; UCI wine data).
def _wine_counts():
    from sklearn.datasets import load_wine

    return np.bincount(load_wine().target).astype(float)


def _check_dirichlet(w, counts, what):
    alpha = 1.0 + counts
    for k in range(counts.size):
        _within_mcse(w[..., k], stats.beta(alpha[k], alpha.sum() - alpha[k]),
                     f"{what}, w[{k}]")


@pytest.mark.slow
def test_numpyro_simplex_matches_dirichlet():
    counts = _wine_counts()

    def model(counts, total):
        w = numpyro.sample("w", dist.Dirichlet(jnp.ones(3)))
        numpyro.sample("counts", dist.Multinomial(total, w), obs=counts)

    problem = fisherwalk.model_problem(model, (jnp.asarray(counts), int(counts.sum())))
    trace = _run(problem, draws=3000)
    assert trace.draws["w"].shape[-1] == 3 and trace.flat.shape[-1] == 2
    np.testing.assert_allclose(trace.draws["w"].sum(-1), 1.0, atol=1e-12)
    _check_dirichlet(trace.draws["w"], counts, "NumPyro")


@pytest.mark.slow
def test_declared_simplex_matches_dirichlet():
    counts = _wine_counts()

    def logdensity(p):  # flat Dirichlet(1, 1, 1) prior, multinomial kernel
        return jnp.sum(jnp.asarray(counts) * jnp.log(p["w"]))

    problem = fisherwalk.constrained_problem(logdensity, {"w": jnp.ones(3) / 3},
                                             {"w": "simplex"})
    _check_dirichlet(_run(problem, draws=3000, seed=3).draws["w"], counts, "declared")


# --- logistic regression on an open dataset --------------------------------------------
# Spector & Mazzeo (1980), "Probit analysis and economic education", Journal of Economic
# Education 11: grade improvement against GPA, TUCE and PSI (statsmodels' `spector`).
SCALE = 2.5


def _spector():
    data = datasets.spector.load_pandas()
    x = data.exog.to_numpy()
    x = (x - x.mean(0)) / x.std(0)
    return np.column_stack([np.ones(len(x)), x]), data.endog.to_numpy()


def _logistic_model(x, y=None):
    beta = numpyro.sample("beta", dist.Normal(0.0, SCALE).expand([x.shape[1]]).to_event(1))
    with numpyro.plate("students", x.shape[0]):
        numpyro.sample("y", dist.Bernoulli(logits=x @ beta), obs=y)


@pytest.mark.slow
def test_logistic_map_matches_statsmodels_penalised_fit():
    # the mode of the N(0, SCALE²) prior x likelihood is the ridge-penalised fit:
    # statsmodels' GLM.fit_regularized minimises -loglik/n + alpha/2 |b|² (L1_wt = 0),
    # so alpha = 1 / (n SCALE²)
    import statsmodels.api as sm

    x, y = _spector()
    problem = fisherwalk.model_problem(_logistic_model, (jnp.asarray(x),),
                                       {"y": jnp.asarray(y)})
    mode = np.asarray(fisherwalk.laplace(problem.logdensity_fn, problem.position).mode["beta"])
    ridge = sm.GLM(y, x, family=sm.families.Binomial()).fit_regularized(
        alpha=1.0 / (len(y) * SCALE**2), L1_wt=0.0, cnvrg_tol=1e-12, maxiter=1000)
    # statsmodels' elastic-net solver stops at a coarser tolerance (measured 2e-5 apart)
    np.testing.assert_allclose(mode, ridge.params, atol=1e-4)
    # scipy's BFGS on the same penalised log likelihood written in numpy, to 1e-10
    from scipy.optimize import minimize

    def negative(b):
        eta = x @ b
        return np.sum(np.logaddexp(0.0, eta) - y * eta) + 0.5 * b @ b / SCALE**2

    def gradient(b):
        return x.T @ (1.0 / (1.0 + np.exp(-(x @ b))) - y) + b / SCALE**2

    best = minimize(negative, np.zeros(x.shape[1]), jac=gradient, method="BFGS",
                    options={"gtol": 1e-10})
    np.testing.assert_allclose(mode, best.x, atol=1e-7)


@pytest.mark.slow
def test_logistic_posterior_means_match_a_long_blackjax_nuts_run():
    import blackjax

    x, y = _spector()
    problem = fisherwalk.model_problem(_logistic_model, (jnp.asarray(x),),
                                       {"y": jnp.asarray(y)})
    ours = _run(problem, "nuts", draws=2000, seed=4).draws["beta"]
    # reference: BlackJAX's NUTS with its own window adaptation, on the same log density
    warm = blackjax.window_adaptation(blackjax.nuts, problem.logdensity_fn)
    (state, parameters), _ = warm.run(jax.random.key(9), problem.position, num_steps=1000)
    kernel = blackjax.nuts(problem.logdensity_fn, **parameters)

    def one_chain(key, state):
        def step(state, key):
            state, _ = kernel.step(key, state)
            return state, state.position["beta"]
        return jax.lax.scan(step, state, jax.random.split(key, 10000))[1]

    starts = jax.vmap(lambda _: state)(jnp.arange(2))
    reference = jax.vmap(one_chain)(jax.random.split(jax.random.key(10), 2), starts)
    reference = np.asarray(reference)
    for j in range(x.shape[1]):
        gap = abs(ours[..., j].mean() - reference[..., j].mean())
        tolerance = 4 * np.hypot(diagnostics.mcse_mean(ours[..., j]),
                                 diagnostics.mcse_mean(reference[..., j]))
        assert gap <= tolerance, (j, gap, tolerance)


# --- leave-one-out from the automatically filled log likelihood ------------------------
@pytest.mark.slow
def test_loo_from_observed_sites_equals_a_hand_written_pointwise():
    # ArviZ's PSIS-LOO (Vehtari, Gelman & Gabry 2017, Statistics and Computing 27) on the
    # log_likelihood filled from the observed sites, and on walk(pointwise=...) written by
    # hand for the same model and the same draws
    az = pytest.importorskip("arviz")
    y = _nile()
    problem = fisherwalk.model_problem(_nig_model, (y,))
    walker = fisherwalk.start(problem.logdensity_fn, problem.position, KEY, progress=False)
    walker = fisherwalk.refine(walker, KEY, progress=False)

    def by_hand(p):
        s2 = jnp.exp(p["s2"])  # the sampler's coordinates: log s2 (NumPyro's transform)
        return jax.scipy.stats.norm.logpdf(y, p["mu"], jnp.sqrt(s2))

    auto = fisherwalk.walk(walker, KEY, draws=1000, progress=False)
    hand = fisherwalk.walk(walker, KEY, draws=1000, progress=False, pointwise=by_hand)
    idata_auto = auto.to_arviz(predictive=False)
    assert list(idata_auto.log_likelihood.data_vars) == ["y"]
    loo_auto = az.loo(idata_auto)
    loo_hand = az.loo(hand.to_arviz(predictive=False))
    assert f"{loo_auto.elpd_loo:.10f}" == f"{loo_hand.elpd_loo:.10f}"
    assert f"{loo_auto.p_loo:.10f}" == f"{loo_hand.p_loo:.10f}"
