"""Every registered sampler family gets every feature (parametrised over the registry),
and the worked example of adding a family: a textbook random walk defined only here.

Target: an invented correlated Gaussian in d = 3, whose mean is known exactly. Runs are
short (2 chains, a few hundred draws): the checks are of plumbing (the right field, the
right count, the same draws after a resume), except where a comment gives a Monte Carlo
tolerance. Keys are fixed.
"""

from __future__ import annotations

import json
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk as fw
from fisherwalk.cli.parser import build_parser
from fisherwalk.persistence import tuningfile
from fisherwalk.results.diagnostics import mcse_mean
from fisherwalk.samplers import hmc, randomwalk, registry
from fisherwalk.theory.gradient import INTEGRATION_TIME
from fisherwalk.theory.randomwalk import expected_acceptance, expected_jump
from fisherwalk.workflow import handoff
from fisherwalk.workflow.devices import chain_devices, spread_chains

PRECISION = np.array([[2.0, 0.6, 0.0], [0.6, 1.0, 0.3], [0.0, 0.3, 0.5]])
MEAN = np.array([1.0, -2.0, 0.5])
FAMILIES = registry.names()  # collected before the worked example registers its own


def logdensity(p):
    x = p - jnp.asarray(MEAN)
    return -0.5 * x @ jnp.asarray(PRECISION) @ x


@pytest.fixture(scope="module")
def walkers():
    out = {}
    for k, name in enumerate(FAMILIES):
        walker = fw.start(logdensity, jnp.zeros(3), jax.random.key(k), chains=2, sampler=name,
                          progress=False)
        out[name] = fw.refine(walker, jax.random.key(10 + k), steps=200, progress=False)
    return out


@pytest.mark.slow
@pytest.mark.parametrize("name", FAMILIES)
def test_spread_chains_keeps_the_family_and_walks(walkers, name):
    # Before the registry, spread_chains swapped a NUTS walker's loop for the random walk's.
    walker = walkers[name]
    spread = spread_chains(walker, 1)
    assert spread.family is walker.family and chain_devices(spread) == 1
    a = fw.walk(walker, jax.random.key(5), draws=40, progress=False)
    b = fw.walk(spread, jax.random.key(5), draws=40, progress=False)
    np.testing.assert_array_equal(a.flat, b.flat)  # one device either way: the same program


@pytest.mark.slow
@pytest.mark.parametrize("name", FAMILIES)
def test_refine_runs_the_steps_asked(walkers, name):
    # Before the registry a gradient sampler ran 200 warm-up steps whatever was asked.
    walker = fw.start(logdensity, jnp.zeros(3), jax.random.key(3), chains=2, sampler=name,
                      progress=False)
    warm = fw.refine(walker, jax.random.key(4), steps=400, progress=False).report.warmup
    # the random walk adds a third phase of half the steps when the acceptance at the
    # theoretical scale departs from the prediction (its own rule)
    assert warm.steps in (400, 600) if name == registry.DEFAULT else warm.steps == 400
    assert warm.tuned == walker.family.parameter
    assert warm.tuned_start == getattr(walker.tuning, warm.tuned)
    # without steps=, the family's own default length (400 random walk, 200 gradient)
    default = fw.refine(walker, jax.random.key(4), progress=False).report.warmup
    expected = walker.family.warmup_steps
    assert (default.steps in (expected, expected * 3 // 2) if name == registry.DEFAULT
            else default.steps == expected)


@pytest.mark.slow
@pytest.mark.parametrize("name", FAMILIES)
def test_the_tuning_names_its_family_and_only_its_own_parameter(walkers, name, tmp_path):
    walker = walkers[name]
    tuning, family = walker.tuning, walker.family
    assert tuning.sampler == name
    other = "step_size" if family.parameter == "scale" else "scale"
    assert getattr(tuning, family.parameter) > 0 and getattr(tuning, other) is None
    warm = walker.report.warmup
    assert warm.tuned_final == getattr(tuning, family.parameter)
    path = fw.save_tuning(walker, tmp_path / "t.json")
    record = json.loads(path.read_text())["tuning"]
    assert record["sampler"] == name and family.parameter in record and other not in record
    saved = fw.load_tuning(path)
    assert saved.tuning.sampler == name
    assert getattr(saved.tuning, family.parameter) == getattr(tuning, family.parameter)


@pytest.mark.slow
@pytest.mark.parametrize("name", registry.gradient_names())
def test_an_older_tuning_file_of_a_gradient_sampler_is_read(walkers, name, tmp_path):
    # Before the registry a gradient sampler's step size was written in 'scale' (and a
    # factor (step/√d)·S); such files still load, into the step size.
    walker = walkers[name]
    record = tuningfile.tuning_record(walker)
    t = record["tuning"]
    step = t.pop("step_size")
    t["scale"] = step
    t["factor"] = (step / np.sqrt(3) * np.asarray(t["shape"])).tolist()
    saved = fw.load_tuning(record)
    assert saved.tuning.step_size == step and saved.tuning.scale is None


@pytest.mark.slow
@pytest.mark.parametrize("name", FAMILIES)
def test_checkpoint_and_resume_for_every_family(walkers, name, tmp_path):
    walker = walkers[name]
    ckpt = tmp_path / "run.ckpt"
    first = fw.walk(walker, jax.random.key(6), draws=60, chunk=20, checkpoint=ckpt,
                    progress=False)
    again = fw.resume(ckpt, logdensity, progress=False)
    np.testing.assert_array_equal(first.flat, again.flat)
    # HMC's and NUTS's energy comes back from the segments; the others have none
    assert (again.energy is None) == (first.energy is None)
    if first.energy is not None:
        np.testing.assert_array_equal(first.energy, again.energy)
    identity = json.loads((ckpt / "run.json").read_text())["identity"]
    assert walker.family.parameter in identity["tuning"]


@pytest.mark.slow
@pytest.mark.parametrize("name", FAMILIES)
def test_to_arviz_for_every_family(walkers, name):
    pytest.importorskip("arviz")
    trace = fw.walk(walkers[name], jax.random.key(7), draws=30, progress=False)
    data = trace.to_arviz()
    assert data.posterior["x"].shape == (2, 30, 3)
    parameter = walkers[name].family.parameter
    assert data.sample_stats.attrs[parameter] == getattr(walkers[name].tuning, parameter)
    # the export and the summary's header name the family
    label = walkers[name].family.label
    assert data.sample_stats.attrs["sampler"] == label
    assert label in str(trace.summary())
    # HMC and NUTS carry their Hamiltonian, so that arviz.bfmi works (MALA has none)
    assert (trace.energy is not None) == (name in ("hmc", "nuts"))
    if trace.energy is not None:
        import arviz
        assert np.all(np.isfinite(arviz.bfmi(data)))


@pytest.mark.slow
@pytest.mark.parametrize("name", FAMILIES)
def test_the_blackjax_form_steps_from_the_walkers_states(walkers, name):
    walker = walkers[name]
    algorithm, states = walker.algorithm, walker.states
    keys = jax.random.split(jax.random.key(8), walker.chains)
    new, _ = jax.vmap(algorithm.step)(keys, states)
    assert np.all(np.isfinite(np.asarray(new.logdensity)))


@pytest.mark.slow
def test_mala_hands_over_the_whitened_problem_its_step_was_tuned_for(walkers):
    # Walker.algorithm for MALA used to pair the whitened step with the original
    # coordinates; its BlackJAX form now runs on z, where the step holds: the state's
    # log density is the posterior's at theta = mode + W z.
    walker = walkers["mala"]
    states = walker.states
    engine = walker.model.engine
    theta = engine.mode + np.asarray(states.position) @ engine.whitening.T
    values = [float(logdensity(jnp.asarray(t))) for t in theta]
    np.testing.assert_allclose(np.asarray(states.logdensity), values, rtol=1e-12)


def test_one_rule_for_hmcs_integration_steps():
    # The expected jittered count E[n] = E[t]/ε when t ≥ ε always (randomised rounding,
    # fisherwalk.theory.gradient), t ~ U(0.8, 1.2)·π/2: E[t] = π/2. At ε = 0.3 that is
    # 5.24, so 5 steps; blackjax_parameters and the family's BlackJAX form agree.
    assert hmc.fixed_integration_steps(0.3) == round(np.mean(INTEGRATION_TIME) / 0.3) == 5
    by_hand = handoff.blackjax_parameters("hmc", 0.3, np.linalg.cholesky(PRECISION))
    assert by_hand["num_integration_steps"] == 5


@pytest.mark.slow
def test_the_walkers_hmc_uses_the_one_rule(walkers):
    walker = walkers["hmc"]
    step = walker.tuning.step_size
    expected = hmc.fixed_integration_steps(step)
    assert walker.family.blackjax_parameters(walker.tuning)["num_integration_steps"] == expected
    fit = walker.report.laplace
    by_hand = handoff.blackjax_parameters("hmc", step, fit.cholesky)
    assert by_hand["num_integration_steps"] == expected


def test_the_registry_lists_every_choice():
    assert set(FAMILIES) >= {"rwm", "mala", "hmc", "nuts"}
    assert registry.choices() == (*registry.names(), registry.AUTO)
    parser = build_parser()
    for choice in registry.choices():  # the command line takes every registered choice
        args = parser.parse_args(["run", "model.py", "--sampler", choice])
        assert args.sampler == choice
    with pytest.raises(fw.InputError, match="not a known sampler"):
        fw.start(logdensity, jnp.zeros(3), jax.random.key(0), sampler="slice")


# ---------------------------------------------------------------- the worked example
#
# Adding a family = one module, one registry line, one theory function. The module here
# is this test file; the theory function is the textbook one: the random walk
# theta' = theta + (2.38 / sqrt(d)) z, z ~ N(0, I_d), with an identity proposal, whose
# asymptotic acceptance on a product target is 0.234 (Gelman, Roberts & Gilks 1996,
# "Efficient Metropolis jumping rules", Bayesian Statistics 5; Roberts, Gelman & Gilks
# 1997, Ann. Appl. Probab. 7(1)). Everything else is borrowed from the random walk.


class TextbookChoice(NamedTuple):
    dim: int
    scale: float  # l = 2.38
    acceptance: float  # 0.234, the d -> infinity limit


def textbook_theory(tuning) -> TextbookChoice:
    """The one theory function: l = 2.38 and acceptance 0.234, whatever d and shape."""
    return TextbookChoice(tuning.dim, 2.38, 0.234)


def _textbook_initial(draft):
    d = draft.dim
    return draft._replace(shape=np.eye(d, dtype=np.asarray(draft.shape).dtype),
                          shape_kind="identity", scale=2.38)


def _spectrum(tuning):
    return None if tuning.matched else tuning.spectrum


TEXTBOOK = randomwalk.FAMILY._replace(
    name="textbook",
    label="textbook random walk (identity proposal, l = 2.38)",
    initial=_textbook_initial,
    choice=textbook_theory,
    target_acceptance=lambda t: float(expected_acceptance(t.scale, t.dim, _spectrum(t))),
    predicted_jump=lambda t: float(expected_jump(t.scale, t.dim, _spectrum(t))),
)


@pytest.fixture
def textbook():
    registry.register(TEXTBOOK)  # the one registry line
    yield TEXTBOOK
    registry.unregister(TEXTBOOK.name)


@pytest.mark.slow  # the whole workflow for a new family: seconds-long
def test_a_family_defined_here_runs_through_the_whole_workflow(textbook, tmp_path):
    walker = fw.start(logdensity, jnp.zeros(3), jax.random.key(30), chains=2,
                      sampler="textbook", progress=False)
    assert walker.family is textbook and walker.tuning.scale == 2.38
    assert walker.tuning.shape_kind == "identity"
    walker = fw.refine(walker, jax.random.key(31), steps=200, progress=False)
    assert walker.report.warmup.tuned == "scale" and not walker.report.warmup.reshaped
    trace = fw.walk(walker, jax.random.key(32), draws=2000, progress=False)
    # the exact mean within 4 Monte Carlo standard errors (ESS-based, from the summary)
    summary = trace.summary()
    error = np.abs(trace.flat.reshape(-1, 3).mean(axis=0) - MEAN)
    mcse = np.asarray(mcse_mean(trace.flat))
    assert np.all(error < 4 * mcse), (error, mcse)
    assert summary is not None
    ckpt = tmp_path / "run.ckpt"
    first = fw.walk(walker, jax.random.key(33), draws=60, chunk=20, checkpoint=ckpt,
                    progress=False)
    np.testing.assert_array_equal(first.flat, fw.resume(ckpt, logdensity, progress=False).flat)
    path = fw.save_tuning(walker, tmp_path / "textbook.json")
    saved = fw.load_tuning(path)
    assert saved.tuning.sampler == "textbook" and saved.tuning.scale == walker.tuning.scale
    pytest.importorskip("arviz")
    data = trace.to_arviz()
    assert data.posterior["x"].shape == (2, 2000, 3)
    assert data.sample_stats.attrs["scale"] == walker.tuning.scale
    assert "textbook" in registry.choices()


@pytest.mark.slow
@pytest.mark.parametrize("name", registry.gradient_names())
def test_gradient_chains_go_over_devices_automatically(name):
    # Before the registry a gradient walker had no device placement at all. Four host
    # devices (a fresh process: XLA_FLAGS is read at jax's import). Tolerance as in
    # tests/test_devices.py: the same keys per chain; a batch of 1 chain may be reduced in
    # another order than a batch of 4 (about 1e-12), which travels with the chain.
    import os
    import subprocess
    import sys
    import textwrap
    from pathlib import Path

    code = textwrap.dedent(f"""
        import json
        import jax, jax.numpy as jnp, numpy as np
        import fisherwalk as fw
        from fisherwalk.workflow.devices import spread_chains, chain_devices
        A = jnp.array({PRECISION.tolist()})
        def ld(p):
            x = p - jnp.array({MEAN.tolist()})
            return -0.5 * x @ A @ x
        w = fw.start(ld, jnp.zeros(3), jax.random.key(1), chains=4, sampler="{name}")
        held = sorted(s.data.shape[0] for s in
                      w.model.engine.run(jax.random.key(9), 0, w.state,
                                         __import__("fisherwalk.engine.gradient",
                                         fromlist=["control"]).control(
                                             w.tuning.step_size), 2).state.position
                      .addressable_shards)
        t4 = fw.walk(w, jax.random.key(3), draws=60)
        t1 = fw.walk(spread_chains(w, 1), jax.random.key(3), draws=60)
        print(json.dumps({{"auto": chain_devices(w), "held": held,
                          "draws": float(np.abs(t4.flat - t1.flat).max())}}))
    """)
    root = Path(__file__).resolve().parents[1]
    env = dict(os.environ, XLA_FLAGS="--xla_force_host_platform_device_count=4",
               JAX_ENABLE_X64="1")
    env["PYTHONPATH"] = os.pathsep.join([str(root / "src"), env.get("PYTHONPATH", "")])
    done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                          text=True, timeout=400)
    assert done.returncode == 0, done.stderr[-3000:]
    out = json.loads(done.stdout.strip().splitlines()[-1])
    assert out["auto"] == 4 and out["held"] == [1, 1, 1, 1]
    assert out["draws"] <= 1e-8


def test_the_registry_refuses_a_second_family_of_a_name_and_keeps_the_built_in_ones(textbook):
    assert registry.family("textbook") is textbook and "textbook" in registry.names()
    with pytest.raises(fw.InputError, match="exists already"):
        registry.register(TEXTBOOK)
    with pytest.raises(fw.InputError, match="built-in"):
        registry.unregister(registry.DEFAULT)
    with pytest.raises(fw.InputError, match="not a registered sampler family"):
        registry.family("slice")
