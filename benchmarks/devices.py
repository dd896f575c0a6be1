"""Devices and processes: time per step and Laplace-fit time of a sharded log density.

    python benchmarks/devices.py              # n = 10^6 rows, d = 20 (a few minutes)
    python benchmarks/devices.py --quick      # n = 10^5, fewer draws (under a minute or two)

An invented logistic regression (fixed seed) is given to ``fisherwalk.sharded_logdensity``,
and the same script runs it in five layouts, each in fresh Python processes (host devices
exist only if XLA_FLAGS is set before jax is imported):

- one process with 1, 2 and 4 host devices (``--xla_force_host_platform_device_count``);
- two processes with one device each, joined by ``jax.distributed`` on a loopback port
  (gloo collectives), and, for reference, two processes with two devices each.

In every layout the rows are split over all devices and the 4 chains too. Measured per
layout: the Laplace fit (wall time of ``fisherwalk.laplace``, its compile and run parts),
the time per step of ``fisherwalk.walk`` (a second call, so compilation is excluded:
seconds / draws, 4 chains per step), one log-density evaluation, and one collective (a
``psum`` of a scalar across all devices, jitted, median of 50 calls). The medians go to
``benchmarks/devices.json`` and a table is printed; benchmarks/README.md ("Devices and
processes") reads them.
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
LAYOUTS = [(1, 1), (1, 2), (1, 4), (2, 1), (2, 2)]  # (processes, devices per process)


def _median_time(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def _worker(args) -> None:
    os.environ["XLA_FLAGS"] = f"--xla_force_host_platform_device_count={args.devices}"
    import jax

    jax.config.update("jax_enable_x64", True)
    if args.processes > 1:
        jax.config.update("jax_cpu_collectives_implementation", "gloo")
        jax.distributed.initialize(coordinator_address=f"127.0.0.1:{args.port}",
                                   num_processes=args.processes, process_id=args.process,
                                   initialization_timeout=120)
    import jax.numpy as jnp
    import numpy as np
    from jax.sharding import Mesh
    from jax.sharding import PartitionSpec as P

    import fisherwalk as fw
    from fisherwalk.base.shards import sharded_logdensity

    rng = np.random.default_rng(20261202)
    n, d = args.rows, 20
    x = rng.normal(size=(n, d)) / np.sqrt(d)
    beta = rng.normal(size=d)
    y = (rng.uniform(size=n) < 1.0 / (1.0 + np.exp(-x @ beta))).astype(float)

    def loglik(b, rows):
        eta = rows["x"] @ b
        return rows["y"] * eta - jnp.logaddexp(0.0, eta)

    def logprior(b):
        return -0.5 * jnp.sum(b**2)

    logdensity = sharded_logdensity(loglik, {"x": x, "y": y}, logprior)
    began = time.perf_counter()
    fit = fw.laplace(logdensity, np.zeros(d))
    fit_seconds = time.perf_counter() - began
    evaluate = jax.jit(logdensity)
    point = np.asarray(fit.mode_flat)
    evaluate(point).block_until_ready()
    eval_seconds = _median_time(lambda: evaluate(point).block_until_ready(), 10)
    mesh = Mesh(np.asarray(jax.devices()), ("rows",))
    summed = jax.jit(jax.shard_map(lambda v: jax.lax.psum(v, "rows"), mesh=mesh,
                                   in_specs=P(), out_specs=P()))
    one = np.float64(1.0)
    summed(one).block_until_ready()
    collective_seconds = _median_time(lambda: summed(one).block_until_ready(), 50)
    walker = fw.start(logdensity, np.zeros(d), jax.random.key(1), chains=4)
    fw.walk(walker, jax.random.key(2), draws=args.draws, chunk=args.draws)  # compiles
    trace = fw.walk(walker, jax.random.key(3), draws=args.draws, chunk=args.draws)
    step_seconds = trace.seconds / args.draws
    if jax.process_index() == 0:
        print(json.dumps({
            "processes": args.processes, "devices": len(jax.devices()), "rows": n, "dim": d,
            "laplace_seconds": fit_seconds, "laplace_compile": fit.seconds["compile"],
            "laplace_run": fit.seconds["run"], "step_seconds": step_seconds,
            "eval_seconds": eval_seconds, "collective_seconds": collective_seconds,
            "acceptance": float(trace.accepted.mean())}), flush=True)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _layout(processes: int, devices: int, rows: int, draws: int) -> dict:
    me = [sys.executable, str(Path(__file__).resolve()), "--worker", "--rows", str(rows),
          "--draws", str(draws), "--processes", str(processes), "--devices", str(devices),
          "--port", str(_free_port())]
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(HERE.parent / "src"), env.get("PYTHONPATH", "")])
    procs = [subprocess.Popen(me + ["--process", str(i)], env=env, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for i in range(processes)]
    outs = [p.communicate() for p in procs]
    if any(p.returncode for p in procs):
        raise RuntimeError("\n----\n".join(err[-3000:] for _, err in outs))
    return json.loads(outs[0][0].strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--worker", action="store_true")
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--rows", type=int, default=None)
    parser.add_argument("--draws", type=int, default=None)
    parser.add_argument("--processes", type=int, default=1)
    parser.add_argument("--devices", type=int, default=1)
    parser.add_argument("--process", type=int, default=0)
    parser.add_argument("--port", type=int, default=0)
    parser.add_argument("--out", default=str(HERE / "devices.json"))
    args = parser.parse_args()
    if args.worker:
        _worker(args)
        return
    rows = args.rows or (10**5 if args.quick else 10**6)
    draws = args.draws or (20 if args.quick else 50)
    results = []
    for processes, devices in LAYOUTS:
        result = _layout(processes, devices, rows, draws)
        results.append(result)
        print(f"{processes} process(es) x {devices} device(s): Laplace fit "
              f"{result['laplace_seconds']:.2f} s (run {result['laplace_run']:.2f} s), "
              f"step {1e3 * result['step_seconds']:.1f} ms, evaluation "
              f"{1e3 * result['eval_seconds']:.2f} ms, collective "
              f"{1e6 * result['collective_seconds']:.0f} us", flush=True)
    base = results[0]
    for r in results:
        r["step_ratio"] = base["step_seconds"] / r["step_seconds"]
        r["laplace_run_ratio"] = base["laplace_run"] / r["laplace_run"]
    record = {"rows": rows, "dim": 20, "chains": 4, "draws": draws, "cores": os.cpu_count(),
              "layouts": results}
    Path(args.out).write_text(json.dumps(record, indent=1))
    print("| processes | devices | Laplace fit s (run) | step ms | speed-up step | "
          "evaluation ms | collective us |")
    print("| --- | --- | --- | --- | --- | --- | --- |")
    for r in results:
        print(f"| {r['processes']} | {r['devices']} | {r['laplace_seconds']:.2f} "
              f"({r['laplace_run']:.2f}) | {1e3 * r['step_seconds']:.1f} | "
              f"{r['step_ratio']:.2f} | {1e3 * r['eval_seconds']:.2f} | "
              f"{1e6 * r['collective_seconds']:.0f} |")


if __name__ == "__main__":
    main()
