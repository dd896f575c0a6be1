"""Two processes of a jax.distributed run given one checkpoint folder end, not hang
(issue 21, item 8).

One process takes the folder's lock; the other is refused. Before the fix the refused
process raised while the first waited for it in the sampling's collectives, and both
hung until killed. Now every process reports whether it opened its checkpoint (one
all-gather, fisherwalk.base.meshes.failed_processes): the refused one ends with the lock
refusal, the other ends naming it. Real processes (gloo CPU collectives, as in
tests/test_devices.py); where this jaxlib lacks gloo, the agreement is simulated below.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import jax
import jax.numpy as jnp
import pytest

import fisherwalk
from fisherwalk.errors import CheckpointError
from fisherwalk.persistence import checkpoint as checkpoint_module

ROOT = Path(__file__).resolve().parents[1]

TWO = """
import os, sys
os.environ["XLA_FLAGS"] = "--xla_force_host_platform_device_count=1"
import jax
jax.config.update("jax_enable_x64", True)
jax.config.update("jax_cpu_collectives_implementation", "gloo")
i = int(sys.argv[1])
jax.distributed.initialize(coordinator_address="127.0.0.1:" + sys.argv[2], num_processes=2,
                           process_id=i, initialization_timeout=60)
import jax.numpy as jnp
import fisherwalk
from fisherwalk.errors import CheckpointError
walker = fisherwalk.start(lambda x: -0.5 * jnp.sum(x**2), jnp.zeros(2), jax.random.key(0),
                          chains=2, progress=False)
if i == 1:  # the second process arrives when the first holds the folder's lock
    import time
    from fisherwalk.base.lock import read_lock
    while read_lock(os.path.join(sys.argv[3], "writer.lock")) is None:
        time.sleep(0.05)
try:
    fisherwalk.walk(walker, jax.random.key(1), 200, chunk=20, checkpoint=sys.argv[3],
                    progress=False)
    print("finished", flush=True)
except CheckpointError as err:
    print("refused:", " ".join(str(err).split()), flush=True)
"""


def _gloo_available() -> bool:
    try:
        from jax._src.lib import _jax  # the jaxlib build: does it carry gloo collectives?
    except ImportError:
        return False
    return hasattr(_jax, "make_gloo_tcp_collectives")


@pytest.mark.skipif(not _gloo_available(),
                    reason="this jaxlib has no gloo CPU collectives: no cross-process test")
def test_two_processes_given_one_checkpoint_folder_both_end(tmp_path):
    sys.path.insert(0, str(ROOT / "examples"))
    try:
        import two_processes
    finally:
        sys.path.remove(str(ROOT / "examples"))
    script = tmp_path / "two.py"
    script.write_text(TWO)
    port = str(two_processes.free_port())
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    folder = tmp_path / "run.ckpt"  # the mistake: one folder for both processes
    procs = [subprocess.Popen([sys.executable, str(script), str(i), port, str(folder)],
                              env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                              text=True) for i in (0, 1)]
    outs = []
    for p in procs:
        try:
            outs.append(p.communicate(timeout=240)[0])
        except subprocess.TimeoutExpired:  # the hang this test is about
            p.kill()
            outs.append("hung: " + p.communicate()[0])
    assert "in use by process" in outs[1], outs
    assert "Process(es) 1 of this jax.distributed run could not open" in outs[0], outs


def test_a_refused_process_tells_the_others_and_they_stop(tmp_path, monkeypatch):
    # The agreement simulated in one process: what each side reports, and that a process
    # told of another's refusal stops before its first step and lets its folder go.
    walker = fisherwalk.start(lambda x: -0.5 * jnp.sum(x**2), jnp.zeros(2),
                              jax.random.key(0), chains=2, progress=False)
    reported = []

    def other_refused(ok):
        reported.append(ok)
        return [] if not ok else [1]  # process 1 (the other) was refused

    monkeypatch.setattr(checkpoint_module, "failed_processes", other_refused)
    calls = []
    counting = walker._replace(model=walker.model._replace(
        engine=lambda *a, **k: calls.append(1) or walker.engine(*a, **k)))
    with pytest.raises(CheckpointError, match=r"Process\(es\) 1 .* stops too"):
        fisherwalk.walk(counting, jax.random.key(1), 40, chunk=20,
                        checkpoint=tmp_path / "run.ckpt", progress=False)
    assert reported == [True] and not calls
    assert not (tmp_path / "run.ckpt" / "writer.lock").exists()  # released

    # the refused side: its lock refusal is reported to the others, then raised
    reported.clear()
    from fisherwalk.base.lock import acquire_lock

    (tmp_path / "held").mkdir()
    with acquire_lock(tmp_path / "held"), pytest.raises(CheckpointError, match="in use"):
        fisherwalk.walk(walker, jax.random.key(1), 40, chunk=20, checkpoint=tmp_path / "held",
                        progress=False)
    assert reported == [False]
