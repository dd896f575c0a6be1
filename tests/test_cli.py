"""The console command: demo, scale and run, their files, and their error messages."""

import hashlib
import json
import math
import subprocess
import sys
from importlib.metadata import entry_points
from pathlib import Path

import numpy as np
import pytest

import fisherwalk
from fisherwalk.cli import command as cli
from fisherwalk.cli import modelfile, scenarios

MODELS = Path(__file__).parent / "models"
FIGURES = ("traces.png", "tuning.png", "marginals.png", "autocorrelation.png")


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    argv = ["demo", "--out", str(out), "--chains", "2", "--draws", "300", "--warmup", "200",
            "--seed", "5", "--quiet"]
    code = cli.main(argv)
    return code, out, json.loads((out / "record.json").read_text())


@pytest.mark.slow
def test_demo_writes_every_file(demo_run):
    code, out, record = demo_run
    assert code == 0
    for name in ("data.csv", "draws.npz", "record.json") + FIGURES:
        assert (out / name).stat().st_size > 0, name
    for name in FIGURES:
        assert (out / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    for entry in record["files"].values():  # the record fingerprints what it describes
        digest = hashlib.sha256((out / entry["path"]).read_bytes()).hexdigest()
        assert digest == entry["sha256"]


@pytest.mark.slow
def test_demo_draws_file_needs_no_pickle(demo_run):
    _, out, record = demo_run
    with np.load(out / "draws.npz", allow_pickle=False) as saved:
        draws, names = saved["draws"], saved["names"]
        assert draws.shape == (2, 300, 8)
        assert saved["logdensity"].shape == (2, 300)
        assert list(names) == record["scenario"]["labels"]  # one name everywhere
    # the scenario's labels name the summary's rows (table and record)
    assert [row["name"] for row in record["summary"]["parameters"]] == \
        record["scenario"]["labels"]
    means = [row["mean"] for row in record["summary"]["parameters"]]
    np.testing.assert_allclose(draws.mean(axis=(0, 1)), means, rtol=1e-12)


def test_demo_record_has_what_reproduction_needs(demo_run):
    _, _, record = demo_run
    for package in ("fisherwalk", "jax", "jaxlib", "blackjax", "optax", "numpy", "scipy",
                    "python"):
        assert record["versions"][package] not in ("", None)
    assert record["versions"]["fisherwalk"] == fisherwalk.__version__
    assert record["seed"] == 5 and record["float64"] is True
    assert record["options"]["chains"] == 2 and record["options"]["draws"] == 300
    assert record["options"]["warmup_steps"] == 200
    assert record["options"]["laplace"]["gradient_tolerance"] > 0
    assert set(record["keys"]) >= {"start", "warmup", "sampling"}
    assert record["tuning"]["dim"] == 8
    assert 0 < record["tuning"]["tuning"]["target_acceptance"] < 1
    assert record["warmup"]["steps"] == 200
    assert record["warmup"]["tuned"] == "scale"
    assert record["warmup"]["tuned_final"] == pytest.approx(record["tuning"]["tuning"]["scale"])
    assert record["summary"]["chains"] == 2 and record["summary"]["draws"] == 300
    assert record["sampling"]["run_length"]["planned"] is False  # --draws was given
    scene = scenarios.logistic()
    assert record["scenario"]["true_beta"] == scene.true_beta.tolist()
    assert record["scenario"]["records"] == 20_000


def test_demo_recovers_the_true_coefficients(demo_run):
    # The data were simulated from true_beta, so the exact posterior mean differs from
    # it by about one posterior sd (the sampling error of one data set), and the chain's
    # estimate of that mean adds its Monte Carlo error (MCSE). With 8 coefficients,
    # 4 sqrt(sd² + MCSE²) is exceeded by chance with probability about 8 x 6e-5.
    _, _, record = demo_run
    true = record["scenario"]["true_beta"]
    for row, beta in zip(record["summary"]["parameters"], true, strict=True):
        allowed = 4.0 * math.hypot(row["sd"], row["mcse"])
        assert abs(row["mean"] - beta) < allowed, row["name"]
    for row in record["truth"]:
        assert row["z"] == pytest.approx((row["mean"] - row["true"]) / row["sd"])


def test_demo_draws_are_reproduced_from_the_record(demo_run):
    # The record's seed and options are enough to get the same draws, bit for bit.
    _, out, record = demo_run
    options = record["options"]
    scene = scenarios.scenario(record["scenario"]["name"])
    again = cli.workflow(scene.logdensity, scene.initial_position, seed=record["seed"],
                         chains=options["chains"], draws=options["draws"],
                         warmup=options["warmup_steps"])
    with np.load(out / "draws.npz", allow_pickle=False) as saved:
        np.testing.assert_array_equal(np.asarray(again.trace.flat), saved["draws"])


@pytest.mark.slow
def test_demo_output_shows_tuning_summary_and_truth(tmp_path, capsys):
    code = cli.main(["demo", "--scenario", "poisson", "--out", str(tmp_path), "--chains", "2",
                     "--draws", "100", "--warmup", "200", "--seed", "1"])
    out = capsys.readouterr().out
    assert code == 0
    for text in ("culvert", "[1/4] Laplace fit", "[2/4] tuning from the theory, d = 6",
                 "target acceptance", "[3/4] warm-up", "[4/4] sampling", "realised",
                 "fisherwalk summary", "Against the truth", "grate fitted",
                 "record.json"):
        assert text in out, text
    header = (tmp_path / "data.csv").read_text().splitlines()[0]
    assert header.endswith("exposure_km,blockages")


def test_scale_json_equals_optimal_scale(capsys):
    assert cli.main(["scale", "1", "4", "1000000", "--json"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert [row["dim"] for row in printed] == [1, 4, 1_000_000]
    for row in printed:
        choice = fisherwalk.optimal_scale(row["dim"])
        assert row["scale"] == choice.scale
        assert row["acceptance"] == choice.acceptance
        assert row["jump_distance"] == choice.jump_distance


def test_scale_table(capsys):
    assert cli.main(["scale", "1", "100"]) == 0
    out = capsys.readouterr().out
    line = next(li for li in out.splitlines() if li.split()[:1] == ["1"])
    choice = fisherwalk.optimal_scale(1)
    assert line.split()[1] == f"{choice.scale:.4f}"
    assert line.split()[3] == f"{choice.acceptance:.4f}"


@pytest.mark.slow
def test_run_a_good_model_file(tmp_path, capsys):
    code = cli.main(["run", str(MODELS / "good_model.py"), "--out", str(tmp_path),
                     "--chains", "2", "--draws", "200", "--warmup", "200", "--quiet"])
    assert code == 0
    out = capsys.readouterr().out
    # the model file's names label the table (not the ravelled log_sigma, mu)
    assert "log sd of a reading" in out and "true weight" in out
    record = json.loads((tmp_path / "record.json").read_text())
    source = (MODELS / "good_model.py").read_bytes()
    assert record["model_file"]["sha256"] == hashlib.sha256(source).hexdigest()
    assert record["model_file"]["labels"] == ["log sd of a reading", "true weight"]
    # one name per parameter everywhere: the tuning and Laplace sections too
    assert record["tuning"]["names"] == ["log sd of a reading", "true weight"]
    assert sorted(record["laplace"]["mode"]) == sorted(record["model_file"]["labels"])
    for name in FIGURES + ("draws.npz",):
        assert (tmp_path / name).stat().st_size > 0


@pytest.mark.parametrize(
    "file, problem",
    [
        ("missing_name.py", "does not define initial_position"),
        ("import_error.py", "ZeroDivisionError: division by zero (line 5"),
        ("wrong_shape.py", "returns an array of shape (3,), not a scalar"),
        ("no_such_model.py", "does not exist"),
    ],
)
def test_broken_model_files_get_a_clear_message(file, problem, tmp_path, capsys):
    code = cli.main(["run", str(MODELS / file), "--out", str(tmp_path)])
    err = capsys.readouterr().err
    assert code == 2
    assert problem in err
    assert str(MODELS / file) in err  # names the file
    assert "what to do:" in err
    assert "Traceback" not in err
    assert not (tmp_path / "record.json").exists()


def test_names_of_the_wrong_length_are_refused(tmp_path):
    model = tmp_path / "model.py"
    model.write_text("import jax.numpy as jnp\n"
                     "def logdensity(p):\n    return -0.5 * jnp.sum(p ** 2)\n"
                     "initial_position = jnp.zeros(3)\nnames = ['a', 'b']\n")
    with pytest.raises(fisherwalk.ModelFileError, match="names has 2 entries but the "
                                                        "position has 3"):
        modelfile.load_model(model)


@pytest.mark.parametrize("command", ["demo", "scale", "run"])
def test_help_has_examples(command, capsys):
    with pytest.raises(SystemExit) as stop:
        cli.main([command, "--help"])
    assert stop.value.code == 0
    out = capsys.readouterr().out
    assert "examples:" in out and f"fisherwalk {command}" in out
    if command == "run":
        assert "run only model files you trust" in out


def test_usage_errors_exit_with_2(capsys):
    # Numeric options are checked by fisherwalk.base.checks after argparse: the package's
    # message, exit code 2, no traceback.
    assert cli.main(["scale", "0"]) == 2
    assert "DIM=0 is out of range" in capsys.readouterr().err
    with pytest.raises(SystemExit) as stop:  # argparse's own usage errors stay as they were
        cli.main(["scale"])
    assert stop.value.code == 2


def test_command_turns_on_float64_and_import_does_not():
    code = ("import jax, fisherwalk.cli as c; before = jax.config.jax_enable_x64; "
            "c.main(['scale', '2']); print(before, jax.config.jax_enable_x64)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.split()[-2:] == ["False", "True"]


def test_console_entry_point_is_main():
    (entry,) = [e for e in entry_points(group="console_scripts") if e.name == "fisherwalk"]
    assert entry.value == "fisherwalk.cli:main"
