"""The benchmark script's quick mode on the smallest target: it runs and its tables are
well formed. No timing is asserted (performance is measured in benchmarks/, never tested).

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

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = ROOT / "benchmarks" / "run.py"
SAMPLERS = {"fisherwalk", "fisherwalk-mala", "fisherwalk-nuts", "nuts", "pathfinder", "chees",
            "adaptive", "textbook"}
ONE_PER_STEP = {"fisherwalk", "fisherwalk-mala", "adaptive", "textbook"}


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


def test_every_sampler_ran_once_on_the_target(quick_run):
    _, results = quick_run
    assert results["mode"] == "quick" and results["repeats"] == 1
    (target,) = results["targets"]
    assert target["target"] == "gauss-d2" and target["dim"] == 2
    assert {r["sampler"] for r in target["runs"]} == SAMPLERS
    assert len(target["runs"]) == len(SAMPLERS)
    assert target["raw_seconds"] > 0
    assert {r["sampler"] for r in results["references"]} == {"fisherwalk", "adaptive",
                                                              "textbook"}


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


def test_results_markdown_is_well_formed(quick_run):
    out, _ = quick_run
    text = (out / "RESULTS.md").read_text()
    for heading in ("## Goals", "## 1. Time to answer", "## 2. Long runs",
                    "## 3. Random walks against their limits", "## 4. Where fisherwalk"):
        assert heading in text
    assert "python benchmarks/run.py --quick --targets gauss-d2" in text
    assert "## 7. Gradient samplers and BlackJAX's warm-ups" in text
    assert "jax " in text and "blackjax 1." in text
    tables = _tables(text)
    assert len(tables) >= 5
    for table in tables:
        width = len(table[0])
        assert all(len(row) == width for row in table), table[0]
    answer = next(t for t in tables if t[0][:3] == ["target", "d", "n"])
    assert len(answer) == 2 and answer[1][0] == "gauss-d2"
    assert "fisherwalk (s)" in answer[0] and "BlackJAX NUTS (s)" in answer[0]
    float(answer[1][answer[0].index("fisherwalk (s)")])  # a number, not a placeholder
    float(answer[1][answer[0].index("fisherwalk MALA (s)")])
    limits = next(t for t in tables if "limit ESS/grad" in t[0])
    mala = next(row for row in limits if row[2] == "fisherwalk MALA")
    float(mala[limits[0].index("median / limit")])  # the measured ratio is a number


def test_plot_is_a_png(quick_run):
    out, _ = quick_run
    assert (out / "results.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
