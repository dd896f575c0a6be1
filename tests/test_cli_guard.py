"""The command line fails before the work, not after it (issue 13, items 1, 2 and 4).

Each case of the trial runs ``main`` in this process: the refusals must come before the
Laplace fit (its narration line "[1/4] Laplace fit" never appears), with exit code 2 and
a message instead of a traceback.
"""

import errno
import tempfile
import textwrap

import numpy as np
import pytest

from fisherwalk.cli import command

MODEL = textwrap.dedent("""
    import jax.numpy as jnp
    import numpy as np

    def logdensity(p):
        return -0.5 * jnp.sum((p["x"] - 1.0) ** 2)

    initial_position = {"x": np.zeros(2, np.float32)}
""")


@pytest.fixture
def model(tmp_path):
    path = tmp_path / "model.py"
    path.write_text(MODEL)
    return path


def _main(capsys, *argv):
    code = command.main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_out_is_a_file(model, tmp_path, capsys):
    target = tmp_path / "afile"
    target.write_text("keep")
    code, out, err = _main(capsys, "run", model, "--out", target)
    assert code == 2 and "is a file, not a folder" in err and "Traceback" not in err
    assert "Laplace fit" not in out and target.read_text() == "keep"


def test_out_cannot_be_created_under_a_file(model, tmp_path, capsys):
    # As root, chmod does not stop writes; a path under a regular file cannot be created
    # by anyone.
    (tmp_path / "afile").write_text("")
    code, out, err = _main(capsys, "run", model, "--out", tmp_path / "afile" / "results")
    assert code == 2 and "cannot be created" in err and "Laplace fit" not in out


def test_read_only_out_refused_before_the_fit(model, tmp_path, capsys, monkeypatch):
    # A read-only folder, simulated: creating a file in it fails as it would without
    # write permission.
    def refuse(*args, **kwargs):
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    code, out, err = _main(capsys, "run", model, "--out", tmp_path / "results")
    assert code == 2 and "not writable (Permission denied)" in err
    assert "Laplace fit" not in out


@pytest.mark.parametrize("option, value, message", [
    ("--seed", "1e23", "--seed '1e23' is not a whole number"),
    ("--seed", str(2**32), "out of range"),
    ("--draws", "1e6", "--draws '1e6' is not a whole number"),
    ("--chains", "0", "out of range"),
    ("--draws", str(10**13), "need about"),
])
def test_numeric_options_refused_before_the_fit(model, tmp_path, capsys, option, value,
                                                message):
    code, out, err = _main(capsys, "run", model, "--out", tmp_path / "o", option, value)
    assert code == 2 and message in err and "Traceback" not in err
    assert "Laplace fit" not in out


def test_operating_system_error_is_one_line(model, tmp_path, capsys, monkeypatch):
    def refuse(path, **_):
        raise PermissionError(errno.EACCES, "Permission denied", str(path))

    monkeypatch.setattr(command, "load_model", refuse)
    code, _, err = _main(capsys, "run", model, "--out", tmp_path / "o")
    assert code == 2 and err.strip() == f"fisherwalk run: Permission denied: {model}"


def test_float32_model_and_ctrl_c_during_sampling(model, tmp_path, capsys, interrupt_sampling):
    # Trial: a model file whose initial_position is float32 failed after the fit (carry
    # dtypes), and Ctrl-C during sampling exited 0. Here the float32 model runs, and a
    # Ctrl-C after three chunks of sampling keeps 300 draws, says so and exits 130.
    interrupt_sampling(3)
    out_dir = tmp_path / "o"
    with pytest.warns(Warning):  # the Float32Warning and walk()'s interruption warning
        code, out, err = _main(capsys, "run", model, "--out", out_dir, "--chains", "2",
                               "--draws", "1000", "--warmup", "100", "--quiet")
    assert code == 130, err
    assert "interrupted (Ctrl-C) after 300 of 1000 draws" in err
    with np.load(out_dir / "draws.npz") as saved:
        assert saved["draws"].shape == (2, 300, 2) and saved["draws"].dtype == np.float64
    assert (out_dir / "record.json").exists()


# ------------------------------------------------------------------ issue 21 (items 8 and 12)


def test_occupied_output_name_refused_before_the_fit(model, tmp_path, capsys):
    out = tmp_path / "o"
    (out / "draws.npz").mkdir(parents=True)  # a folder where the draws would go
    code, printed, err = _main(capsys, "run", model, "--out", out, "--quiet")
    assert code == 2 and "is a folder" in err and "Laplace fit" not in printed


def test_demo_refuses_a_users_own_data_and_record(tmp_path, capsys):
    out = tmp_path / "mine"
    out.mkdir()
    (out / "data.csv").write_text("my,own\n1,2\n")
    (out / "record.json").write_text('{"mine": true}')
    code, printed, err = _main(capsys, "demo", "--out", out, "--quiet")
    assert code == 2 and "did not write" in err and "Laplace fit" not in printed
    assert (out / "data.csv").read_text() == "my,own\n1,2\n"
    assert (out / "record.json").read_text() == '{"mine": true}'


def test_demo_folder_of_an_earlier_demo_is_accepted(tmp_path):
    import hashlib
    import json

    from fisherwalk.cli.outputs import check_demo_folder
    from fisherwalk.errors import InputError

    (tmp_path / "data.csv").write_text("a,b\n1,2\n")
    digest = hashlib.sha256(b"a,b\n1,2\n").hexdigest()
    (tmp_path / "record.json").write_text(json.dumps(
        {"format": "fisherwalk-run", "command": "demo", "scenario": {"data_sha256": digest}}))
    check_demo_folder(tmp_path)  # the demo's own files: rewritten freely
    (tmp_path / "data.csv").write_text("a,b\n1,3\n")  # edited by the user since
    with pytest.raises(InputError, match="did not write"):
        check_demo_folder(tmp_path)


def _checkpointed_out(tmp_path):
    out = tmp_path / "o"
    (out / "checkpoint").mkdir(parents=True)
    (out / "checkpoint" / "run.json").write_text("{}")
    (out / "command.json").write_text('{"first": "run"}')
    return out


def test_second_checkpointed_run_into_one_out_keeps_the_first_provenance(model, tmp_path,
                                                                          capsys):
    out = _checkpointed_out(tmp_path)
    code, printed, err = _main(capsys, "run", model, "--out", out, "--checkpoint",
                               "--draws", "40", "--seed", "9", "--quiet")
    assert code == 2 and "holds a checkpointed run already" in err
    assert "fisherwalk resume" in err and "Laplace fit" not in printed
    assert (out / "command.json").read_text() == '{"first": "run"}'


def test_checkpointed_run_refused_by_a_live_command_writes_no_provenance(model, tmp_path,
                                                                         capsys):
    from fisherwalk.base.lock import acquire_lock

    out = tmp_path / "o"
    out.mkdir()
    with acquire_lock(out):  # another command holds the folder
        code, printed, err = _main(capsys, "run", model, "--out", out, "--checkpoint",
                                   "--draws", "40", "--quiet")
    assert code == 2 and "in use by process" in err and "Laplace fit" not in printed
    assert not (out / "command.json").exists()


@pytest.mark.parametrize("code", ["0", "None", "'bye'"])
def test_sys_exit_in_a_model_file_is_a_refusal_with_a_message(tmp_path, capsys, code):
    # issue 21, item 12: sys.exit(0) in a model file gave exit 0 with nothing written
    path = tmp_path / "exits.py"
    path.write_text(f"import sys\nsys.exit({code})\n")
    exit_code, printed, err = _main(capsys, "run", path, "--out", tmp_path / "o")
    assert exit_code == 2 and "sys.exit" in err and "Traceback" not in err
    assert "Laplace fit" not in printed


POINTWISE_MODEL = textwrap.dedent("""
    import jax.numpy as jnp
    import numpy as np

    def logdensity(p):
        return -0.5 * jnp.sum((p["x"] - 1.0) ** 2)

    def pointwise(p):  # 10**10 observations' worth of values per draw
        return jnp.zeros(10**10) + p["x"][0]

    initial_position = {"x": np.zeros(2)}
""")


def test_pointwise_that_would_not_fit_is_refused_before_the_fit(tmp_path, capsys):
    # issue 21, item 5: with 10**5 observations the run sampled, then failed with a raw
    # MemoryError and lost the draws; the estimate now counts pointwise before any work
    path = tmp_path / "model.py"
    path.write_text(POINTWISE_MODEL)
    code, printed, err = _main(capsys, "run", path, "--pointwise", "--draws", "100",
                               "--out", tmp_path / "o")
    assert code == 2 and "pointwise and derived values" in err and "Traceback" not in err
    assert "Laplace fit" not in printed
    assert not (tmp_path / "o").exists()  # --out left untouched (not even created)
