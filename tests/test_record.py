"""Tuning records: Walker -> JSON -> start(shape=<saved tuning>) on a refit.

Data: the Wisconsin diagnostic breast cancer data bundled with scikit-learn (Street,
Wolberg & Mangasarian 1993, "Nuclear feature extraction for breast tumor diagnosis";
UCI repository), three standardised features and an intercept, split into two samples
(even and odd rows). A logistic regression with a flat prior has its posterior mode at
the maximum-likelihood estimate and observed Fisher information Xᵀ W X,
W = diag(p(1 - p)) (McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed.); both
come from statsmodels as the outside reference.
"""

from __future__ import annotations

import json

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import statsmodels.api as sm
from sklearn.datasets import load_breast_cancer

from fisherwalk.errors import InputError
from fisherwalk.persistence.tuningfile import (
    SavedTuning,
    load_tuning,
    save_tuning,
    tuning_record,
    walker_from_record,
)
from fisherwalk.prepare.start import start
from fisherwalk.theory.randomwalk import optimal_scale


def _samples():
    data = load_breast_cancer()
    x = data.data[:, [0, 1, 4]]  # mean radius, mean texture, mean smoothness
    x = (x - x.mean(axis=0)) / x.std(axis=0)
    x = np.column_stack([np.ones(len(x)), x])
    y = data.target.astype(float)
    return (x[0::2], y[0::2]), (x[1::2], y[1::2])


def _logdensity(x, y):
    x, y = jnp.asarray(x), jnp.asarray(y)

    def logdensity(p):
        eta = x @ p["beta"]
        return jnp.sum(y * eta - jax.nn.softplus(eta))

    return logdensity


def _statsmodels_fisher(x, y):
    fit = sm.Logit(y, x).fit(disp=0, method="newton", maxiter=100)
    return -fit.model.hessian(fit.params)


@pytest.fixture(scope="module")
def fitted():
    first, second = _samples()
    walker = start(_logdensity(*first), {"beta": jnp.zeros(4)}, jax.random.key(0))
    return walker, first, second


def _no_constants(name):
    raise AssertionError(f"the record holds {name}")


@pytest.mark.slow
def test_refit_with_saved_shape_rescales_for_new_spectrum(fitted, tmp_path):
    walker, first, second = fitted
    path = save_tuning(walker, tmp_path / "tuning.json")
    record = json.loads(path.read_text(), parse_constant=_no_constants)  # plain JSON
    assert record["names"] == ["beta[0]", "beta[1]", "beta[2]", "beta[3]"]
    assert all(isinstance(v, float) for row in record["tuning"]["shape"] for v in row)
    # The stored Fisher information is X1ᵀ W X1 at the MLE (statsmodels); the mode and
    # Hessian of both codes converge to ~1e-8 relative, hence rtol 1e-6.
    np.testing.assert_allclose(record["laplace"]["fisher"], _statsmodels_fisher(*first),
                               rtol=1e-6)

    saved = load_tuning(path)
    assert isinstance(saved, SavedTuning) and saved.names == walker.names
    for field in ("factor", "shape", "whitening"):  # float64 survives JSON bit for bit
        assert np.array_equal(getattr(saved.tuning, field), getattr(walker.tuning, field))
    assert saved.tuning.scale == walker.tuning.scale
    assert saved.tuning.choice == walker.tuning.choice

    refit = start(_logdensity(*second), {"beta": jnp.zeros(4)}, jax.random.key(0), shape=saved)
    tuning = refit.tuning
    assert tuning.shape_kind == "saved" and np.array_equal(tuning.shape, saved.tuning.shape)
    # Spectrum of A = Sᵀ H_new S with H_new from statsmodels on the second sample.
    shape = np.asarray(saved.tuning.shape)
    expected = np.linalg.eigvalsh(shape.T @ _statsmodels_fisher(*second) @ shape)
    np.testing.assert_allclose(tuning.spectrum, expected, rtol=1e-6)
    # A new sample of ~285 rows moves H by O(1/sqrt(n)): the saved shape no longer matches.
    assert expected[0] < 0.97 or expected[-1] > 1.03
    choice = optimal_scale(4, tuning.spectrum, criterion="slowest")
    assert tuning.scale == choice.scale and tuning.target_acceptance == choice.acceptance
    note = next(n for n in refit.report.notes if n.startswith("Proposal shape 'saved'"))
    assert f"spans {tuning.spectrum[0]:.3g} to {tuning.spectrum[-1]:.3g}" in note
    assert f"relative efficiency {choice.efficiency:.3f}" in note


def test_saved_tuning_for_other_parameters_is_refused(fitted):
    walker, first, _ = fitted
    saved = load_tuning(tuning_record(walker))
    fit = walker.report.laplace
    renamed = fit._replace(mode={"coef": fit.mode["beta"]},
                           names=tuple(f"coef[{i}]" for i in range(4)))
    logdensity = _logdensity(*first)
    with pytest.raises(InputError, match=r"the record has beta\[0\].*this model has coef\[0\]"):
        start(lambda p: logdensity({"beta": p["coef"]}), renamed.mode, jax.random.key(0),
              fit=renamed, shape=saved)
    fisher = np.asarray(fit.fisher)[:3, :3]
    smaller = fit._replace(mode={"beta": fit.mode["beta"][:3]}, mode_flat=fit.mode_flat[:3],
                           fisher=jnp.asarray(fisher),
                           cholesky=jnp.asarray(np.linalg.cholesky(fisher)),
                           names=fit.names[:3])
    with pytest.raises(InputError, match="saved tuning is for 4 parameters; this model has 3"):
        start(lambda p: logdensity({"beta": jnp.append(p["beta"], 0.0)}), smaller.mode,
              jax.random.key(0), fit=smaller, shape=saved)


def test_non_finite_values_are_refused(fitted, tmp_path):
    walker, _, _ = fitted
    fit = walker.report.laplace
    broken = walker._replace(report=walker.report._replace(
        laplace=fit._replace(fisher=fit.fisher.at[0, 1].set(jnp.nan))))
    with pytest.raises(InputError, match="'fisher' holds a non-finite value"):
        save_tuning(broken, tmp_path / "broken.json")
    assert not (tmp_path / "broken.json").exists()

    record = tuning_record(walker)
    record["tuning"]["spectrum"][0] = float("nan")
    with pytest.raises(InputError, match="'tuning.spectrum' is nan, not a finite number"):
        load_tuning(record)
    text = json.dumps(tuning_record(walker))
    spectrum_at = text.index('"spectrum": [') + len('"spectrum": [')
    end = text.index(",", spectrum_at)
    (tmp_path / "edited.json").write_text(text[:spectrum_at] + "Infinity" + text[end:])
    with pytest.raises(InputError, match="edited.json"):
        load_tuning(tmp_path / "edited.json")


def test_walker_rebuilt_from_record(fitted):
    walker, first, _ = fitted
    record = tuning_record(walker)
    positions = np.asarray(walker.flat_positions())
    rebuilt = walker_from_record(record, _logdensity(*first), positions)
    assert rebuilt.names == walker.names and rebuilt.chains == walker.chains
    for field in ("factor", "shape", "whitening"):
        assert np.array_equal(getattr(rebuilt.tuning, field), getattr(walker.tuning, field))
    assert rebuilt.tuning.scale == walker.tuning.scale
    np.testing.assert_array_equal(rebuilt.flat_positions(), positions)
    # the log density is recomputed at the chains' positions: the same model gives the
    # same values up to rounding of the sum over 285 rows
    np.testing.assert_allclose(rebuilt.states.logdensity, walker.states.logdensity, rtol=1e-12)
    assert np.asarray(rebuilt.report.laplace.mode["beta"]).shape == (4,)
    record["structure"] = None
    with pytest.raises(InputError, match="position="):
        walker_from_record(record, _logdensity(*first), positions)
    again = walker_from_record(record, _logdensity(*first), positions,
                               position={"beta": jnp.zeros(4)})
    assert again.names == walker.names
    with pytest.raises(InputError, match=r"expected \(chains, 4\)"):
        walker_from_record(record, _logdensity(*first), positions[:, :3],
                           position={"beta": jnp.zeros(4)})
