"""Two processes on one machine through jax.distributed, checked against one process.

    python examples/two_processes.py            # launches everything, prints the check
    python examples/two_processes.py --rows 200000 --draws 400

The launcher starts three Python processes, each with one CPU device:

- the reference: one process, the plain log density (all rows summed in one place);
- two workers joined by ``jax.distributed.initialize`` on a loopback port: the data rows
  split over the two processes' devices (``fisherwalk.sharded_logdensity``), the chains
  split over them too (automatic: two devices visible, 4 chains), a Laplace fit, a
  warm-up, a walk interrupted after two chunks with a checkpoint per process, then
  ``fisherwalk.resume`` finishing it.

Then it compares: the Laplace mode and Fisher information, and the draws of the resumed
run against the reference's, to 1e-8 absolute (same random numbers per chain; the sums
differ only in their order, see README "Larger than one machine").

A worker runs on its own as (one command per process, ``--process`` 0 and 1):

    python examples/two_processes.py --worker --process 0 --port 12345 --out DIR

The data are invented (a logistic regression with fixed seeds).
"""

from __future__ import annotations

import argparse
import os
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

CHAINS = 4
CHUNK = 50


def _data(rows: int, dim: int = 3):
    import numpy as np

    rng = np.random.default_rng(20261202)
    x = rng.normal(size=(rows, dim))
    beta = np.linspace(-1.0, 1.0, dim)
    y = (rng.uniform(size=rows) < 1.0 / (1.0 + np.exp(-x @ beta))).astype(float)
    return {"x": x, "y": y}


def _worker(args) -> None:
    os.environ["XLA_FLAGS"] = "--xla_force_host_platform_device_count=1"
    import jax

    jax.config.update("jax_enable_x64", True)
    if not args.reference:
        # Cross-process collectives on CPU go through gloo; set by the script, before
        # jax.distributed starts (fisherwalk never changes JAX's configuration).
        jax.config.update("jax_cpu_collectives_implementation", "gloo")
        jax.distributed.initialize(coordinator_address=f"127.0.0.1:{args.port}",
                                   num_processes=2, process_id=args.process,
                                   initialization_timeout=60)
    import jax.numpy as jnp
    import numpy as np

    import fisherwalk as fw
    from fisherwalk.base.shards import sharded_logdensity

    data = _data(args.rows)

    def loglik(beta, rows):
        eta = rows["x"] @ beta
        return rows["y"] * eta - jnp.logaddexp(0.0, eta)

    def logprior(beta):
        return -0.5 * jnp.sum(beta**2) / 25.0

    if args.reference:
        def logdensity(beta):
            return jnp.sum(loglik(beta, data)) + logprior(beta)
        label = "reference"
    else:
        logdensity = sharded_logdensity(loglik, data, logprior)
        label = f"process{args.process}"
    out = Path(args.out)
    began = time.perf_counter()
    fit = fw.laplace(logdensity, np.zeros(3))
    fit_seconds = time.perf_counter() - began
    walker = fw.start(logdensity, np.zeros(3), jax.random.key(1), chains=CHAINS)
    walker = fw.refine(walker, jax.random.key(2), steps=200)
    calls = []

    def stopping_engine(*a, **k):  # every process stops at the same chunk
        calls.append(1)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return walker.engine(*a, **k)

    checkpoint = out / f"run-{label}.ckpt"  # one checkpoint folder per process
    try:
        fw.walk(walker._replace(model=walker.model._replace(engine=stopping_engine)),
                jax.random.key(3), draws=args.draws, chunk=CHUNK, checkpoint=checkpoint,
                checkpoint_every=3600)
    except KeyboardInterrupt:
        pass
    began = time.perf_counter()
    trace = fw.resume(checkpoint, logdensity)
    walk_seconds = time.perf_counter() - began
    if jax.process_index() == 0:  # process 0 writes what a summary or record needs
        np.savez(out / f"{label}.npz", draws=trace.flat, mode=np.asarray(fit.mode_flat),
                 fisher=np.asarray(fit.fisher), complete=trace.complete,
                 fit_seconds=fit_seconds, walk_seconds=walk_seconds,
                 devices=len(jax.devices()))
    print(f"{label}: devices {len(jax.devices())}, Laplace fit {fit_seconds:.2f} s, "
          f"resumed walk {walk_seconds:.2f} s, complete {trace.complete}", flush=True)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def launch(rows: int, draws: int, out: Path, timeout: float = 300.0) -> dict:
    """Run the reference and the two workers; return the largest differences."""
    import numpy as np

    me = [sys.executable, str(Path(__file__).resolve()), "--worker", "--rows", str(rows),
          "--draws", str(draws), "--out", str(out)]
    port = str(free_port())
    env = dict(os.environ)
    src = Path(__file__).resolve().parents[1] / "src"
    env["PYTHONPATH"] = os.pathsep.join([str(src), env.get("PYTHONPATH", "")])
    procs = [subprocess.Popen(me + ["--process", str(i), "--port", port], env=env,
                              stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
             for i in (0, 1)]
    reference = subprocess.run(me + ["--reference"], env=env, capture_output=True, text=True,
                               timeout=timeout)
    logs = [reference.stdout + reference.stderr]
    codes = [reference.returncode]
    for p in procs:
        try:
            text, _ = p.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            p.kill()  # our own child, by its handle
            text, _ = p.communicate()
        logs.append(text)
        codes.append(p.returncode)
    if any(codes):
        raise RuntimeError("a process failed:\n" + "\n----\n".join(
            log[-3000:] for log in logs))
    one = np.load(out / "reference.npz")
    two = np.load(out / "process0.npz")
    return {
        "draws": float(np.abs(one["draws"] - two["draws"]).max()),
        "mode": float(np.abs(one["mode"] - two["mode"]).max()),
        "fisher_relative": float(np.abs(one["fisher"] - two["fisher"]).max()
                                 / np.abs(one["fisher"]).max()),
        "complete": bool(two["complete"]) and bool(one["complete"]),
        "devices": int(two["devices"]),
        "shape": tuple(two["draws"].shape),
        "logs": logs,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--worker", action="store_true")
    parser.add_argument("--reference", action="store_true")
    parser.add_argument("--process", type=int, default=0)
    parser.add_argument("--port", type=int, default=0)
    parser.add_argument("--rows", type=int, default=3001)
    parser.add_argument("--draws", type=int, default=200)
    parser.add_argument("--out", default=None)
    args = parser.parse_args()
    if args.worker:
        _worker(args)
        return
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(args.out) if args.out else Path(tmp)
        result = launch(args.rows, args.draws, out)
    for log in result.pop("logs"):
        print(log.strip().splitlines()[-1])
    print(result)
    ok = result["draws"] <= 1e-8 and result["complete"] and result["devices"] == 2
    print("agree to 1e-8:" if ok else "DISAGREE:", result["draws"])
    sys.exit(0 if ok else 1)


if __name__ == "__main__":
    main()
