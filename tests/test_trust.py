"""Small promises of issue 12: one chain is accepted with a warning, a model file's own
NameError is reported as such, progress shows in a notebook, and a thinned run keeps
its realised jump in the summary."""

from __future__ import annotations

import sys
import types
import warnings

import jax
import jax.numpy as jnp
import pytest

import fisherwalk as fw
from fisherwalk.cli.modelfile import load_model
from fisherwalk.engine import progress
from fisherwalk.errors import InputError, ModelFileError


def _gauss(x):
    return -0.5 * jnp.sum(x**2)


def test_one_chain_is_accepted_with_a_warning_about_rhat():
    with pytest.warns(fw.FisherwalkWarning, match="R-hat needs at least 2 chains"):
        walker = fw.start(_gauss, jnp.zeros(2), jax.random.key(0), chains=1, scouts=0)
    assert walker.chains == 1


def test_zero_chains_is_refused_with_advice_that_matches_the_behaviour():
    with pytest.raises(InputError, match="use 1 or more chains"):
        fw.start(_gauss, jnp.zeros(2), jax.random.key(0), chains=0)


def test_four_chains_give_no_chain_warning():
    with warnings.catch_warnings():
        warnings.simplefilter("error", fw.FisherwalkWarning)
        fw.start(_gauss, jnp.zeros(2), jax.random.key(0), scouts=0)


def test_a_name_error_in_the_model_file_gets_advice_about_the_file(tmp_path):
    path = tmp_path / "typo.py"
    path.write_text("import jax.numpy as jnp\n\n"
                    "def logdensity(p):\n"
                    "    return -0.5 * jnp.sum(p ** 2) + undefined_prior(p)\n\n"
                    "initial_position = jnp.zeros(2)\n")
    with pytest.raises(ModelFileError) as caught:
        load_model(path)
    text = str(caught.value)
    assert "NameError" in text and "undefined_prior" in text
    assert "not defined or not imported" in text
    assert "structure" not in text


def test_a_structure_error_still_gets_advice_about_the_structure(tmp_path):
    path = tmp_path / "keys.py"
    path.write_text("import jax.numpy as jnp\n\n"
                    "def logdensity(p):\n"
                    "    return -0.5 * jnp.sum(p['beta'] ** 2)\n\n"
                    "initial_position = {'alpha': jnp.zeros(2)}\n")
    with pytest.raises(ModelFileError, match="structure"):
        load_model(path)


def test_progress_is_shown_in_a_notebook_kernel(monkeypatch):
    # A stand-in for a running Jupyter kernel: ipykernel imported and an IPython shell
    # with a kernel attribute (what IPython's get_ipython() returns inside Jupyter).
    shell = types.SimpleNamespace(kernel=object())
    fake_ipython = types.ModuleType("IPython")
    fake_ipython.get_ipython = lambda: shell
    monkeypatch.setitem(sys.modules, "ipykernel", types.ModuleType("ipykernel"))
    monkeypatch.setitem(sys.modules, "IPython", fake_ipython)
    monkeypatch.setattr(sys.stderr, "isatty", lambda: False, raising=False)
    assert progress.in_notebook()
    assert progress.shown(None)
    assert not progress.shown(False)
    shell.kernel = None  # a terminal IPython: no kernel, and stderr is not a terminal
    assert not progress.shown(None)


def test_thinned_runs_keep_the_realised_jump_per_step():
    # On N(0, I_3) the Gaussian limit predicts the jump per step exactly (Roberts, Gelman
    # & Gilks 1997, computed for d = 3); the thinned run's per-step value comes from the
    # AR(1) conversion. Tolerance 10%: the Monte Carlo error of a mean squared jump over
    # 4 x 4000 kept draws is ~2%, and the AR(1) conversion was measured within 6% of the
    # unthinned value for thin 2-10 at d = 3 and 10.
    walker = fw.start(_gauss, jnp.zeros(3), jax.random.key(0), scouts=0)
    trace = fw.walk(walker, jax.random.key(1), draws=4000, thin=5, progress=False)
    summary = trace.summary()
    assert summary.realised_jump == pytest.approx(walker.tuning.predicted_jump, rel=0.10)
    assert any("converted from draws kept every 5 steps" in n for n in summary.notes)
