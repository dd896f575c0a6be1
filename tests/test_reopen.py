"""A finished run reopened without its model: fisherwalk.reopen and `fisherwalk show`."""

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.errors import CheckpointError, InputError

MODEL = textwrap.dedent('''
    import jax
    import jax.numpy as jnp
    import numpy as np

    y = jnp.asarray(np.random.default_rng(3).normal(1.5, 2.0, 40))  # invented demo data

    def logdensity(p):
        sigma = jnp.exp(p["log_sigma"])
        return (jnp.sum(-0.5 * ((y - p["mu"]) / sigma) ** 2) - y.size * p["log_sigma"]
                - 0.5 * p["mu"] ** 2 / 100 - 0.5 * p["log_sigma"] ** 2)

    initial_position = {"mu": 0.0, "log_sigma": 0.0}
    names = ["log_noise", "level"]  # ravelled order (dict keys sorted): log_sigma, mu

    def derived(p):
        return {"sigma": jnp.exp(p["log_sigma"]), "cv": jnp.exp(p["log_sigma"]) / p["mu"]}

    def predict(p, key):
        return {"y_new": p["mu"] + jnp.exp(p["log_sigma"]) * jax.random.normal(key)}
''')


def _command(*args, cwd):
    env = {**os.environ, "PYTHONPATH": str(Path(fisherwalk.__file__).parents[1])}
    return subprocess.run([sys.executable, "-c", "import sys; from fisherwalk.cli.command "
                           "import main; sys.exit(main())", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=600)


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("show")
    (folder / "model.py").write_text(MODEL)
    done = _command("run", "model.py", "--out", "out", "--quiet", "--draws", "600",
                    "--chains", "2", "--warmup", "200", cwd=folder)
    assert done.returncode == 0, done.stderr
    return folder, done.stdout


def _table(text: str) -> str:
    return text[text.index("fisherwalk summary"):]


@pytest.mark.slow
def test_show_in_a_new_process_prints_the_runs_table(run_folder):
    folder, printed = run_folder
    shown = _command("show", "out", cwd=folder)
    assert shown.returncode == 0, shown.stderr
    assert _table(shown.stdout) == _table(printed)
    focused = _command("show", "out", "--focus", "sigma", "level", cwd=folder)
    rows = [line.split()[0] for line in focused.stdout.splitlines()
            if line.split() and line.split()[0] in ("level", "log_noise", "sigma", "cv")]
    assert rows == ["level", "sigma"] * 2  # the table and the table of Monte Carlo errors


def test_one_name_per_parameter_in_written_order_everywhere(run_folder):
    folder, _ = run_folder
    out = folder / "out"
    record = json.loads((out / "record.json").read_text())
    arrays = np.load(out / "draws.npz")
    written = ["level", "log_noise"]  # mu, log_sigma as the model file wrote them
    assert list(arrays["names"]) == written
    assert list(record["laplace"]["mode"]) == written == list(record["laplace"]["sd"])
    assert [row["name"] for row in record["summary"]["parameters"]] == written + [
        "sigma", "cv", "y_new"]
    assert sorted(record["tuning"]["names"]) == sorted(written)  # ravelled, matching arrays
    assert list(arrays["derived_names"]) == ["sigma", "cv"]  # as derived() wrote them
    lines = (out / "summary.csv").read_text().splitlines()
    assert lines[0].startswith("name,mean,sd,mcse")
    assert [line.split(",")[0] for line in lines[1:]] == written + ["sigma", "cv", "y_new"]
    # the draws under each name are that parameter's: sigma = exp(log_noise)
    log_noise = arrays["draws"][..., written.index("log_noise")]
    np.testing.assert_allclose(arrays["derived"][..., 0], np.exp(log_noise), rtol=1e-12)


def test_reopened_trace_gives_the_summary_figures_and_arviz(run_folder, tmp_path):
    folder, printed = run_folder
    trace = fisherwalk.reopen(folder / "out")
    assert trace.walker is None and trace.facts.title == "random-walk Metropolis"
    assert _table(str(trace.summary())) == _table(printed).rstrip("\n")
    pytest.importorskip("arviz")
    data = trace.to_arviz()
    assert list(data.posterior.data_vars)[:2] == ["mu", "log_sigma"]
    assert "y_new" in data.posterior_predictive
    pytest.importorskip("matplotlib")
    paths = fisherwalk.plots.save_all(trace, tmp_path)
    assert all(p.stat().st_size > 1000 for p in paths)


def test_not_a_run_folder_is_refused(tmp_path):
    with pytest.raises(InputError, match="neither draws.npz"):
        fisherwalk.reopen(tmp_path)


def _gaussian(p):
    return -0.5 * jnp.sum((p["x"] - 1.0) ** 2 / jnp.array([1.0, 4.0]))


def test_a_finished_checkpoint_reopens_with_the_same_draws(tmp_path):
    keys = jax.random.split(jax.random.key(4), 3)
    walker = fisherwalk.start(_gaussian, {"x": jnp.zeros(2)}, keys[0], chains=2,
                              progress=False)
    trace = fisherwalk.walk(walker, keys[2], 300, progress=False,
                            checkpoint=tmp_path / "run.ckpt")
    again = fisherwalk.reopen(tmp_path / "run.ckpt")
    np.testing.assert_array_equal(again.flat, trace.flat)
    np.testing.assert_array_equal(again.accepted, trace.accepted)
    assert again.walker is None and again.names == trace.names
    assert again.summary().names == trace.summary().names


def test_an_unfinished_checkpoint_is_refused(tmp_path):
    keys = jax.random.split(jax.random.key(4), 3)
    walker = fisherwalk.start(_gaussian, {"x": jnp.zeros(2)}, keys[0], chains=2,
                              progress=False)
    fisherwalk.walk(walker, keys[2], 300, progress=False, checkpoint=tmp_path / "run.ckpt")
    state = tmp_path / "run.ckpt" / "state.json"
    content = json.loads(state.read_text())
    content["done"] = 100
    state.write_text(json.dumps(content))
    with pytest.raises(CheckpointError, match="not finished"):
        fisherwalk.reopen(tmp_path / "run.ckpt")


@pytest.mark.slow
def test_run_focus_prints_some_rows_and_keeps_every_row_in_the_files(tmp_path, capsys):
    from fisherwalk.cli import command as cli

    (tmp_path / "model.py").write_text(MODEL)
    out = tmp_path / "out"
    code = cli.main(["run", str(tmp_path / "model.py"), "--out", str(out), "--quiet",
                     "--draws", "300", "--chains", "2", "--warmup", "200",
                     "--no-compile-cache", "--focus", "level", "y_*"])
    assert code == 0
    printed = capsys.readouterr().out
    rows = [line.split()[0] for line in printed.splitlines()
            if line.split() and line.split()[0] in ("level", "log_noise", "sigma", "cv",
                                                    "y_new")]
    assert rows == ["level", "y_new"] * 2
    lines = (out / "summary.csv").read_text().splitlines()
    assert [line.split(",")[0] for line in lines[1:]] == [
        "level", "log_noise", "sigma", "cv", "y_new"]
