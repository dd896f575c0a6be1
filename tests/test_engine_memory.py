"""The engine makes its random numbers in bounded blocks: splitting a call changes no bit.

Issue 13: ``walk(draws=100, thin=4000)`` at d = 100 made the noise of all 400,000 steps
at once (5.4 GB). The engine now splits a call whose steps need more than
``engine.NOISE_BUDGET`` random numbers; these tests shrink the budget so that both kinds
of split (fewer kept draws per call; part of one kept draw's thin steps per call) happen
on a small run, and compare with the unsplit run bit for bit.
"""

import os
import subprocess
import sys
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk as fw
from fisherwalk.base import programs
from fisherwalk.engine import loop as engine


def _logdensity(x):
    return -0.5 * jnp.sum(x**2 * jnp.arange(1.0, 4.0))


def _walk(budget, monkeypatch, thin):
    monkeypatch.setattr(engine, "NOISE_BUDGET", budget)
    programs.forget()  # the engine reads the budget when it is built: build it anew
    walker = fw.start(_logdensity, jnp.zeros(3), jax.random.key(0), chains=2)
    return fw.walk(walker, jax.random.key(1), draws=7, thin=thin, chunk=7, progress=False)


@pytest.mark.slow
@pytest.mark.parametrize("budget", [
    2 * 4 * 5 * 2,  # two kept draws per call (chains 2 x (d + 1) = 8 numbers per step)
    2 * 4 * 2,      # one kept draw per call, two of its thin steps per call
    8 * 3,          # three thin steps per call: pieces of 3 and a remainder of 2
    1,              # one step per call
])
def test_split_calls_give_the_same_draws(budget, monkeypatch):
    whole = _walk(engine.NOISE_BUDGET, monkeypatch, thin=5)
    split = _walk(budget, monkeypatch, thin=5)
    for name in ("flat", "logdensity", "accepted", "acceptance_rate", "faults"):
        assert np.array_equal(getattr(whole, name), getattr(split, name)), name
    assert np.array_equal(np.asarray(whole.walker.state.position),
                          np.asarray(split.walker.state.position))


CHILD = """
import resource, sys
import jax
jax.config.update("jax_enable_x64", True)
import jax.numpy as jnp
import fisherwalk as fw
from fisherwalk.errors import InputError

walker = fw.start(lambda x: -0.5 * jnp.sum(x**2), jnp.zeros(100), jax.random.key(0), chains=4)
size = [int(l.split()[1]) * 1024 for l in open("/proc/self/status") if l.startswith("VmSize")][0]
limit = size + 2**30  # one GiB above what the process already maps
resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
try:
    fw.walk(walker, jax.random.key(1), draws=10**6, progress=False)
except InputError as err:
    print("REFUSED", str(err).splitlines()[0])
trace = fw.walk(walker, jax.random.key(1), draws=100, thin=4000, progress=False)
print("SHAPE", trace.flat.shape)
"""


@pytest.mark.slow
def test_memory_follows_the_kept_draws_under_an_address_space_limit(tmp_path):
    # Issue 13: walk(draws=100, thin=4000) at d = 100 peaked at 5.4 GB (the noise of all
    # 400,000 steps made at once). Under RLIMIT_AS one GiB above the child's footprint
    # after start(), it now runs; a request for 10**6 kept draws (3.2 GB of positions
    # alone) is refused before sampling, with the estimate.
    script = tmp_path / "child.py"
    script.write_text(CHILD)
    # MALLOC_ARENA_MAX: glibc reserves 64 MiB of address space per thread arena, and the
    # threads XLA starts lazily would otherwise eat the one GiB of headroom by reservation
    # alone (seen once in a full run: a 24 MiB allocation refused), not by use
    env = dict(os.environ, PYTHONPATH=str(Path(fw.__file__).parents[1]), MALLOC_ARENA_MAX="2")
    done = subprocess.run([sys.executable, str(script)], env=env, capture_output=True,
                          text=True, timeout=600)
    assert done.returncode == 0, done.stdout + done.stderr[-3000:]
    lines = done.stdout.splitlines()
    refused = [line for line in lines if line.startswith("REFUSED")]
    assert refused and "need about" in refused[0] and "can allocate about" in refused[0]
    assert "SHAPE (4, 100, 100)" in lines
