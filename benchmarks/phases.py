"""Where the time of one answer goes: start, refine and walk timed phase by phase, with
the XLA compilations of each phase counted from JAX's monitoring events.

    python benchmarks/phases.py [--targets eight-centred,rilogit-noncentred-g50]
                                [--sampler auto] [--seed 0]

Each target runs in this process, in turn, with the package's defaults (4 chains,
``walk()``'s planned length). The table prints, per phase, wall seconds, compilations and
their seconds; the last columns are what the run chose and how long it walked. It is a
profile, not a comparison: the side-by-side ratios are benchmarks/run.py's.
"""

from __future__ import annotations

import argparse
import time

import jax
import numpy as np

jax.config.update("jax_enable_x64", True)

import fisherwalk  # noqa: E402
from hierarchical import hierarchical_targets  # noqa: E402
from targets import all_targets  # noqa: E402

_BACKEND = "/jax/core/compile/backend_compile_duration"
_SPANS: list[float] = []


def _on_span(event, start_time, end_time, **_):
    if event == _BACKEND:
        _SPANS.append(end_time - start_time)


jax.monitoring.register_event_time_span_listener(_on_span)


class _Phase:
    def __init__(self, rows, name):
        self.rows, self.name = rows, name

    def __enter__(self):
        self.t0, self.c0 = time.perf_counter(), len(_SPANS)

    def __exit__(self, *exc):
        spans = _SPANS[self.c0:]
        self.rows.append((self.name, time.perf_counter() - self.t0, len(spans), sum(spans)))


def profile(target, sampler: str, seed: int) -> None:
    logdensity = target.make()
    keys = jax.random.split(jax.random.key(seed), 3)
    rows: list = []
    with _Phase(rows, "start"):
        walker = fisherwalk.start(logdensity, jax.numpy.asarray(target.initial), keys[0],
                                  sampler=sampler, progress=False)
    with _Phase(rows, "refine"):
        walker = fisherwalk.refine(walker, keys[1], progress=False)
    with _Phase(rows, "walk"):
        trace = fisherwalk.walk(walker, keys[2], progress=False)
    total = sum(r[1] for r in rows)
    print(f"\n{target.name} (d = {target.dim}), sampler={sampler!r} -> "
          f"{trace.facts.sampler}; "
          f"{trace.flat.shape[1]} draws/chain; {trace.length.line()}")
    print(f"{'phase':<8} {'wall s':>8} {'compiles':>9} {'compile s':>10}")
    for name, wall, count, seconds in rows:
        print(f"{name:<8} {wall:8.2f} {count:9d} {seconds:10.2f}")
    print(f"{'total':<8} {total:8.2f} {sum(r[2] for r in rows):9d} "
          f"{sum(r[3] for r in rows):10.2f}")
    summary = trace.summary()
    print(f"min bulk ESS {np.min(summary.ess_bulk):.0f}, min tail ESS "
          f"{np.min(summary.ess_tail):.0f}, max R-hat {summary.max_rhat:.4f}")
    for line in summary.warnings if hasattr(summary, "warnings") else ():
        print("  warning:", line)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--targets", default="eight-centred,eight-noncentred,"
                        "rilogit-noncentred-g50,studentt-n20000-d10")
    parser.add_argument("--sampler", default="auto")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    known = {**all_targets(), **{t.name: t for t in hierarchical_targets()}}
    for name in args.targets.split(","):
        profile(known[name], args.sampler, args.seed)


if __name__ == "__main__":
    main()
