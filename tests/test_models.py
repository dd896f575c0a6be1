"""Models with a space of their own (fisherwalk.models): NumPyro models and declared
constraints in; the draws under the model's site names, in the model's order, out; the
same through refine, walk, resume, handoff, saved tunings, ArviZ and the command line.

Outside references: NumPyro's own log densities (numpyro.infer.util.log_density, the
distributions' log_prob) for the declared transforms' Jacobians."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk

numpyro = pytest.importorskip("numpyro")
dist = pytest.importorskip("numpyro.distributions")

KEY = jax.random.key(0)
MODELS = Path(__file__).parent / "models"
# invented demo data: hours of running of six pumps and their flow (a normal regression)
HOURS = jnp.asarray([0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0])
FLOW = jnp.asarray([2.1, 2.4, 2.2, 2.9, 3.1, 3.0, 3.6, 3.5])


def _regression(hours, flow=None):
    noise = numpyro.sample("noise", dist.HalfNormal(1.0))
    slope = numpyro.sample("slope", dist.Normal(0.0, 1.0))
    intercept = numpyro.sample("intercept", dist.Normal(2.0, 2.0))
    numpyro.deterministic("flow_at_5h", intercept + 5.0 * slope)
    with numpyro.plate("pumps", hours.shape[0]):
        numpyro.sample("flow", dist.Normal(intercept + slope * hours, noise), obs=flow)


def _problem():
    return fisherwalk.model_problem(_regression, (HOURS,), {"flow": FLOW})


@pytest.fixture(scope="module")
def trace():
    problem = _problem()
    walker = fisherwalk.start(problem.logdensity_fn, problem.position, KEY, progress=False)
    walker = fisherwalk.refine(walker, KEY, progress=False)
    return fisherwalk.walk(walker, KEY, draws=300, progress=False)


def test_import_does_not_import_numpyro():
    # the package and the command (whose demo needs no model language) stay without them
    code = ("import sys, fisherwalk, fisherwalk.cli.command; "
            "print('numpyro' in sys.modules, 'pymc' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "False False"


@pytest.mark.slow
def test_problem_has_the_model_sites_in_order():
    problem = _problem()
    assert [s.name for s in problem.space.sites] == ["noise", "slope", "intercept",
                                                     "flow_at_5h"]
    assert [s.kind for s in problem.space.sites] == ["sample"] * 3 + ["deterministic"]
    assert [(s.name, s.shape) for s in problem.space.observed] == [("flow", (8,))]
    assert set(problem.position) == {"noise", "slope", "intercept"}


def test_log_density_is_numpyros_with_the_jacobian():
    # NumPyro's joint log density on the constrained space plus log|d exp(u)/du| = u
    from numpyro.infer.util import log_density

    problem = _problem()
    u = {"noise": jnp.asarray(-0.3), "slope": jnp.asarray(0.2), "intercept": jnp.asarray(1.9)}
    values = {"noise": jnp.exp(u["noise"]), "slope": u["slope"], "intercept": u["intercept"]}
    joint, _ = log_density(_regression, (HOURS,), {"flow": FLOW}, values)
    assert float(problem.logdensity_fn(u)) == pytest.approx(float(joint + u["noise"]),
                                                             rel=1e-12)


@pytest.mark.slow
def test_trace_shows_constrained_sites(trace):
    assert list(trace.draws) == ["noise", "slope", "intercept", "flow_at_5h"]
    np.testing.assert_allclose(trace.draws["noise"], np.exp(trace.unconstrained["noise"]))
    np.testing.assert_allclose(trace.draws["flow_at_5h"],
                               trace.draws["intercept"] + 5.0 * trace.draws["slope"])
    values, names = trace.columns()
    assert names == ("noise", "slope", "intercept", "flow_at_5h")
    summary = trace.summary()
    assert summary.names == names
    assert any("model's own space" in note for note in summary.notes)
    assert trace.pointwise.shape == (4, 300, 8)  # filled from the observed site


def test_to_arviz_fills_log_likelihood_and_predictive_reproducibly(trace):
    pytest.importorskip("arviz")
    idata = trace.to_arviz(prior_draws=20)
    assert list(idata.posterior.data_vars) == ["noise", "slope", "intercept", "flow_at_5h"]
    assert idata.log_likelihood["flow"].shape == (4, 300, 8)
    assert idata.posterior_predictive["flow"].shape == (4, 300, 8)
    assert idata.prior["noise"].shape == (1, 20)
    assert idata.prior_predictive["flow"].shape == (1, 20, 8)
    again = trace.to_arviz(predictive=True)
    np.testing.assert_array_equal(idata.posterior_predictive["flow"],
                                  again.posterior_predictive["flow"])
    # the replicates spread around the fitted line with the model's noise
    residual = idata.posterior_predictive["flow"].values - (
        trace.draws["intercept"][..., None] + trace.draws["slope"][..., None] * np.asarray(HOURS))
    ratio = residual.std() / np.sqrt(np.mean(trace.draws["noise"] ** 2))
    assert 0.95 < ratio < 1.05  # 9600 normal residuals: the sd of the ratio is about 0.007


@pytest.mark.slow
def test_resume_tuning_and_handoff_keep_the_space(trace, tmp_path):
    import blackjax

    problem = _problem()
    walker = trace.walker
    path = tmp_path / "run.ckpt"
    full = fisherwalk.walk(walker, KEY, draws=40, chunk=20, checkpoint=path, progress=False)
    resumed = fisherwalk.resume(path, problem.logdensity_fn, progress=False)
    assert list(resumed.draws) == list(full.draws)
    np.testing.assert_array_equal(resumed.draws["noise"], full.draws["noise"])
    fisherwalk.save_tuning(walker, tmp_path / "tuning.json")
    again = fisherwalk.start(problem.logdensity_fn, problem.position, KEY, progress=False,
                             shape=fisherwalk.load_tuning(tmp_path / "tuning.json"))
    assert fisherwalk.walk(again, KEY, draws=10, progress=False).space is problem.space
    states, parameters = fisherwalk.handoff(blackjax.nuts, problem.logdensity_fn,
                                            problem.position, KEY)
    assert set(states.position) == {"noise", "slope", "intercept"}


# --- declared constraints ---------------------------------------------------------------
@pytest.mark.parametrize("declared, value, numpyro_prior", [
    ("positive", jnp.asarray(1.5), dist.Gamma(2.0, 1.0)),
    (("interval", -1.0, 3.0), jnp.asarray(0.5), dist.Uniform(-1.0, 3.0)),
    ("simplex", jnp.asarray([0.2, 0.3, 0.5]), dist.Dirichlet(jnp.asarray([2.0, 3.0, 4.0]))),
    ("ordered", jnp.asarray([-1.0, 0.5, 2.0]), dist.Normal(0.0, 2.0).expand([3]).to_event(1)),
    pytest.param("correlation_cholesky", jnp.linalg.cholesky(jnp.asarray(
        [[1.0, 0.3, 0.1], [0.3, 1.0, -0.2], [0.1, -0.2, 1.0]])), dist.LKJCholesky(3, 2.0),
        marks=pytest.mark.slow),
])
def test_declared_transform_gives_numpyros_unconstrained_density(declared, value,
                                                                  numpyro_prior):
    # the same prior written as a NumPyro model and as a declared parameter: one log density
    # on the unconstrained space at the same point (the ordered case with a plain normal
    # prior: NumPyro's ordered_vector site needs a distribution with that support, so it is
    # compared with the log density plus the transform's Jacobian taken from jax.jacfwd)
    def logdensity(p):
        return numpyro_prior.log_prob(p["theta"])

    problem = fisherwalk.constrained_problem(logdensity, {"theta": value},
                                             {"theta": declared})
    u = problem.position
    back = problem.constrain(u)["theta"]
    np.testing.assert_allclose(back, value, atol=1e-10)  # the start maps back to itself
    if declared == "ordered":
        from numpyro.distributions.transforms import biject_to

        t = biject_to(dist.constraints.ordered_vector)
        jacobian = jnp.linalg.slogdet(jax.jacfwd(t)(u["theta"]))[1]
        expected = logdensity({"theta": back}) + jacobian
    else:
        def model():
            numpyro.sample("theta", numpyro_prior)
        expected = fisherwalk.model_problem(model).logdensity_fn(u)
    assert float(problem.logdensity_fn(u)) == pytest.approx(float(expected), rel=1e-10)


@pytest.mark.slow
def test_declared_deterministic_and_pointwise_are_shown():
    y = jnp.asarray([1.2, 0.4, 2.2, 0.9])

    def pointwise(p):
        return jax.scipy.stats.norm.logpdf(y, 0.0, p["sd"])

    problem = fisherwalk.constrained_problem(
        lambda p: jnp.sum(pointwise(p)) - p["sd"], {"sd": 1.0}, {"sd": "positive"},
        deterministic=lambda p: {"variance": p["sd"] ** 2}, pointwise=pointwise)
    walker = fisherwalk.start(problem.logdensity_fn, problem.position, KEY, progress=False)
    trace = fisherwalk.walk(walker, KEY, draws=50, progress=False)
    assert trace.columns()[1] == ("sd", "variance")
    np.testing.assert_allclose(trace.draws["variance"], trace.draws["sd"] ** 2)
    assert trace.pointwise.shape == (4, 50, 4)


# --- the command line -------------------------------------------------------------------
@pytest.mark.slow
def test_command_line_runs_a_numpyro_model_file(tmp_path):
    from fisherwalk.cli import command as cli

    out = tmp_path / "out"
    code = cli.main(["run", str(MODELS / "numpyro_model.py"), "--out", str(out), "--draws",
                     "200", "--warmup", "100", "--chains", "2", "--quiet",
                     "--no-compile-cache"])
    assert code == 0
    record = json.loads((out / "record.json").read_text())
    names = [p["name"] for p in record["summary"]["parameters"]]
    assert names == ["intercept", "slope", "noise", "noise_variance"]
    noise = record["summary"]["parameters"][2]
    assert noise["mean"] > 0 and set(noise) >= {"name", "mean", "sd"}
    with np.load(out / "draws.npz") as draws:
        assert list(draws["names"]) == names
        assert (draws["draws"][..., 2] > 0).all()
        np.testing.assert_allclose(draws["draws"][..., 2], np.exp(draws["unconstrained"][
            ..., list(draws["unconstrained_names"]).index("noise")]))


@pytest.mark.slow
def test_command_line_runs_a_numpyro_model_of_a_table(tmp_path):
    from fisherwalk.cli import command as cli

    table = tmp_path / "table.csv"
    table.write_text("plot,count,hours\nA,3,0.5\nB,1,2.0\nC,5,0.0\nD,2,1.5\nE,0,3.0\n")
    out = tmp_path / "out"
    code = cli.main(["run", str(MODELS / "numpyro_table_model.py"), "--data", str(table),
                     "--out", str(out), "--draws", "200", "--warmup", "100", "--chains",
                     "2", "--quiet", "--no-compile-cache", "--pointwise"])
    assert code == 0
    record = json.loads((out / "record.json").read_text())
    assert [p["name"] for p in record["summary"]["parameters"]] == ["a", "b", "rate_at_zero"]
    assert record["sampling"]["pointwise_observations"] == 5


@pytest.mark.slow
def test_a_factor_term_gives_a_log_likelihood_but_no_replicates():
    # numpyro.factor adds a term to the log density: an observed site with nothing to draw
    pytest.importorskip("arviz")
    y = jnp.asarray([0.3, 1.2, -0.4, 0.8])

    def model(y):
        mu = numpyro.sample("mu", dist.Normal(0.0, 1.0))
        numpyro.factor("fit", jnp.sum(-0.5 * (y - mu) ** 2))

    problem = fisherwalk.model_problem(model, (y,))
    walker = fisherwalk.start(problem.logdensity_fn, problem.position, KEY, progress=False)
    idata = fisherwalk.walk(walker, KEY, draws=50, progress=False).to_arviz(prior_draws=5)
    assert "log_likelihood" in idata.groups() and "prior" in idata.groups()
    assert "posterior_predictive" not in idata.groups()
