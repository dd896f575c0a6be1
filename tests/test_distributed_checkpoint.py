"""Two processes of a jax.distributed run given one checkpoint folder end, not hang
(issue 21, item 8).

One process takes the folder's lock; the other is refused. Before the fix the refused
process raised while the first waited for it in the sampling's collectives, and both
hung until killed. Now every process reports whether it opened its checkpoint (one
all-gather, fisherwalk.base.meshes.failed_processes): the refused one ends with the lock
refusal, the other ends naming it. Real processes (gloo CPU collectives, launched by
tests/processes.py); where this jaxlib lacks gloo, the agreement is simulated below.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import pytest
from processes import NO_GLOO, gloo_available, run_pair

import fisherwalk
from fisherwalk.errors import CheckpointError
from fisherwalk.persistence import checkpoint as checkpoint_module

TWO = """
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


@pytest.mark.slow
@pytest.mark.skipif(not gloo_available(), reason=NO_GLOO)
def test_two_processes_given_one_checkpoint_folder_both_end(tmp_path):
    folder = tmp_path / "run.ckpt"  # the mistake: one folder for both processes
    outs = run_pair(TWO, tmp_path, str(folder), timeout=240)  # a hang: "hung: ..."
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
