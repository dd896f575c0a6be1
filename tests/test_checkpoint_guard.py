"""Checkpoints refuse tampering and a second writer (issue 13, items 3 and 5).

Each test reproduces a failure of the adversarial trial: a symlink planted at a temporary
name, a second process writing the same folder, an edited whitening matrix, a segment
rewritten as a valid zip with one draw changed, and malformed JSON that escaped as
RecursionError, TypeError or a huge allocation.
"""

import io
import json
import os
import signal
import subprocess
import sys
import textwrap
import warnings
import zipfile
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.errors import CheckpointError, FisherwalkWarning
from fisherwalk.persistence.tuningfile import save_tuning
from fisherwalk.prepare.start import start
from fisherwalk.workflow.sampling import walk

DRAWS, CHUNK = 200, 20
FIELDS = ("flat", "logdensity", "accepted", "acceptance_rate", "faults")


def logdensity(x):
    return -0.5 * jnp.sum(x**2 * jnp.array([1.0, 4.0, 9.0]))


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """A walker, an uninterrupted run with key 1 and a finished checkpoint of it."""
    walker = start(logdensity, jnp.zeros(3), jax.random.key(0), chains=2)
    reference = walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK)
    directory = tmp_path_factory.mktemp("finished") / "run.ckpt"
    walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=directory, checkpoint_every=0)
    return walker, reference, directory


def _same(trace, reference):
    return all(np.array_equal(getattr(trace, f), getattr(reference, f)) for f in FIELDS)


def _copy(directory: Path, target: Path) -> Path:
    target.mkdir()
    for p in directory.iterdir():
        (target / p.name).write_bytes(p.read_bytes())
    return target


def test_planted_symlink_in_a_checkpoint_folder_is_not_followed(run, tmp_path):
    walker, _, _ = run
    victim = tmp_path / "victim.txt"
    victim.write_text("precious")
    directory = tmp_path / "run.ckpt"
    directory.mkdir()
    for name in ("run.json", "state.json", "segment-000000.npz"):  # the old, predictable names
        os.symlink(victim, directory / f".{name}.{os.getpid()}.tmp")
    with pytest.raises(CheckpointError, match="not regular files"):
        walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=directory)
    assert victim.read_text() == "precious"
    assert not (directory / "run.json").exists() and not (directory / "writer.lock").exists()


def test_planted_symlink_next_to_a_tuning_file_is_not_followed(run, tmp_path):
    walker, _, _ = run
    victim = tmp_path / "victim.txt"
    victim.write_text("precious")
    os.symlink(victim, tmp_path / f".walker.json.{os.getpid()}.tmp")
    save_tuning(walker, tmp_path / "walker.json")
    assert victim.read_text() == "precious"
    assert fisherwalk.load_tuning(tmp_path / "walker.json").names == walker.names


def test_a_fifo_in_the_folder_is_refused(run, tmp_path):
    walker, _, directory = run
    copy = _copy(directory, tmp_path / "copy.ckpt")
    os.mkfifo(copy / "state.json.fifo")
    with pytest.raises(CheckpointError, match="not regular files: state.json.fifo"):
        walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=copy)


def test_edited_whitening_is_refused(run, tmp_path):
    # Trial: whitening x 10 in run.json made a resumed summary report a realised jump of
    # 123.9 instead of 1.24; the fingerprint now covers the whole tuning record.
    _, _, directory = run
    copy = _copy(directory, tmp_path / "copy.ckpt")
    content = json.loads((copy / "run.json").read_text())
    content["record"]["tuning"]["whitening"] = (
        10 * np.asarray(content["record"]["tuning"]["whitening"])).tolist()
    (copy / "run.json").write_text(json.dumps(content))
    with pytest.raises(CheckpointError, match="the whitening or the target acceptance differs"):
        fisherwalk.resume(copy, logdensity)


def test_edited_fisher_information_is_refused(run, tmp_path):
    # The Fisher information and its Cholesky factor (consistent with each other, so the
    # record's own checks pass) were outside the fingerprint; a resume reports them.
    _, _, directory = run
    copy = _copy(directory, tmp_path / "copy.ckpt")
    content = json.loads((copy / "run.json").read_text())
    laplace = content["record"]["laplace"]
    laplace["fisher"] = (4 * np.asarray(laplace["fisher"])).tolist()
    laplace["cholesky"] = (2 * np.asarray(laplace["cholesky"])).tolist()
    (copy / "run.json").write_text(json.dumps(content))
    with pytest.raises(CheckpointError, match="another tuning record"):
        fisherwalk.resume(copy, logdensity)


def test_segment_with_one_draw_changed_is_refused(run, tmp_path):
    _, _, directory = run
    copy = _copy(directory, tmp_path / "copy.ckpt")
    segment = copy / "segment-000002.npz"
    with np.load(segment) as data:
        arrays = {name: data[name] for name in data.files}
    arrays["flat"] = arrays["flat"].copy()
    arrays["flat"][0, 3, 1] += 1.0  # a valid file, one draw changed (not the last one)
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    segment.write_bytes(buffer.getvalue())
    assert zipfile.is_zipfile(segment)
    with pytest.raises(CheckpointError, match="SHA-256 digest"):
        fisherwalk.resume(copy, logdensity)


@pytest.mark.parametrize("edit, message", [
    (lambda c: c["identity"].update(draws=1e12), "draws"),
    (lambda c: c["identity"].update(draws=10**12), "need about"),
    (lambda c: c["start"]["position"].update(dtype="object"), "dtype"),
    (lambda c: c["start"].update(position=[[[[[[0.0]]]]]] * 2), "position"),
    (lambda c: c["identity"].update(chains=True), "chains"),
    (lambda c: c["identity"].update(key={"impl": "nonsense", "data": [1, 2]}), "random key"),
])
def test_malformed_run_file_is_a_checkpoint_error(run, tmp_path, edit, message):
    _, _, directory = run
    copy = _copy(directory, tmp_path / "copy.ckpt")
    content = json.loads((copy / "run.json").read_text())
    edit(content)
    (copy / "run.json").write_text(json.dumps(content))
    with pytest.raises(CheckpointError, match=message):
        fisherwalk.resume(copy, logdensity)


def test_deeply_nested_state_file_is_a_checkpoint_error(run, tmp_path):
    walker, _, directory = run
    copy = _copy(directory, tmp_path / "copy.ckpt")
    # within the state file's size bound (about 66 kB here), so that the depth is judged
    (copy / "state.json").write_text("[" * 30_000 + "]" * 30_000)
    with pytest.raises(CheckpointError, match="deeper than"):
        walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=copy)
    # beyond it: refused by its size, before a byte is parsed
    (copy / "state.json").write_text("[" * 100_000 + "]" * 100_000)
    with pytest.raises(CheckpointError, match="more than the"):
        walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=copy)


CHILD = textwrap.dedent("""
    import os, signal, sys
    import jax
    jax.config.update("jax_enable_x64", True)
    import jax.numpy as jnp
    import numpy as np
    from fisherwalk.workflow import sampling
    from fisherwalk.persistence import tuningfile

    def logdensity(x):
        return -0.5 * jnp.sum(x**2 * jnp.array([1.0, 4.0, 9.0]))

    start = np.load(sys.argv[2])
    walker = tuningfile.walker_from_record(sys.argv[1], logdensity, start["position"],
                                           start["logdensity"])
    calls, original = [0], walker.engine

    def engine(*args, **kwargs):  # the 4th chunk: three are saved, the lock is held
        calls[0] += 1
        if calls[0] == 4:
            print("holding", flush=True)
            if sys.stdin.readline().strip() == "die":  # the parent has tried its walk
                os.kill(os.getpid(), signal.SIGKILL)
        return original(*args, **kwargs)

    walker = walker._replace(model=walker.model._replace(engine=engine))
    sampling.walk(walker, jax.random.key(1), int(sys.argv[4]), chunk=int(sys.argv[5]),
                  checkpoint=sys.argv[3], checkpoint_every=0)
""")


def test_second_writer_refused_and_killed_writer_resumed_without_a_flag(run, tmp_path):
    # No timing: the child stops itself inside its 4th chunk (three saved) and waits for
    # a line on its standard input; meanwhile the second writer is refused; then the
    # child kills itself with SIGKILL, holding the lock. The kernel released the lock:
    # resume() continues with no flag, to the draws of an uninterrupted run.
    walker, reference, _ = run
    directory = tmp_path / "run.ckpt"
    save_tuning(walker, tmp_path / "walker.json")
    np.savez(tmp_path / "start.npz", position=np.asarray(walker.flat_positions()),
             logdensity=np.asarray(walker.state.logdensity))
    (tmp_path / "child.py").write_text(CHILD)
    env = dict(os.environ, PYTHONPATH=str(Path(fisherwalk.__file__).parents[1]))
    child = subprocess.Popen([sys.executable, str(tmp_path / "child.py"),
                              str(tmp_path / "walker.json"), str(tmp_path / "start.npz"),
                              str(directory), str(DRAWS), str(CHUNK)], env=env,
                             stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline().strip() == "holding"
        with pytest.raises(CheckpointError, match=f"in use by process {child.pid}"):
            walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=directory)
        child.stdin.write("die\n")
        child.stdin.flush()
        assert child.wait(timeout=120) == -signal.SIGKILL
    finally:
        if child.poll() is None:
            child.kill()
            child.wait(timeout=60)
    assert json.loads((directory / "state.json").read_text())["done"] == 3 * CHUNK
    assert (directory / "writer.lock").exists()  # left by the killed child, not held
    with warnings.catch_warnings():
        warnings.simplefilter("error", FisherwalkWarning)  # nothing to warn about
        resumed = fisherwalk.resume(directory, logdensity)
    assert resumed.complete and _same(resumed, reference)
    assert not (directory / "writer.lock").exists()
