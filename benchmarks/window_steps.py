"""How few window-adaptation steps suffice when started from the Laplace fit?

For each target: BlackJAX's window adaptation (``fisherwalk.prepare.draws_warmup``) with
``steps`` in STEPS, started (a) from fisherwalk's Laplace starts and metric H⁻¹, and
(b) as BlackJAX's default does, from the target's initial position (plus N(0, 0.1²)) and
the identity; then 1000 NUTS draws per chain (4 chains) with the learned metric and
step size (fisherwalk's NUTS engine). Printed side by side: the minimum bulk ESS per
gradient evaluation of the 1000 draws, the maximum R-hat, the step size and the warm-up's
gradient evaluations. No timing is asserted anywhere; this is a measurement.

    python benchmarks/window_steps.py [--targets a,b] [--steps 100,200,300,500,1000]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
if (HERE.parent / "src" / "fisherwalk").is_dir():
    sys.path.insert(0, str(HERE.parent / "src"))

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)  # a script: float64 as users are told

import hierarchical  # noqa: E402
import numpy as np  # noqa: E402
import targets as target_defs  # noqa: E402

import fisherwalk  # noqa: E402
from fisherwalk.engine.gradient import control  # noqa: E402
from fisherwalk.prepare.draws_warmup import window_warmup  # noqa: E402
from fisherwalk.prepare.metric_repair import fallback_walker_parts  # noqa: E402
from fisherwalk.results.diagnostics import ess_bulk, rhat  # noqa: E402

STEPS = (100, 200, 300, 500, 1000)
DRAWS = 1000
DEFAULT_TARGETS = ("eight-noncentred", "rilogit-noncentred-g50", "studentt-n20000-d10",
                   "logistic-n2000-d5")


def measure(target, steps: int, from_laplace: bool, key) -> dict:
    logdensity = target.make()
    walker = fisherwalk.start(logdensity, jax.numpy.asarray(target.initial), key,
                              sampler="nuts", progress=False)
    fit = walker.report.laplace
    if from_laplace and not fit.no_mode:
        starts = walker.flat_positions()
        shape = np.linalg.inv(np.asarray(fit.cholesky)).T
        metric, step = shape @ shape.T, walker.tuning.step_size
    else:
        starts = target.initial + 0.1 * np.asarray(
            jax.random.normal(jax.random.fold_in(key, 5), (4, target.dim)))
        metric, step = None, 1.0
    began = time.perf_counter()
    learned = window_warmup(logdensity, starts, jax.random.fold_in(key, 6), steps=steps,
                            inverse_mass_matrix=metric, step_size=step)
    warm_seconds = time.perf_counter() - began
    tuning, model, state = fallback_walker_parts(walker, learned)  # NUTS, the learned metric
    ctrl = control(tuning.step_size, dtype=np.float64)
    out = model.engine.run(jax.random.fold_in(key, 7), 0, state, ctrl, DRAWS)
    draws = np.swapaxes(np.asarray(out.position), 0, 1)
    gradients = int(np.asarray(out.gradients).sum())
    ess = float(np.min(ess_bulk(draws)))
    return {"target": target.name, "steps": steps, "start": "laplace" if from_laplace
            else "default", "ess_per_gradient": ess / gradients, "min_ess": ess,
            "max_rhat": float(np.max(rhat(draws))), "step_size": learned.step_size,
            "warmup_gradients": learned.gradients, "warmup_seconds": warm_seconds}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--targets", default=",".join(DEFAULT_TARGETS))
    parser.add_argument("--steps", default=",".join(map(str, STEPS)))
    args = parser.parse_args(argv)
    available = {**target_defs.all_targets(),
                 **{t.name: t for t in hierarchical.hierarchical_targets()}}
    steps = [int(s) for s in args.steps.split(",")]
    print("| target | steps | start | min ESS / gradient | min ESS | max R-hat | step size "
          "| warm-up gradients | warm-up s |")
    print("| --- | ---: | --- | ---: | ---: | ---: | ---: | ---: | ---: |")
    for name in args.targets.split(","):
        for k in steps:
            for from_laplace in (True, False):
                row = measure(available[name], k, from_laplace, jax.random.key(k))
                print(f"| {row['target']} | {row['steps']} | {row['start']} | "
                      f"{row['ess_per_gradient']:.2e} | {row['min_ess']:.0f} | "
                      f"{row['max_rhat']:.3f} | {row['step_size']:.3g} | "
                      f"{row['warmup_gradients']} | {row['warmup_seconds']:.1f} |", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
