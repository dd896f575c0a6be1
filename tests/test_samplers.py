"""The gradient samplers through the public API: start(sampler=...), refine, walk, resume,
tuning files, the BlackJAX hand-off and sampler="auto".

Targets are exact Gaussians, whose moments are known in closed form, and a Gaussian
linear regression on the diabetes data that scikit-learn ships (Efron, Hastie, Johnstone
& Tibshirani 2004, "Least angle regression", Annals of Statistics 32(2)), whose
posterior under a Gaussian prior and a known noise variance is Gaussian with the
conjugate mean and covariance (Gelman, Carlin, Stern, Dunson, Vehtari & Rubin 2013,
Bayesian Data Analysis, 3rd ed., section 14.2). Tolerances are 4 Monte Carlo standard
errors (MCSE from the summary's ESS) unless a comment says otherwise; keys are fixed.
"""

from __future__ import annotations

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from sklearn.datasets import load_diabetes

import fisherwalk
from fisherwalk.results.diagnostics import mcse_mean

A = np.array([[1.0, 0.4, 0.0, 0.2], [0.4, 2.0, -0.5, 0.0], [0.0, -0.5, 1.5, 0.3],
              [0.2, 0.0, 0.3, 0.8]])
COV = A @ A.T / 2 + 0.2 * np.eye(4)  # an invented correlated covariance
MEAN = np.array([1.0, -2.0, 0.5, 3.0])
PREC = np.linalg.inv(COV)


def gaussian(x):
    r = x - jnp.asarray(MEAN)
    return -0.5 * r @ jnp.asarray(PREC) @ r


@pytest.fixture(scope="module")
def runs():
    out = {}
    for k, sampler in enumerate(("mala", "hmc", "nuts")):
        walker = fisherwalk.start(gaussian, jnp.zeros(4), jax.random.key(k), sampler=sampler,
                                  progress=False)
        walker = fisherwalk.refine(walker, jax.random.key(10 + k), progress=False)
        trace = fisherwalk.walk(walker, jax.random.key(20 + k), draws=1500, progress=False)
        out[sampler] = walker, trace
    return out


@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["mala", "hmc"])
def test_realised_acceptance_matches_the_prediction_at_the_step_used(runs, sampler):
    # On an exact Gaussian the theory's acceptance at the step size actually used is exact
    # (fisherwalk.theory.gradient, quadrature), so the realised mean acceptance probability
    # must match it within 4 MCSE (ESS of the per-draw acceptance probabilities).
    walker, trace = runs[sampler]
    summary = trace.summary()
    predicted = walker.tuning.target_acceptance
    assert abs(summary.acceptance_pooled - predicted) < 4 * summary.acceptance_mcse
    # and dual averaging put that step near the theory's optimum for d = 4: the optimum's
    # acceptance is within 0.05 (dual averaging's residual in 200 steps, measured
    # 0.003-0.02 on such targets; our tolerance, no published source)
    assert abs(predicted - walker.tuning.choice.acceptance) < 0.05


@pytest.mark.slow
def test_nuts_reaches_its_dual_averaging_target(runs):
    walker, trace = runs["nuts"]
    summary = trace.summary()
    # BlackJAX's acceptance statistic averaged over the run; dual averaging aims at 0.8
    # (Hoffman & Gelman 2014, JMLR 15): 4 MCSE plus 0.03 for the averaged iterate's bias
    # after 200 steps (measured 0.01-0.02; our tolerance, no published source).
    assert abs(summary.acceptance_pooled - 0.8) < 4 * summary.acceptance_mcse + 0.03
    assert trace.divergent is not None and trace.divergent.sum() == 0
    assert trace.gradients.min() >= 1


@pytest.mark.parametrize("sampler", ["mala", "hmc", "nuts"])
def test_means_and_covariance_of_a_gaussian(runs, sampler):
    _, trace = runs[sampler]
    error = trace.flat.reshape(-1, 4).mean(axis=0) - MEAN
    assert np.all(np.abs(error) < 4 * np.asarray(mcse_mean(trace.flat))), error
    # the sample covariance, loosely: 15% of each variance (ESS >= 1000 puts the sd of a
    # variance estimate near sqrt(2/1000) = 4.5%, so 15% is above 3 sd)
    cov = np.cov(trace.flat.reshape(-1, 4).T)
    np.testing.assert_allclose(np.diag(cov), np.diag(COV), rtol=0.15)


def _diabetes():
    data = load_diabetes()
    x = (data.data - data.data.mean(0)) / data.data.std(0)
    x = np.column_stack([np.ones(len(x)), x[:, :5]])  # intercept and five covariates
    y = (data.target - data.target.mean()) / data.target.std()
    return x, y


@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["mala", "nuts"])
def test_glm_posterior_means_agree_with_the_conjugate_answer(sampler):
    # Gaussian linear model y ~ N(X b, s²) with s = 0.7 known and a N(0, 3² I) prior: the
    # posterior is N(m, V), V = (XᵀX/s² + I/9)⁻¹, m = V Xᵀ y / s² (Gelman et al. 2013,
    # section 14.2), computed here with numpy as the independent reference.
    x, y = _diabetes()
    s2, prior = 0.7**2, 9.0
    v = np.linalg.inv(x.T @ x / s2 + np.eye(x.shape[1]) / prior)
    m = v @ x.T @ y / s2
    xj, yj = jnp.asarray(x), jnp.asarray(y)

    def logdensity(p):
        r = yj - xj @ p["b"]
        return -0.5 * jnp.sum(r**2) / s2 - 0.5 * jnp.sum(p["b"] ** 2) / prior

    walker = fisherwalk.start(logdensity, {"b": jnp.zeros(x.shape[1])}, jax.random.key(3),
                              sampler=sampler, progress=False)
    walker = fisherwalk.refine(walker, jax.random.key(4), progress=False)
    trace = fisherwalk.walk(walker, jax.random.key(5), draws=1000, progress=False)
    summary = trace.summary()
    assert np.all(np.abs(summary.mean - m) < 4 * summary.mcse), (summary.mean - m) / summary.mcse
    np.testing.assert_allclose(summary.sd, np.sqrt(np.diag(v)), rtol=0.15)


@pytest.mark.slow
def test_a_resumed_nuts_run_is_bit_identical(runs, tmp_path):
    walker, _ = runs["nuts"]
    reference = fisherwalk.walk(walker, jax.random.key(7), draws=300, chunk=50,
                                progress=False)
    engine, calls = walker.model.engine, []

    def interrupted(*args, **kwargs):
        calls.append(1)
        if len(calls) == 4:
            raise KeyboardInterrupt
        return engine.run(*args, **kwargs)

    broken = walker._replace(model=walker.model._replace(engine=engine._replace(
        run=interrupted)))
    with pytest.raises(KeyboardInterrupt), pytest.warns(fisherwalk.FisherwalkWarning):
        fisherwalk.walk(broken, jax.random.key(7), draws=300, chunk=50, progress=False,
                        checkpoint=tmp_path / "run.ckpt", checkpoint_every=0)
    resumed = fisherwalk.resume(tmp_path / "run.ckpt", gaussian, progress=False)
    assert resumed.complete
    assert np.array_equal(resumed.flat, reference.flat)
    assert np.array_equal(resumed.divergent, reference.divergent)
    # the Hamiltonian is kept in the checkpoint's segments too (az.bfmi needs it)
    assert resumed.energy is not None and np.array_equal(resumed.energy, reference.energy)


def test_a_gradient_tuning_survives_a_tuning_file(runs, tmp_path):
    walker, _ = runs["hmc"]
    fisherwalk.save_tuning(walker, tmp_path / "tuning.json")
    saved = fisherwalk.load_tuning(tmp_path / "tuning.json")
    assert saved.tuning.sampler == "hmc" and saved.tuning.step_size == walker.tuning.step_size
    assert np.array_equal(saved.tuning.shape, walker.tuning.shape)


@pytest.mark.slow
def test_handoff_parameters_run_in_a_plain_blackjax_loop():
    states, parameters = fisherwalk.handoff(blackjax.nuts, gaussian, jnp.zeros(4),
                                            jax.random.key(30))
    assert set(parameters) == {"step_size", "inverse_mass_matrix", "max_num_doublings"}
    np.testing.assert_allclose(parameters["inverse_mass_matrix"], COV, rtol=1e-8)
    step = jax.jit(jax.vmap(blackjax.nuts(gaussian, **parameters).step))
    draws = []
    for i in range(1000):
        states, _ = step(jax.random.split(jax.random.key(i), 4), states)
        draws.append(np.asarray(states.position))
    draws = np.swapaxes(np.stack(draws), 0, 1)  # (chains, draws, d)
    error = draws.reshape(-1, 4).mean(axis=0) - MEAN
    assert np.all(np.abs(error) < 4 * np.asarray(mcse_mean(draws))), error


def test_handoff_refuses_mala_with_a_way_out():
    with pytest.raises(fisherwalk.InputError, match='sampler="mala"'):
        fisherwalk.handoff(blackjax.mala, gaussian, jnp.zeros(4), jax.random.key(0))


def test_auto_says_which_sampler_it_chose_and_why():
    walker = fisherwalk.start(gaussian, jnp.zeros(4), jax.random.key(40), sampler="auto",
                              progress=False)
    note = next(n for n in walker.report.notes if n.startswith("sampler='auto' chose"))
    chosen = walker.tuning.sampler
    assert f"chose {chosen!r}" in note and "predicted time to bulk ESS 400" in note


@pytest.mark.slow
def test_a_nonfinite_gradient_is_refused_with_the_random_walk_as_the_way_out():
    def logdensity(x):  # finite value everywhere; gradient NaN in x[2] wherever x[2] >= 1
        return -0.5 * jnp.sum(x**2) + 0.0 * jnp.sqrt(jnp.maximum(1.0 - x[2], 0.0))

    with pytest.raises(fisherwalk.ModelError, match='sampler="rwm"') as info:
        # N(0, 1) puts 16% of x[2]'s mass above 1: a chain start or the warm-up meets it
        walker = fisherwalk.start(logdensity, jnp.zeros(3), jax.random.key(0),
                                  sampler="nuts", progress=False)
        fisherwalk.refine(walker, jax.random.key(1), progress=False)
    assert "x[2]" in str(info.value)


def test_an_unknown_sampler_is_refused():
    with pytest.raises(fisherwalk.InputError, match="sampler"):
        fisherwalk.start(gaussian, jnp.zeros(4), jax.random.key(0), sampler="slice")


def test_the_tuning_picture_of_a_gradient_sampler_plots_its_own_theory(runs):
    pytest.importorskip("matplotlib")
    from fisherwalk.results import plots
    from fisherwalk.theory.gradient import step_acceptance

    _, trace = runs["hmc"]
    fig = plots.plot_tuning(trace)
    line = fig.axes[0].lines[0]  # the predicted acceptance against the step size
    steps, predicted = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
    np.testing.assert_allclose(predicted, step_acceptance("hmc", steps, 4), rtol=1e-12)
    assert "HMC" in fig._suptitle.get_text()
