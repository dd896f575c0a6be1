"""The benchmark tables' format, from numbers the tests give them, and (slow tier) the
script's quick mode on the smallest target. No timing is asserted: performance is measured
in benchmarks/, never tested, and no check here depends on how fast the machine ran.

The checks that can fail besides "it ran": a run that reports an answer must have met the
answer's definition on its own draws (bulk ESS >= 400, R-hat < 1.01: the working
thresholds of Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021, "Rank-normalization,
folding, and localization: an improved R-hat for assessing convergence of MCMC",
Bayesian Analysis 16(2)); the random walks' and MALA's evaluation counts must be one per
step per chain (MALA takes one gradient per step: Roberts & Tweedie 1996, Bernoulli 2(4)),
HMC-family counts at least one gradient per step per chain; every table must have as
many cells per row as its header.
"""

from __future__ import annotations

import copy
import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = ROOT / "benchmarks" / "run.py"
# The structure of a quick run's results.json on gauss-d2 (every sampler, one repeat); the
# format tests below set the figures they need themselves.
GIVEN = ROOT / "tests" / "data" / "benchmark_results_gauss_d2.json"
# one of each kind the checks tell apart (one evaluation per step, one gradient per step,
# trajectories of gradients), fisherwalk's and a baseline's: the slow tier's budget
SAMPLERS = {"fisherwalk", "fisherwalk-mala", "fisherwalk-nuts", "nuts", "adaptive"}
ONE_PER_STEP = {"fisherwalk", "fisherwalk-mala", "adaptive"}


@pytest.fixture(scope="module")
def tables_module():
    # the benchmark scripts import each other by plain name, as when run from benchmarks/
    sys.path.insert(0, str(ROOT / "benchmarks"))
    try:
        import tables

        yield tables
    finally:
        sys.path.remove(str(ROOT / "benchmarks"))


def _given(reached: bool) -> dict:
    """The stored results with every run's figures set here: each answered in 2.5 s, or
    none answered within a 60 s limit."""
    results = copy.deepcopy(json.loads(GIVEN.read_text()))
    for run in results["targets"][0]["runs"]:
        run.update(answer_reached=reached, answer_estimated=False, answer_limit=60.0)
        run.update(answer_seconds=2.5 if reached else None)
        if not reached:
            run.update(prepare_seconds=20.0, sampling_seconds=45.0)
    return results


def _check_well_formed(text: str) -> list[list[list[str]]]:
    for heading in ("## Goals", "## 1. Time to answer", "## 2. Long runs",
                    "## 3. Random walks against their limits", "## 4. Where fisherwalk",
                    "## 7. Gradient samplers and BlackJAX's warm-ups"):
        assert heading in text
    tables = _tables(text)
    assert len(tables) >= 5
    for table in tables:
        width = len(table[0])
        assert all(len(row) == width for row in table), table[0]
    return tables


def _answer_table(tables):
    return next(t for t in tables if t[0][:3] == ["target", "d", "n"])


def test_answered_runs_show_their_seconds_as_numbers(tables_module):
    tables = _check_well_formed(tables_module.render(_given(reached=True)))
    answer = _answer_table(tables)
    assert len(answer) == 2 and answer[1][0] == "gauss-d2"
    for column in ("fisherwalk (s)", "fisherwalk MALA (s)", "BlackJAX NUTS (s)"):
        assert float(answer[1][answer[0].index(column)]) == 2.5


def test_runs_that_did_not_answer_say_so_in_a_well_formed_row(tables_module):
    # the cell that once broke a timed test: '> 60 (not reached)' is text, not a number
    tables = _check_well_formed(tables_module.render(_given(reached=False)))
    answer = _answer_table(tables)
    for column in ("fisherwalk (s)", "fisherwalk MALA (s)", "BlackJAX NUTS (s)"):
        assert answer[1][answer[0].index(column)] == "> 60 (not reached)"


@pytest.fixture(scope="module")
def quick_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("bench")
    done = subprocess.run(
        [sys.executable, str(SCRIPT), "--quick", "--targets", "gauss-d2", "--out", str(out),
         "--no-cache-probe", "--samplers", ",".join(sorted(SAMPLERS))],
        capture_output=True, text=True, timeout=600, cwd=ROOT, check=False,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    return out, json.loads((out / "results.json").read_text())


def _tables(markdown: str) -> list[list[list[str]]]:
    """Every markdown table as rows of cells (header first, separator dropped)."""
    tables, current = [], []
    for line in markdown.splitlines():
        if line.startswith("|"):
            cells = [c.strip() for c in line.strip().strip("|").split("|")]
            if not all(set(c) <= set("-") for c in cells):
                current.append(cells)
        elif current:
            tables.append(current)
            current = []
    if current:
        tables.append(current)
    return tables


@pytest.mark.slow
def test_every_sampler_asked_ran_once_on_the_target(quick_run):
    _, results = quick_run
    assert results["mode"] == "quick" and results["repeats"] == 1
    (target,) = results["targets"]
    assert target["target"] == "gauss-d2" and target["dim"] == 2
    assert {r["sampler"] for r in target["runs"]} == SAMPLERS
    assert len(target["runs"]) == len(SAMPLERS)
    assert target["raw_seconds"] > 0
    assert {r["sampler"] for r in results["references"]} <= {"fisherwalk", "adaptive",
                                                             "textbook"}
    assert "fisherwalk" in {r["sampler"] for r in results["references"]}


@pytest.mark.slow
def test_reported_answers_meet_their_definition(quick_run):
    _, results = quick_run
    for run in results["targets"][0]["runs"]:
        assert run["chains"] == 4
        if run["answer_reached"]:
            # quick mode stops at the answer, so the whole run is the answer's draws
            assert run["min_ess_bulk"] >= 400.0, run["sampler"]
            assert run["max_rhat"] < 1.01, run["sampler"]
            assert run["answer_draws"] <= run["draws"]
            assert run["answer_seconds"] >= run["prepare_seconds"]
        if run["sampler"] in ONE_PER_STEP:
            assert run["evaluations_sampling"] == 4 * run["draws"], run["sampler"]
        else:  # a NUTS or HMC trajectory takes one gradient per leapfrog step, at least one
            assert run["evaluations_sampling"] >= 4 * run["draws"], run["sampler"]
        assert 0.0 <= run["acceptance"] <= 1.0
    fisher = next(r for r in results["targets"][0]["runs"] if r["sampler"] == "fisherwalk")
    assert fisher["answer_reached"], "fisherwalk should answer on a 2-d Gaussian"


@pytest.mark.slow
def test_results_markdown_is_well_formed(quick_run):
    out, _ = quick_run
    text = (out / "RESULTS.md").read_text()
    assert "python benchmarks/run.py --quick --targets gauss-d2" in text
    assert "jax " in text and "blackjax 1." in text
    answer = _answer_table(_check_well_formed(text))
    assert len(answer) == 2 and answer[1][0] == "gauss-d2"
    assert "fisherwalk (s)" in answer[0] and "BlackJAX NUTS (s)" in answer[0]


@pytest.mark.slow
def test_plot_is_a_png(quick_run):
    out, _ = quick_run
    assert (out / "results.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
