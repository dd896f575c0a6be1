"""Compile once per model: start + refine + walk of one log density, first call against
second call in the same process, for each sampler. Prints compilations (XLA backend
compiles, from JAX's monitoring events) and wall seconds side by side, and their ratio.

    PYTHONPATH=src python benchmarks/compile_once.py [--samplers rwm nuts] [--dim 10]

The target is an invented logistic regression (fixed seed). The second call uses the same
function object and shapes, so fisherwalk's memo of programs (fisherwalk.base.programs)
hands it the first call's compiled programs; a new function object would compile again.
"""

from __future__ import annotations

import argparse
import time

import jax
import jax.numpy as jnp
import numpy as np
from harness import CompileMonitor

jax.config.update("jax_enable_x64", True)

import fisherwalk  # noqa: E402


def target(dim: int, rows: int = 2000, seed: int = 3):
    rng = np.random.default_rng(seed)
    x = jnp.asarray(rng.normal(size=(rows, dim)))
    beta = rng.normal(0.0, 0.5, dim)
    y = jnp.asarray((rng.random(rows) < 1 / (1 + np.exp(-(np.asarray(x) @ beta)))).astype(float))

    def logdensity(p):
        eta = x @ p["beta"]
        return jnp.sum(y * eta - jnp.logaddexp(0.0, eta)) - 0.5 * jnp.sum(p["beta"] ** 2)

    return logdensity, {"beta": jnp.zeros(dim)}


def one_call(monitor, logdensity, position, sampler: str, seed: int) -> dict:
    keys = jax.random.split(jax.random.key(seed), 3)
    out = {}
    for stage in ("start", "refine", "walk"):
        began = time.perf_counter()
        with monitor.window() as window:
            if stage == "start":
                walker = fisherwalk.start(logdensity, position, keys[0], sampler=sampler,
                                          progress=False)
            elif stage == "refine":
                walker = fisherwalk.refine(walker, keys[1], progress=False)
            else:
                fisherwalk.walk(walker, keys[2], 1000, progress=False)
        out[stage] = (window.compiles, time.perf_counter() - began)
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samplers", nargs="+", default=["rwm", "nuts"])
    parser.add_argument("--dim", type=int, default=10)
    args = parser.parse_args()
    monitor = CompileMonitor()
    print(f"logistic regression, d = {args.dim}, 2000 rows, 4 chains, walk of 1000 draws")
    print(f"{'sampler':<8}{'stage':<8}{'compiles 1st':>14}{'compiles 2nd':>14}"
          f"{'seconds 1st':>13}{'seconds 2nd':>13}{'1st / 2nd':>11}")
    for sampler in args.samplers:
        logdensity, position = target(args.dim)
        first = one_call(monitor, logdensity, position, sampler, 0)
        second = one_call(monitor, logdensity, position, sampler, 1)
        for stage in first:
            (c1, s1), (c2, s2) = first[stage], second[stage]
            print(f"{sampler:<8}{stage:<8}{c1:>14}{c2:>14}{s1:>13.2f}{s2:>13.2f}"
                  f"{s1 / max(s2, 1e-9):>11.1f}")


if __name__ == "__main__":
    main()
