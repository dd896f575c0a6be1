"""Checkpoints: atomic saves, exact resumption after a kill, refusal of damage and of
other runs.

Exactness is checked against an uninterrupted run with the same key: step s reads the
random-number counters of step s alone, so a correct resume gives the same draws bit for bit
(np.array_equal, no tolerance). Kills are real: a subprocess runs the walk and sends
itself SIGKILL at a chosen point (the test script patches os.replace / os.fsync or the
engine; the library knows nothing of it).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.errors import CheckpointError, FisherwalkWarning, InputError
from fisherwalk.persistence.tuningfile import save_tuning
from fisherwalk.prepare.start import start
from fisherwalk.workflow.sampling import walk

# A correlated Gaussian on a dict position (names a[0], a[1], b): the same source runs
# here and in the subprocesses.
MODEL = textwrap.dedent("""
    import jax.numpy as jnp

    PRECISION = jnp.array([[2.0, 0.6, 0.0], [0.6, 1.0, 0.3], [0.0, 0.3, 0.5]])
    MEAN = jnp.array([1.0, -2.0, 0.5])

    def logdensity(p):
        x = jnp.concatenate([p["a"], p["b"][None]]) - MEAN
        return -0.5 * x @ PRECISION @ x
""")
_namespace: dict = {}
exec(MODEL, _namespace)
logdensity = _namespace["logdensity"]

DRAWS, CHUNK = 300, 20
FIELDS = ("flat", "logdensity", "accepted", "acceptance_rate", "faults")

SCRIPT = textwrap.dedent("""
    import os, signal, sys
    import jax
    jax.config.update("jax_enable_x64", True)
    import numpy as np
    import fisherwalk
    from fisherwalk.persistence import checkpoint as ck, tuningfile as record
    from fisherwalk.workflow import sampling
    exec(open(sys.argv[1]).read())
    directory, mode, kill = sys.argv[2], sys.argv[3], sys.argv[4]
    what, n, *when = kill.split(":")
    n, count = int(n), [0]

    def counted(fn, after=False):
        def wrapper(*args, **kwargs):
            count[0] += 1
            if count[0] == n and not after:
                os.kill(os.getpid(), signal.SIGKILL)
            out = fn(*args, **kwargs)
            if count[0] == n and after:
                os.kill(os.getpid(), signal.SIGKILL)
            return out
        return wrapper

    if what == "replace":
        os.replace = counted(os.replace, after=when == ["after"])
    elif what == "fsync":
        os.fsync = counted(os.fsync)
    if mode == "walk":
        start = np.load(sys.argv[6])
        walker = record.walker_from_record(sys.argv[5], logdensity, start["position"],
                                           start["logdensity"])
        if what == "engine":
            walker = walker._replace(model=walker.model._replace(engine=counted(walker.engine)))
        sampling.walk(walker, jax.random.key(1), int(sys.argv[7]), chunk=int(sys.argv[8]),
                      checkpoint=directory, checkpoint_every=0)
    else:
        fisherwalk.resume(directory, logdensity, checkpoint_every=0)
    print("finished without being killed")
""")


@pytest.fixture(scope="module")
def run():
    """A walker, and an uninterrupted run of it with key 1 (the reference)."""
    walker = start(logdensity, {"a": jnp.zeros(2), "b": jnp.zeros(())}, jax.random.key(0))
    reference = walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK)
    return walker, reference


def _counting(walker):
    calls = []

    def engine(*args, **kwargs):
        calls.append(1)
        return walker.engine(*args, **kwargs)

    return walker._replace(model=walker.model._replace(engine=engine)), calls


def _same(trace, reference, upto=None):
    return all(np.array_equal(getattr(trace, f), getattr(reference, f)[:, :upto])
               for f in FIELDS)


def _state(directory: Path) -> dict:
    return json.loads((directory / "state.json").read_text())


def _files(directory: Path) -> dict:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(directory.iterdir())}


@pytest.mark.slow
def test_killed_runs_resume_bit_identically(run, tmp_path):
    walker, reference = run
    directory = tmp_path / "run.ckpt"
    (tmp_path / "model.py").write_text(MODEL)
    (tmp_path / "child.py").write_text(SCRIPT)
    save_tuning(walker, tmp_path / "walker.json")
    np.savez(tmp_path / "start.npz", position=np.asarray(walker.flat_positions()),
             logdensity=np.asarray(walker.states.logdensity))
    env = dict(os.environ, PYTHONPATH=str(Path(fisherwalk.__file__).parents[1]))

    def child(mode, kill):
        args = [sys.executable, str(tmp_path / "child.py"), str(tmp_path / "model.py"),
                str(directory), mode, kill, str(tmp_path / "walker.json"),
                str(tmp_path / "start.npz"), str(DRAWS), str(CHUNK)]
        done = subprocess.run(args, env=env, capture_output=True, text=True, timeout=300)
        assert done.returncode == -9, done.stdout + done.stderr  # killed where intended

    # 1. Killed inside the 6th engine call (chunks 1-5 saved, the 6th in flight).
    child("walk", "engine:6")
    assert (_state(directory)["done"], _state(directory)["segments"]) == (100, 5)
    # 2. Resumed, killed in the 2nd save just before the state file's rename: the new
    #    segment is in place but not counted, a temporary state file is left over.
    child("resume", "replace:4:before")
    assert (_state(directory)["done"], _state(directory)["segments"]) == (120, 6)
    names = {p.name for p in directory.iterdir()}
    assert "segment-000006.npz" in names and any(n.startswith(".state.json.") for n in names)
    # 3. Resumed, killed in the 2nd save while fsync-ing the new segment's temporary file
    #    (fsyncs: the lock file and the directory when the lock is taken, then per save:
    #    segment, directory, state, directory).
    child("resume", "fsync:7")
    assert (_state(directory)["done"], _state(directory)["segments"]) == (140, 7)
    assert any(p.name.startswith(".segment-000007.npz.") for p in directory.iterdir())

    # 4. Finished here, with the original walker: only the 8 missing chunks are run. The
    #    killed children left their lock file, but the kernel released their locks when
    #    they died: no flag is needed (each resume above took it the same way).
    counting, calls = _counting(walker)
    trace = walk(counting, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=directory,
                 checkpoint_every=0)
    assert len(calls) == (DRAWS - 140) // CHUNK
    assert trace.complete and _same(trace, reference)
    expected = {"run.json", "state.json"} | {f"segment-{i:06d}.npz" for i in range(15)}
    assert {p.name for p in directory.iterdir()} == expected  # leftovers tidied
    np.testing.assert_array_equal(np.asarray(trace.walker.states.logdensity),
                                  np.asarray(reference.walker.states.logdensity))

    # 5. A finished checkpoint returns its draws without a step, through walk() and resume().
    again = walk(counting, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=directory)
    assert len(calls) == (DRAWS - 140) // CHUNK and again.complete and _same(again, reference)
    resumed = fisherwalk.resume(directory, logdensity)
    assert resumed.complete and _same(resumed, reference)
    assert resumed.names == walker.names


def test_interrupt_without_checkpoint_returns_finished_draws(run):
    walker, reference = run
    calls = []

    def engine(*args, **kwargs):
        calls.append(1)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return walker.engine(*args, **kwargs)

    with pytest.warns(FisherwalkWarning, match="interrupted after 40 of 300"):
        trace = walk(walker._replace(model=walker.model._replace(engine=engine)),
                     jax.random.key(1), DRAWS, chunk=CHUNK)
    assert not trace.complete and trace.flat.shape[1] == 2 * CHUNK
    assert _same(trace, reference, upto=2 * CHUNK)


def test_interrupt_with_checkpoint_saves_then_propagates(run, tmp_path):
    walker, reference = run
    directory = tmp_path / "run.ckpt"
    calls = []

    def engine(*args, **kwargs):
        calls.append(1)
        if len(calls) == 4:
            raise KeyboardInterrupt
        return walker.engine(*args, **kwargs)

    with pytest.raises(KeyboardInterrupt), \
            pytest.warns(FisherwalkWarning, match="60 of 300 draws.*saved in the checkpoint"):
        # checkpoint_every far beyond the run: only the interrupt makes it save
        walk(walker._replace(model=walker.model._replace(engine=engine)), jax.random.key(1),
             DRAWS, chunk=CHUNK, checkpoint=directory, checkpoint_every=3600)
    assert not (directory / "writer.lock").exists()  # released on the way out
    assert (_state(directory)["done"], _state(directory)["segments"]) == (60, 1)
    trace = walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=directory,
                 checkpoint_every=3600)
    assert trace.complete and _same(trace, reference)
    assert _state(directory)["segments"] == 2  # the end of the run saved the rest at once


def test_each_draw_written_once(run, tmp_path, monkeypatch):
    """I/O proportional to the draws: every segment is renamed into place once, the
    state file grows by one SHA-256 digest (64 hex digits and punctuation) per segment,
    and the segments hold about the raw bytes of the draws.
    310 draws (not a multiple of the chunk) also checks the end of a run."""
    walker, reference = run
    directory = tmp_path / "run.ckpt"
    renames, real_replace = [], os.replace

    def replace(src, dst):
        renames.append((Path(dst).name, os.path.getsize(src)))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", replace)
    trace = walk(walker, jax.random.key(1), 310, chunk=CHUNK, checkpoint=directory,
                 checkpoint_every=0)
    monkeypatch.setattr(os, "replace", real_replace)
    assert _same(trace._replace(**{f: getattr(trace, f)[:, :DRAWS] for f in FIELDS}), reference)
    segments = [(n, size) for n, size in renames if n.startswith("segment-")]
    states = [size for n, size in renames if n == "state.json"]
    assert [n for n, _ in segments] == [f"segment-{i:06d}.npz" for i in range(16)]
    assert len(states) == 16
    assert all(size <= states[0] + 80 * i for i, size in enumerate(states))
    chains, dim = trace.flat.shape[0], trace.flat.shape[2]
    # float64 draws, 3 float64 series, 3 int32 series (faults, divergent, gradients)
    raw = 310 * chains * (8 * (dim + 3) + 12)
    assert raw < sum(size for _, size in segments) < 2 * raw
    counting, calls = _counting(walker)
    again = walk(counting, jax.random.key(1), 310, chunk=CHUNK, checkpoint=directory)
    assert not calls and again.complete and np.array_equal(again.flat, trace.flat)


@pytest.fixture(scope="module")
def finished(run, tmp_path_factory):
    walker, _ = run
    directory = tmp_path_factory.mktemp("finished") / "run.ckpt"
    walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=directory, checkpoint_every=0)
    return directory


def _damage_truncate(d):
    p = d / "segment-000003.npz"
    p.write_bytes(p.read_bytes()[: p.stat().st_size // 2])
    return "segment-000003.npz"


def _damage_flip(d):
    p = d / "segment-000004.npz"
    data = bytearray(p.read_bytes())
    data[200:260] = bytes(60)  # inside the first array's data: the zip CRC no longer matches
    p.write_bytes(bytes(data))
    return "segment-000004.npz"


def _damage_missing(d):
    (d / "segment-000005.npz").unlink()
    return "segment-000005.npz"


def _damage_state(d):
    (d / "state.json").write_bytes(b"\x00garbage{")
    return "state.json"


def _damage_run(d):
    p = d / "run.json"
    p.write_bytes(p.read_bytes()[:100])
    return "run.json"


@pytest.mark.parametrize("damage", [_damage_truncate, _damage_flip, _damage_missing,
                                    _damage_state, _damage_run])
def test_damaged_checkpoint_is_refused(run, finished, tmp_path, damage):
    walker, _ = run
    directory = tmp_path / "copy.ckpt"
    shutil.copytree(finished, directory)
    name = damage(directory)
    before = _files(directory)
    with pytest.raises(CheckpointError, match=name) as err:
        walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=directory)
    assert "what to do: delete the directory" in str(err.value)
    assert _files(directory) == before  # nothing rewritten


def _renamed_walker(walker):
    """The same numbers under other parameter names: x[0], x[1], y."""
    fit = walker.report.laplace
    mode = {"x": fit.mode["a"], "y": fit.mode["b"]}
    renamed = fit._replace(mode=mode, names=("x[0]", "x[1]", "y"))
    return start(lambda p: logdensity({"a": p["x"], "b": p["y"]}), mode, jax.random.key(0),
                 fit=renamed)


def _smaller_walker(walker):
    """A 2-parameter model (b fixed at its mean)."""
    fit = walker.report.laplace
    fisher = np.asarray(fit.fisher)[:2, :2]
    small = fit._replace(mode={"a": fit.mode["a"]}, mode_flat=fit.mode_flat[:2],
                         fisher=jnp.asarray(fisher),
                         cholesky=jnp.asarray(np.linalg.cholesky(fisher)),
                         names=("a[0]", "a[1]"))
    return start(lambda p: logdensity({"a": p["a"], "b": jnp.asarray(0.5)}), small.mode,
                 jax.random.key(0), fit=small)


def test_checkpoint_of_another_run_is_refused_and_kept(run, finished, tmp_path):
    walker, _ = run
    before = _files(finished)
    cases = [
        (_renamed_walker(walker), 1, DRAWS, "other parameters: the checkpoint has a"),
        (_smaller_walker(walker), 1, DRAWS, "dimension 3 in the checkpoint, 2 here"),
        (walker, 2, DRAWS, "another random key"),
        (walker, 1, 400, "draws=300 in the checkpoint, draws=400 here"),
    ]
    for other, seed, draws, message in cases:
        with pytest.raises(CheckpointError, match=message) as err:
            walk(other, jax.random.key(seed), draws, chunk=CHUNK, checkpoint=finished)
        assert "never overwritten" in str(err.value)
    assert "call walk() with draws=300" in str(err.value)
    assert _files(finished) == before

    a_file = tmp_path / "notes.txt"
    a_file.write_text("mine")
    with pytest.raises(CheckpointError, match="is a file"):
        walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=a_file)
    assert a_file.read_text() == "mine"
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "data.csv").write_text("1,2")
    with pytest.raises(CheckpointError, match="not a fisherwalk checkpoint"):
        walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=tmp_path / "other")
    assert sorted(os.listdir(tmp_path / "other")) == ["data.csv"]
    with pytest.raises(InputError, match="checkpoint_every"):
        walk(walker, jax.random.key(1), DRAWS, checkpoint=tmp_path / "new", checkpoint_every=-1)


def test_resume_refuses_another_log_density(finished, tmp_path):
    def wider(p):  # another model: every precision halved
        return 0.5 * logdensity(p)

    with pytest.raises(CheckpointError, match="not the one this checkpoint was written with"):
        fisherwalk.resume(finished, wider)
    with pytest.raises(CheckpointError, match="no run.json"):
        fisherwalk.resume(tmp_path, logdensity)
