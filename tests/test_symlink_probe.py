"""The symbolic-link probe, repeated over every file fisherwalk writes (issue 21, item 2).

A link is planted at each name the package writes (checkpoint files, the tuning file,
the command's outputs, error.txt, the plots, the demo's data.csv), pointing at a file
outside the run folder (it must keep its content) and at a missing file outside (it
must not be created). Every write is refused or made elsewhere; nothing outside the run
folder changes, and the command-line refusals come before the fit.
"""

from __future__ import annotations

from pathlib import Path

import jax
import jax.numpy as jnp
import pytest

import fisherwalk
from fisherwalk.cli import command
from fisherwalk.cli.outputs import output_names
from fisherwalk.errors import FisherwalkError

MODELS = Path(__file__).parent / "models"
KEY = jax.random.key(0)
SMALL = ["--chains", "2", "--draws", "40", "--warmup", "50", "--quiet", "--no-compile-cache"]


def _normal(x):
    return -0.5 * jnp.sum(x**2)


@pytest.fixture
def outside(tmp_path):
    """A precious file and a missing one, outside every run folder."""
    folder = tmp_path / "outside"
    folder.mkdir()
    (folder / "precious.txt").write_text("precious")
    return folder


def _untouched(outside: Path) -> bool:
    return (sorted(p.name for p in outside.iterdir()) == ["precious.txt"]
            and (outside / "precious.txt").read_text() == "precious")


def _plant(folder: Path, name: str, outside: Path, dangling: bool) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / name).symlink_to(outside / ("missing.txt" if dangling else "precious.txt"))


@pytest.mark.parametrize("dangling", [False, True])
@pytest.mark.parametrize("name", ["run.json", "state.json", "segment-000000.npz", "writer.lock",
                                  ".state.json.abc123.tmp"])
def test_checkpoint_files_are_not_written_through_links(tmp_path, outside, name, dangling):
    walker = fisherwalk.start(_normal, jnp.zeros(2), KEY, chains=2, progress=False)
    folder = tmp_path / "run.ckpt"
    _plant(folder, name, outside, dangling)
    with pytest.raises(FisherwalkError):
        fisherwalk.walk(walker, KEY, 20, chunk=10, checkpoint=folder, progress=False)
    assert _untouched(outside)


@pytest.mark.parametrize("dangling", [False, True])
def test_tuning_file_is_not_written_through_a_link(tmp_path, outside, dangling):
    walker = fisherwalk.start(_normal, jnp.zeros(2), KEY, chains=2, progress=False)
    _plant(tmp_path / "run", "tuning.json", outside, dangling)
    with pytest.raises(FisherwalkError, match="symbolic link"):
        fisherwalk.save_tuning(walker, tmp_path / "run" / "tuning.json")
    assert _untouched(outside)


@pytest.mark.parametrize("dangling", [False, True])
def test_plots_are_not_written_through_links(tmp_path, outside, dangling):
    walker = fisherwalk.start(_normal, jnp.zeros(2), KEY, chains=2, progress=False)
    trace = fisherwalk.walk(walker, KEY, 20, progress=False)
    from fisherwalk.results import plots

    for name in plots.FILE_NAMES.values():
        _plant(tmp_path / "figs", name, outside, dangling)
    with pytest.raises(FisherwalkError, match="symbolic link"):
        plots.save_all(trace, tmp_path / "figs")
    assert _untouched(outside)


@pytest.mark.parametrize("dangling", [False, True])
@pytest.mark.parametrize("name", output_names("run", checkpoint=True))
def test_command_outputs_are_refused_before_the_fit_when_linked(tmp_path, outside, capsys,
                                                                 name, dangling):
    out = tmp_path / "out"
    _plant(out, name, outside, dangling)
    code = command.main(["run", str(MODELS / "good_model.py"), "--out", str(out),
                         "--checkpoint", *SMALL])
    printed = capsys.readouterr()
    assert code == 2 and "symbolic link" in printed.err
    assert "Laplace fit" not in printed.out
    assert _untouched(outside)
    assert sorted(p.name for p in out.iterdir()) == sorted({name, "error.txt"})


@pytest.mark.parametrize("name", ["data.csv", "record.json", "draws.npz"])
def test_demo_outputs_are_refused_before_the_fit_when_linked(tmp_path, outside, capsys, name):
    out = tmp_path / "out"
    _plant(out, name, outside, dangling=False)
    code = command.main(["demo", "--out", str(out), *SMALL])
    printed = capsys.readouterr()
    assert code == 2 and "symbolic link" in printed.err and "Laplace fit" not in printed.out
    assert _untouched(outside)


@pytest.mark.parametrize("dangling", [False, True])
def test_error_note_of_a_failed_run_is_not_written_through_a_link(tmp_path, outside, capsys,
                                                                   dangling):
    # a model file without logdensity fails before the output folder is looked at: the
    # error note is the only write, and it must not follow the planted error.txt
    bad = tmp_path / "bad.py"
    bad.write_text("initial_position = [0.0]\n")
    out = tmp_path / "out"
    _plant(out, "error.txt", outside, dangling)
    assert command.main(["run", str(bad), "--out", str(out), *SMALL]) == 2
    assert "logdensity" in capsys.readouterr().err
    assert _untouched(outside) and (out / "error.txt").is_symlink()


def test_failed_resume_of_a_mistyped_folder_creates_nothing(tmp_path, capsys):
    missing = tmp_path / "no" / "such" / "run"
    code = command.main(["resume", str(missing), "--model", str(MODELS / "good_model.py"),
                         "--no-compile-cache"])
    assert code == 2 and "holds no resumable run" in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == []


def test_failed_resume_error_note_is_not_written_through_a_link(tmp_path, outside, capsys):
    folder = tmp_path / "run"
    _plant(folder, "error.txt", outside, dangling=True)
    code = command.main(["resume", str(folder), "--model", str(MODELS / "good_model.py"),
                         "--no-compile-cache"])
    assert code == 2 and "holds no resumable run" in capsys.readouterr().err
    assert _untouched(outside)
