"""Checks of fisherwalk.results.report: the right warnings fire, and only then; the table reads;
the summary's memory follows one parameter and its work follows the chains linearly.

Thresholds R-hat > 1.01 and ESS < 400: Vehtari, Gelman, Simpson, Carpenter & Bürkner
(2021), "Rank-normalization, folding, and localization: an improved R-hat for assessing
convergence of MCMC", Bayesian Analysis 16(2). The stuck-chain rule (acceptance below 1%
or below a fifth of the others' median), the separated-chain rule (gap beyond 5
Monte Carlo standard errors and 2 within-chain sd), the acceptance rule (4 Monte Carlo
errors + 0.005) and the correlation rule (|r| > 0.95, more than 0.5 left after
whitening by the proposal) are fisherwalk's own: common practice, no published source.
"""

import json
import math
import re
import tracemalloc

import numpy as np
import pytest
from scipy.signal import lfilter

from fisherwalk.errors import InputError
from fisherwalk.results import alerts
from fisherwalk.results import diagnostics as dg
from fisherwalk.results.report import Summary, summarize

NAMES = ("alpha", "beta[0]", "beta[1]", "log_sigma")


def good_draws(seed=0, chains=4, draws=1000):
    """Independent draws from one Gaussian: every chain agrees, ESS is about N."""
    rng = np.random.default_rng(seed)
    scale = np.array([1.0, 0.05, 30.0, 0.2])
    centre = np.array([0.3, -2.0, 1000.0, -1.0])
    return centre + scale * rng.normal(size=(chains, draws, 4))


def kinds(summary: Summary) -> set[str]:
    found = set()
    for text in summary.warnings:
        for key, marker in (("rhat", "R-hat above"), ("ess", "ESS below"),
                            ("stuck", "is stuck"), ("apart", "sits apart"),
                            ("faults", "NaN or +inf log density"),
                            ("excluded", "left out"), ("acceptance", "realised acceptance"),
                            ("correlation", "correlated beyond")):
            if marker in text:
                found.add(key)
    return found


def main_table(text: str) -> str:
    """The printed summary up to the table of Monte Carlo errors."""
    return text.split("Monte Carlo standard errors")[0]


def test_good_chains_raise_no_warning_and_print_every_row():
    # iid draws: R-hat - 1 has sd of about 5e-4 at this size and the ESS is about 4000,
    # so neither threshold is near; the chains share one law, so no chain sits apart.
    summary = summarize(
        good_draws(), NAMES, acceptance=np.array([0.30, 0.31, 0.29, 0.30]),
        target_acceptance=0.316, predicted_jump=1.2, realised_jump=1.1,
        faults=np.zeros(4, dtype=int), header_notes=("model: invented demo",),
    )
    assert summary.warnings == ()
    text = str(summary)
    assert text == summary.table()
    for part in text.split("Monte Carlo standard errors"):  # each table has every row once
        lines = part.splitlines()
        for name in NAMES:
            rows = [line for line in lines if line.split() and line.split()[0] == name]
            assert len(rows) == 1, name
    assert "4 chains x 1000 draws" in text
    assert "acceptance" in text and "0.316" in text
    assert "predicted 1.2" in text and "realised 1.1" in text
    assert "model: invented demo" in text
    assert summary.max_rhat < 1.01 and summary.min_ess_bulk > 400 and summary.min_ess_tail > 400


def test_summary_values_are_the_diagnostics():
    x = good_draws(1)
    summary = summarize(x, NAMES)
    np.testing.assert_array_equal(summary.ess_bulk, dg.ess_bulk(x))
    np.testing.assert_array_equal(summary.ess_tail, dg.ess_tail(x))
    np.testing.assert_array_equal(summary.rhat, dg.rhat(x))
    np.testing.assert_array_equal(summary.mcse, dg.mcse_mean(x))
    np.testing.assert_array_equal(summary.mcse_sd, dg.mcse_sd(x))
    np.testing.assert_array_equal(summary.mcse_lower, dg.mcse_quantile(x, 0.05))
    np.testing.assert_array_equal(summary.mcse_median, dg.mcse_quantile(x, 0.5))
    np.testing.assert_array_equal(summary.mcse_upper, dg.mcse_quantile(x, 0.95))
    # numpy's linear-interpolation quantiles and standard deviation, to rounding
    pooled = x.reshape(-1, 4)
    np.testing.assert_array_equal(summary.lower, np.quantile(pooled, 0.05, axis=0))
    np.testing.assert_array_equal(summary.upper, np.quantile(pooled, 0.95, axis=0))
    np.testing.assert_allclose(summary.median, np.median(pooled, axis=0), rtol=1e-15)
    np.testing.assert_allclose(summary.mean, pooled.mean(axis=0), rtol=1e-13)
    np.testing.assert_allclose(summary.sd, pooled.std(axis=0, ddof=1), rtol=1e-12)
    assert summary.max_rhat == np.max(dg.rhat(x))
    assert summary.min_ess_tail == np.min(dg.ess_tail(x))


def test_rhat_warning_names_the_parameter():
    x = good_draws(2)
    x[1, :, 1] += 0.05 * 0.5  # chain 1 off by half a posterior sd in beta[0] only
    summary = summarize(x, NAMES)
    rhat_text = [w for w in summary.warnings if "R-hat above" in w]
    assert len(rhat_text) == 1
    assert "beta[0]" in rhat_text[0] and "alpha" not in rhat_text[0]
    assert summary.max_rhat > 1.01
    # the R-hat the warning quotes is the one in beta[0]'s row of the table
    quoted = re.search(r"beta\[0\] \(([0-9.]+)\)", rhat_text[0]).group(1)
    row = [line for line in main_table(str(summary)).splitlines()
           if line.split() and line.split()[0] == "beta[0]"][0]
    assert row.split()[1] == quoted and float(quoted) > 1.01  # the R-hat column


def test_low_ess_warning_names_parameters_and_needed_draws():
    rng = np.random.default_rng(3)
    x = good_draws(3, draws=500)
    noise = rng.normal(size=(4, 500))
    x[:, :, 3] = lfilter([1.0], [1.0, -0.99], noise, axis=1)  # AR(1), ESS about 10 per chain
    summary = summarize(x, NAMES)
    text = [w for w in summary.warnings if "ESS below" in w]
    assert len(text) == 1 and "log_sigma" in text[0] and "beta[0]" not in text[0]
    worst = min(summary.ess_bulk[3], summary.ess_tail[3])
    assert f"{math.ceil(500 * 400 / worst)} draws per chain" in text[0]


def test_stuck_chain_by_acceptance_and_by_frozen_draws():
    x = good_draws(4)
    summary = summarize(x, NAMES, acceptance=np.array([0.30, 0.30, 0.005, 0.31]))
    assert kinds(summary) == {"stuck"}
    assert any("Chain 2 is stuck" in w for w in summary.warnings)
    # far below the others though above 1%
    summary = summarize(x, NAMES, acceptance=np.array([0.30, 0.04, 0.30, 0.31]))
    assert any("Chain 1 is stuck" in w for w in summary.warnings)
    # lower but not far below: no warning
    summary = summarize(x, NAMES, acceptance=np.array([0.30, 0.20, 0.30, 0.31]))
    assert "stuck" not in kinds(summary)
    # no acceptance given: a chain whose draws never change is still found
    frozen = x.copy()
    frozen[3] = frozen[3, 0]
    summary = summarize(frozen, NAMES)
    assert any("Chain 3 is stuck" in w and "never change" in w for w in summary.warnings)


def test_separated_chain_names_chain_and_parameters():
    x = good_draws(5)
    x[1, :, 0] += 10.0  # chain 1 sits 10 sd away in alpha: a second mode
    summary = summarize(x, NAMES)
    apart = [w for w in summary.warnings if "sits apart" in w]
    assert len(apart) == 1
    assert apart[0].startswith("Chain 1 ") and "alpha" in apart[0]
    assert "beta[0]" not in apart[0] and "log_sigma" not in apart[0]
    assert "rhat" in kinds(summary)


def test_separation_rule_stays_quiet_on_slow_but_agreeing_chains():
    # AR(1) chains with rho = 0.9: R-hat and ESS are fine, no chain is apart
    rng = np.random.default_rng(6)
    noise = rng.normal(size=(4, 4000, 4))
    x = lfilter([1.0], [1.0, -0.9], noise, axis=1)
    summary = summarize(x, NAMES)
    assert "apart" not in kinds(summary)


def test_faults_warning_per_chain():
    summary = summarize(good_draws(7), NAMES, faults=np.array([0, 0, 7, 0]))
    assert kinds(summary) == {"faults"}
    assert "chain 2: 7" in summary.warnings[0]
    assert "7 NaN/+inf proposal(s) rejected" in str(summary)


def test_chain_with_nan_draws_is_left_out_and_named():
    x = good_draws(8)
    x[2, 40, 1] = np.nan
    summary = summarize(x, NAMES)
    assert summary.used_chains == (0, 1, 3)
    assert kinds(summary) == {"excluded"}
    assert "Chain(s) 2" in summary.warnings[0]
    np.testing.assert_array_equal(summary.ess_bulk, dg.ess_bulk(x[[0, 1, 3]]))
    x[:, 0, 0] = np.inf
    with pytest.raises(InputError, match="every chain"):
        summarize(x, NAMES)


def test_to_dict_round_trips_through_json():
    x = good_draws(9)
    x[:, :, 2] = 5.0  # a parameter that never moves: R-hat nan, ESS 0, MCSE inf
    summary = summarize(x, NAMES, acceptance=np.full(4, 0.3), faults=np.array([0, 1, 0, 0]),
                        realised_jump=np.array([1.0, 1.1, 0.9, 1.0]), predicted_jump=1.05)
    content = summary.to_dict()
    encoded = json.dumps(content, allow_nan=False)
    assert json.loads(encoded) == content
    row = content["parameters"][2]
    assert row["name"] == "beta[1]" and row["rhat"] is None and row["ess_bulk"] == 0.0
    assert content["faults"] == [0, 1, 0, 0]
    assert content["jump"]["realised"] == pytest.approx(1.0)
    assert content["worst"]["max_rhat"] is None  # inf: some R-hat is undefined
    assert any("undefined" in w for w in content["warnings"])


def test_measured_jump_from_cholesky():
    x = good_draws(10)
    cholesky = np.diag(1.0 / np.array([1.0, 0.05, 30.0, 0.2]))  # H = diag(1 / sd^2)
    summary = summarize(x, NAMES, cholesky=cholesky, predicted_jump=8.0)
    # independent draws: expected squared whitened jump 2 d = 8 (see test_diagnostics)
    assert summary.realised_jump == pytest.approx(8.0, abs=4 * np.sqrt(12 * 4 / 3996))
    assert summary.realised_jump_per_chain.shape == (4,)


def test_long_parameter_lists_stay_aligned():
    rng = np.random.default_rng(11)
    dim = 120
    scale = 10.0 ** rng.uniform(-4, 5, size=dim)
    x = scale * rng.normal(size=(4, 500, dim)) + 3 * scale
    names = tuple(f"w[{i}]" for i in range(dim - 1)) + ("a_much_longer_name",)
    text = main_table(str(summarize(x, names)))
    rows = [line for line in text.splitlines()
            if line.split() and (line.split()[0] in names or line.split()[0] == "parameter")]
    assert len(rows) == dim + 1
    # right edges of the numeric columns (every token after the name, before the check
    # cell; the interval is "lower – upper", three tokens) coincide in every row, and the
    # R-hat column ends under its title
    edges = {tuple([m.end() for m in re.finditer(r"\S+", line)][1:-1]) for line in rows[1:]}
    assert len(edges) == 1 and len(next(iter(edges))) == 10
    assert rows[0].index("R-hat") + len("R-hat") == next(iter(edges))[0]


def test_bad_arguments_raise():
    with pytest.raises(InputError, match="seconds"):
        summarize(good_draws(), NAMES, seconds=0.0)
    with pytest.raises(InputError, match="proposal_shape"):
        summarize(good_draws(), NAMES, proposal_shape=np.eye(5))
    with pytest.raises(InputError, match="acceptance_steps"):
        summarize(good_draws(), NAMES, acceptance_steps=np.full((4, 10), np.nan))
    with pytest.raises(InputError, match="names"):
        summarize(good_draws(), NAMES[:3])
    with pytest.raises(InputError, match="acceptance"):
        summarize(good_draws(), NAMES, acceptance=np.array([0.3, 0.3]))
    with pytest.raises(InputError, match="at least 4"):
        summarize(good_draws(draws=3), NAMES)


# ---------------------------------------------------------------------------------------
# summary extras: interval, MCSE table, ESS per second
# ---------------------------------------------------------------------------------------


@pytest.mark.parametrize("interval, low, high", [(0.9, "5%", "95%"), (0.8, "10%", "90%"),
                                                 (0.95, "2.5%", "97.5%")])
def test_interval_choice_sets_the_quantiles_and_the_headers(interval, low, high):
    x = good_draws(12)
    summary = summarize(x, NAMES, interval=interval)
    lo, hi = (1 - interval) / 2, (1 + interval) / 2
    pooled = x.reshape(-1, 4)
    np.testing.assert_allclose(summary.lower, np.quantile(pooled, lo, axis=0), rtol=1e-14)
    np.testing.assert_allclose(summary.upper, np.quantile(pooled, hi, axis=0), rtol=1e-14)
    np.testing.assert_allclose(summary.mcse_upper, dg.mcse_quantile(x, hi), rtol=1e-14)
    titles = [line.split() for line in str(summary).splitlines() if "parameter" in line]
    assert len(titles) == 2  # the estimates and the Monte Carlo errors
    assert "median" in titles[0] and f"{interval * 100:g}%" in titles[0]  # one interval column
    assert titles[1].index(low) + 1 == titles[1].index(high) and "median" in titles[1]
    assert f"{interval:.0%} interval" in str(summary) or f"{interval * 100:g}% interval" in str(
        summary)
    content = summary.to_dict()
    assert content["interval"] == {"probability": interval, "lower": pytest.approx(lo),
                                   "upper": pytest.approx(hi)}


@pytest.mark.parametrize("interval", [0.0, 1.0, 1.5, -0.1, "wide", True, float("nan")])
def test_bad_interval_is_refused(interval):
    with pytest.raises(InputError, match="interval"):
        summarize(good_draws(), NAMES, interval=interval)


def test_ess_per_second_column_only_with_seconds():
    x = good_draws(13)
    timed = summarize(x, NAMES, seconds=2.5)
    np.testing.assert_allclose(timed.ess_bulk_per_second, dg.ess_bulk(x) / 2.5, rtol=1e-15)
    # the rate sits in the header, not in the table: the slowest parameter's and the median
    slowest = int(np.argmin(timed.ess_bulk_per_second))
    assert "2.5 s" in str(timed) and "bulk ESS per second" in str(timed)
    assert f"for the slowest ({NAMES[slowest]})" in str(timed)
    assert "ESS/s" not in str(timed)
    plain = summarize(x, NAMES)
    assert plain.ess_bulk_per_second is None and "ESS per second" not in str(plain)
    row = plain.to_dict()["parameters"][0]
    assert row["ess_bulk_per_second"] is None and row["mcse_sd"] > 0


# ---------------------------------------------------------------------------------------
# coherent warnings: every number a warning quotes is the header's or the table's
# ---------------------------------------------------------------------------------------


def accepted_steps(seed, rate, chains=4, draws=1000):
    """Acceptance indicators of independent steps accepted with probability ``rate``."""
    return (np.random.default_rng(seed).random((chains, draws)) < rate).astype(float)


def test_acceptance_warning_cites_the_target_in_the_header():
    # The header says "target X at scale l" and what the Gaussian picture predicts at l.
    # The realised acceptance (0.25, from the indicators) is far from X = 0.296 and from
    # the Gaussian 0.200 (Monte Carlo error about sqrt(0.19 / 4000) = 0.007, so the gaps
    # are 6 and 7 errors): the warning must quote X and l as the target, and the
    # Gaussian number only as such (issue 12's contradiction: a warning that named the
    # Gaussian number as the target while the header showed another).
    steps = accepted_steps(14, 0.25)
    summary = summarize(good_draws(14), NAMES, acceptance_steps=steps, target_acceptance=0.296,
                        scale=2.801, gaussian_acceptance=0.200)
    text = str(summary)
    header = text.split("parameter")[0]
    # one figure per line: the target, then the Gaussian picture's prediction
    assert re.search(r"\n  target +0\.296 \(the warm-up's aim", header)
    assert re.search(r"\n  predicted +0\.200 \(the Gaussian picture at scale 2\.801\)", header)
    realised = re.search(r"realised (0\.\d{3}) \(Monte Carlo error (0\.\d{3})", header)
    assert realised.group(1) == f"{steps.mean():.3f}"
    warned = [w for w in summary.warnings if "realised acceptance" in w]
    assert len(warned) == 1
    assert "target 0.296 at scale 2.801" in warned[0] and "target 0.2 " not in warned[0]
    assert "0.200 that the Gaussian picture predicts" in warned[0]
    assert f"acceptance {realised.group(1)} (Monte Carlo error {realised.group(2)})" in warned[0]
    assert "warm-up adapted the scale" in warned[0]
    # chains that accept as the Gaussian picture predicts at the scale used (0.25 here):
    # the adaptation stopped off its aim, which the header shows; no warning
    summary = summarize(good_draws(14), NAMES, acceptance_steps=steps, target_acceptance=0.296,
                        scale=2.801, gaussian_acceptance=0.250)
    assert "acceptance" not in kinds(summary)
    # the same departure against a target that is the Gaussian picture's own prediction
    summary = summarize(good_draws(14), NAMES, acceptance_steps=steps, target_acceptance=0.296,
                        scale=2.4, gaussian_acceptance=0.2962)
    warned = [w for w in summary.warnings if "realised acceptance" in w]
    assert "target 0.296 at scale 2.4" in warned[0] and "Gaussian picture" in warned[0]
    assert "Gaussian picture's prediction at scale 2.4" in str(summary).split("parameter")[0]


def test_no_acceptance_warning_when_realised_meets_the_target():
    # realised 0.296 against the target 0.296: within Monte Carlo error, no warning
    steps = accepted_steps(15, 0.296)
    summary = summarize(good_draws(15), NAMES, acceptance_steps=steps, target_acceptance=0.296,
                        scale=2.801, gaussian_acceptance=0.234)
    assert "acceptance" not in kinds(summary)
    assert summary.acceptance_mcse == pytest.approx(np.sqrt(0.296 * 0.704 / 4000), rel=0.1)


def test_texts_sit_on_the_right_side_of_their_thresholds():
    assert alerts.rhat_text(1.0104, 1.01) == "1.0104"  # not "1.010" beside "above 1.01"
    assert alerts.rhat_text(1.0096, 1.01) == "1.010"  # at the limit, not above: no warning
    assert alerts.rhat_text(1.234, 1.01) == "1.234"
    assert alerts.ess_text(399.7) == "399" and alerts.ess_text(400.0) == "400"


def test_stuck_rule_compares_each_chain_with_the_median_of_the_others():
    rates = np.array([0.30, 0.31, 0.29, 0.05, 0.30, 0.28, 0.30, 0.32, 0.31])
    warned = alerts.stuck_warnings(rates.size, set(), rates)
    assert len(warned) == 1 and warned[0].startswith("Chain 3 is stuck")
    # the median quoted is numpy's median of the eight other chains
    assert f"median of {np.median(np.delete(rates, 3)):.3f}" in warned[0]


def test_separated_chain_among_many_chains():
    x = good_draws(16, chains=64, draws=300)
    x[17, :, 3] += 5 * 0.2  # chain 17 sits 5 sd away in log_sigma
    apart = [w for w in summarize(x, NAMES).warnings if "sits apart" in w]
    assert len(apart) == 1 and apart[0].startswith("Chain 17 ") and "log_sigma" in apart[0]


# ---------------------------------------------------------------------------------------
# correlated pairs the proposal does not follow (issue 14)
# ---------------------------------------------------------------------------------------


def correlated_draws(seed, corr, chains=4, draws=2000):
    sd = np.array([2.0, 0.1, 1.0])
    corr_matrix = np.array([[1.0, corr, 0.0], [corr, 1.0, 0.0], [0.0, 0.0, 1.0]])
    cov = np.diag(sd) @ corr_matrix @ np.diag(sd)
    z = np.random.default_rng(seed).normal(size=(chains, draws, 3))
    return z @ np.linalg.cholesky(cov).T, cov


def test_correlation_warning_fires_under_a_diagonal_proposal_only():
    # posterior correlation -0.99 between a and b; independent draws, so the sample
    # correlation is within a few 1e-4 of -0.99
    x, cov = correlated_draws(17, -0.99)
    names = ("a", "b", "c")
    diagonal = np.diag(np.sqrt(np.diag(cov)))
    warned = [w for w in summarize(x, names, proposal_shape=diagonal).warnings
              if "correlated beyond" in w]
    assert len(warned) == 1 and "1 pair(s)" in warned[0] and "a and b (posterior -0.99" in warned[0]
    matched = np.linalg.cholesky(cov)  # S Sᵀ = the posterior covariance
    assert "correlation" not in kinds(summarize(x, names, proposal_shape=matched))
    assert "correlation" not in kinds(summarize(x, names))  # no proposal given: no verdict


def test_residual_correlation_is_that_of_the_pair_whitened_by_the_proposal():
    # w = |r - c| / (1 - r c) is the correlation left after whitening the pair's
    # correlation matrix R by the proposal's C: W = C^(-1/2) R C^(-1/2) (linear algebra)
    for r, c in ((0.99, 0.0), (0.99, 0.9), (0.95, 0.9), (-0.97, 0.5), (0.96, 0.96)):
        big_r = np.array([[1.0, r], [r, 1.0]])
        values, vectors = np.linalg.eigh(np.array([[1.0, c], [c, 1.0]]))
        root = vectors @ np.diag(values**-0.5) @ vectors.T
        w = root @ big_r @ root
        expected = abs(w[0, 1]) / np.sqrt(w[0, 0] * w[1, 1])
        pairs = alerts.correlated_pairs(big_r, np.array([[1.0, c], [c, 1.0]]),
                                        limit=0.0, residual_limit=-1.0)
        assert pairs[0][4] == pytest.approx(expected, abs=1e-12)
    # the thresholds: c = 0.9 captures r = 0.95 (w = 0.34) but not r = 0.99 (w = 0.83)
    assert alerts.correlated_pairs(np.array([[1, 0.95], [0.95, 1]]),
                                   np.array([[1, 0.9], [0.9, 1]])) == []
    assert len(alerts.correlated_pairs(np.array([[1, 0.99], [0.99, 1]]),
                                       np.array([[1, 0.9], [0.9, 1]]))) == 1


# ---------------------------------------------------------------------------------------
# memory and work (issue 13)
# ---------------------------------------------------------------------------------------


@pytest.mark.slow
def test_summary_memory_follows_one_parameter():
    # numpy reports its allocations to tracemalloc. Draws (4, 200000, 10): 61 MiB; one
    # parameter's slice S = 6.1 MiB, one chain's draws S / 4. What the summary may hold
    # at once (fisherwalk.results.mcse): one sorted float64 copy of a slice (S); the block of one
    # chain being read (S / 4), its transform or rank arrays (S / 4 each, two at most),
    # the autocovariances of its two halves (S / 4) and the FFT of one half (about five
    # half-chain arrays, 5 S / 8): about 2.4 S in all. Bound: 3 S plus 1 MiB for the
    # per-chain figures, the d x d correlation and Python objects. The code before this
    # bound used about 10 x the draws (624 MiB here).
    rng = np.random.default_rng(18)
    x = rng.normal(size=(4, 200_000, 10))
    steps = accepted_steps(18, 0.3, draws=200_000)
    names = tuple(f"x[{j}]" for j in range(10))
    slice_bytes = x[:, :, 0].nbytes
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        before = tracemalloc.get_traced_memory()[0]
        summary = summarize(x, names, acceptance_steps=steps, target_acceptance=0.3,
                            cholesky=np.eye(10), proposal_shape=np.eye(10), seconds=1.0)
        peak = tracemalloc.get_traced_memory()[1] - before
    finally:
        tracemalloc.stop()
    assert summary.ess_bulk.shape == (10,)
    assert peak < 3 * slice_bytes + 2**20, f"peak {peak / 2**20:.1f} MiB"


def test_summary_work_is_linear_in_chains(monkeypatch):
    # Structural, not timed: count the numbers that go through FFTs (every ESS and the
    # separated-chain rule's per-chain errors). With work linear in the chains, 512
    # chains cost twice what 256 cost; the former leave-one-out ESS per chain made it
    # grow with chains² (ratio near 4).
    counted = []
    rfft = np.fft.rfft

    def counting(a, *args, **kwargs):
        counted.append(np.size(a))
        return rfft(a, *args, **kwargs)

    monkeypatch.setattr(np.fft, "rfft", counting)
    work = []
    for chains in (256, 512):
        counted.clear()
        x = good_draws(19, chains=chains, draws=200)[:, :, :2]
        summary = summarize(x, NAMES[:2], acceptance=np.full(chains, 0.3))
        assert summary.warnings == ()
        work.append(sum(counted))
    assert work[1] / work[0] == pytest.approx(2.0, rel=0.01)
