"""Two Python processes joined by ``jax.distributed``, for the tests that need them.

Used by tests/test_devices.py and tests/test_distributed_checkpoint.py (one launcher, one
preamble, one check of whether this jaxlib can run them). Each process has one CPU device
and talks to the other through gloo CPU collectives on a loopback port
(``examples/two_processes.free_port``); a script given to :func:`run_pair` starts after
:data:`JOIN`, with ``i`` its process id and ``sys.argv[3:]`` the caller's arguments.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path
from types import ModuleType

ROOT = Path(__file__).resolve().parents[1]

JOIN = """
import os, sys
os.environ["XLA_FLAGS"] = "--xla_force_host_platform_device_count=1"
import jax
jax.config.update("jax_enable_x64", True)
jax.config.update("jax_cpu_collectives_implementation", "gloo")
i = int(sys.argv[1])
jax.distributed.initialize(coordinator_address="127.0.0.1:" + sys.argv[2], num_processes=2,
                           process_id=i, initialization_timeout=60)
"""


def gloo_available() -> bool:
    """Whether this jaxlib build carries gloo CPU collectives (else no cross-process test)."""
    try:
        from jax._src.lib import _jax
    except ImportError:
        return False
    return hasattr(_jax, "make_gloo_tcp_collectives")


NO_GLOO = "this jaxlib has no gloo CPU collectives: no cross-process test"


def example() -> ModuleType:
    """examples/two_processes.py as a module (its launcher and free_port)."""
    sys.path.insert(0, str(ROOT / "examples"))
    try:
        import two_processes
    finally:
        sys.path.remove(str(ROOT / "examples"))
    return two_processes


def run_pair(script: str, folder: Path, *args: str, timeout: float = 240.0) -> list[str]:
    """Run ``JOIN + script`` as processes 0 and 1; return each one's stdout.

    A process still running after ``timeout`` seconds is killed and its output is
    returned prefixed with ``"hung: "`` (so a hang fails the caller's checks, not pytest).
    """
    path = folder / "pair.py"
    path.write_text(JOIN + script)
    port = str(example().free_port())
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    procs = [subprocess.Popen([sys.executable, str(path), str(i), port, *args], env=env,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for i in (0, 1)]
    outs = []
    for p in procs:
        try:
            outs.append(p.communicate(timeout=timeout)[0])
        except subprocess.TimeoutExpired:
            p.kill()
            outs.append("hung: " + p.communicate()[0])
    return outs
