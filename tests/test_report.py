"""Checks of fisherwalk.report: the right warnings fire, and only then; the table reads.

Thresholds R-hat > 1.01 and ESS < 400: Vehtari, Gelman, Simpson, Carpenter & Bürkner
(2021), "Rank-normalization, folding, and localization: an improved R-hat for assessing
convergence of MCMC", Bayesian Analysis 16(2). The stuck-chain rule (acceptance below 1%
or below a fifth of the others' median) and the separated-chain rule (gap beyond 5
Monte Carlo standard errors and 2 within-chain sd) are fisherwalk's own: common
practice, no published source.
"""

import json
import math
import re

import numpy as np
import pytest
from scipy.signal import lfilter

from fisherwalk.errors import InputError
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
                            ("excluded", "left out")):
            if marker in text:
                found.add(key)
    return found


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
    lines = text.splitlines()
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
    np.testing.assert_allclose(summary.q50, np.median(x.reshape(-1, 4), axis=0))
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
    text = str(summarize(x, names))
    rows = [line for line in text.splitlines()
            if line.split() and (line.split()[0] in names or line.split()[0] == "parameter")]
    assert len(rows) == dim + 1
    # right edges of the numeric columns (every token after the name, before the check
    # cell) coincide in every row, and the R-hat column ends under its title
    edges = {tuple([m.end() for m in re.finditer(r"\S+", line)][1:-1]) for line in rows[1:]}
    assert len(edges) == 1 and len(next(iter(edges))) == 9
    assert rows[0].index("R-hat") + len("R-hat") == next(iter(edges))[-1]


def test_bad_arguments_raise():
    with pytest.raises(InputError, match="names"):
        summarize(good_draws(), NAMES[:3])
    with pytest.raises(InputError, match="acceptance"):
        summarize(good_draws(), NAMES, acceptance=np.array([0.3, 0.3]))
    with pytest.raises(InputError, match="at least 4"):
        summarize(good_draws(draws=3), NAMES)
