"""Choosing and starting on the evidence: "auto" discounts the samplers that rely on the
Gaussian limit when PSIS k̂ says it fails, and the chain starts are resampled from the
Laplace draws by their importance weights (Rubin 1988, "Using the SIR algorithm to
simulate posterior distributions", Bayesian Statistics 3).

The outside value: u = log X with X ~ inverse-gamma(a, 1) has density ∝ exp(-a u - e^-u),
mode log(1/a) and mean -ψ(a) (ψ the digamma function; the log of a gamma variable has
mean ψ(a), Johnson, Kotz & Balakrishnan 1994, Continuous Univariate Distributions vol. 1,
ch. 17). At a = 0.5 its right tail is exponential, far heavier than the Laplace
Gaussian's, so k̂ is high and the mean lies 1.27 (Laplace) sd above the mode.
"""

from __future__ import annotations

import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.special import digamma

import fisherwalk
from fisherwalk.prepare.evidence import DISCOUNT, redecide, weigh_evidence
from fisherwalk.prepare.resample import smoothed_log_weights
from fisherwalk.results.diagnostics import mcse_mean

A = 0.5


def log_inverse_gamma(x):  # two independent copies of u = log X, X ~ inverse-gamma(A, 1)
    return jnp.sum(-A * x - jnp.exp(-x))


def test_auto_discounts_the_limit_samplers_more_above_khat_one():
    seconds = {"rwm": 1.0, "mala": 2.0, "hmc": 3.0, "nuts": 3.5}
    assert weigh_evidence(seconds, 0.3, 0.7) == (("rwm", seconds, ""))
    discounted = weigh_evidence(seconds, 0.8, 0.7)
    assert discounted.seconds_per_answer["rwm"] == DISCOUNT * 1.0
    assert discounted.sampler == "hmc" and "moved from 'rwm' to 'hmc'" in discounted.note
    squared = weigh_evidence(seconds, 2.25, 0.7)  # issue 22's non-centred model: k̂ 2.25
    assert squared.seconds_per_answer["mala"] == DISCOUNT**2 * 2.0
    assert squared.sampler == "hmc" and "no finite mean" in squared.note
    # near k̂ = 1 a random walk far ahead stays chosen (the walk's switch is the safety net)
    assert weigh_evidence({"rwm": 0.02, "hmc": 1.1}, 1.01, 0.63).sampler == "rwm"
    assert weigh_evidence(seconds, float("nan"), float("nan")).note == ""


def test_redecide_only_revisits_autos_limit_samplers():
    assert redecide("rwm", True, True, 1.3, 0.7).startswith("'auto' chose 'rwm'")
    assert redecide("rwm", False, True, 1.3, 0.7) == ""  # the user's own choice stays
    assert redecide("nuts", True, True, 1.3, 0.7) == ""
    assert redecide("mala", True, False, 1.3, 0.7) == ""


def test_smoothed_weights_are_normalised_and_keep_the_order():
    rng = np.random.default_rng(0)
    lw = rng.standard_normal(500) * 2
    smoothed = smoothed_log_weights(lw)
    assert abs(np.logaddexp.reduce(smoothed)) < 1e-12
    order = np.argsort(lw)
    assert np.all(np.diff(smoothed[order]) >= -1e-12)  # smoothing keeps the ranking


def test_high_khat_resamples_the_starts_toward_the_bulk():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        walker = fisherwalk.start(log_inverse_gamma, jnp.zeros(2), jax.random.key(0),
                                  chains=32, progress=False)
    check = walker.report.check
    assert check.khat > check.threshold
    note = next(n for n in walker.report.notes if "resampled" in n)
    assert "moved by up to" in note
    starts = walker.flat_positions()
    assert len({tuple(s) for s in starts}) == 32  # without replacement: distinct starts
    exact = -digamma(A)
    mode = np.log(1 / A)
    # the starts' mean moved from the mode's side toward the exact mean: closer to it
    # than the mode in both coordinates (fixed key)
    assert np.all(np.abs(starts.mean(axis=0) - exact) < abs(mode - exact))


@pytest.mark.slow
def test_auto_random_walk_refuted_by_the_warm_up_switches_to_nuts():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        walker = fisherwalk.start(log_inverse_gamma, jnp.zeros(2), jax.random.key(0),
                                  sampler="auto", progress=False)
    assert walker.family.evaluation == "logdensity"  # at d = 2 compilation decides: rwm
    refined = fisherwalk.refine(walker, jax.random.key(1), progress=False)
    report = refined.report.warmup
    assert report.covariance_p_value < 1e-3  # variance 4.93 (trigamma(0.5)) against H⁻¹ = 2
    assert refined.family.evaluation == "gradient" and refined.tuning.sampler == "nuts"
    assert report.notes[0].startswith("'auto' chose 'rwm'") and "NUTS" in report.notes[0]
    # the learned metric moved from H⁻¹ = 2 toward the posterior variance ψ'(0.5) = π²/2
    # = 4.93 (measured 3.1 and 3.8 with these keys: 300 window steps, shrunk 0.2 toward
    # the previous window); the draws' correctness is checked below, not the metric's
    variance = np.diag(refined.tuning.inverse_mass_matrix)
    assert np.all((variance > 2.5) & (variance < 1.5 * np.pi**2 / 2))
    trace = fisherwalk.walk(refined, jax.random.key(2), draws=1000, progress=False)
    draws = np.asarray(trace.flat)
    for i in range(2):
        assert abs(draws[..., i].mean() - (-digamma(A))) < 4 * mcse_mean(draws[..., i])
