"""Where the time goes: each phase of start + refine + walk, its seconds and compilations.

For each target (default: the hierarchical ones, benchmarks/hierarchical.py) this runs
``start(sampler=...)``, ``refine`` and a planned ``walk`` once, in one process, and times
each phase by wrapping the functions that run it (the Laplace fit, the Laplace draws and
PSIS k̂, the label-switching probe, "auto"'s timing, the run without a mode, the warm-up's
phases, the metric repair by window adaptation, the switch to another sampler, each
round of the walk). XLA compilations are counted from JAX's own monitoring events (the
backend compilations inside each phase's time span, ``harness.CompileMonitor``). Nested
phases are listed under their parent; a phase's figures include its children's.

    python benchmarks/phases.py                               # every hierarchical target
    python benchmarks/phases.py --targets eight-centred --samplers auto,nuts

Printed, not asserted: a shared machine's timings are noise; the compilation counts are
not.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
SRC = os.path.join(os.path.dirname(HERE), "src")
if os.path.isdir(SRC):
    sys.path.insert(0, SRC)

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)

from harness import CompileMonitor  # noqa: E402
from hierarchical import HIERARCHICAL, hierarchical_targets  # noqa: E402

import fisherwalk  # noqa: E402

# (module, attribute, phase label): the functions whose calls make the phases
WRAPPED = (
    ("fisherwalk.prepare.start", "laplace", "start/laplace fit"),
    ("fisherwalk.prepare.start", "laplace_sample", "start/laplace draws + k̂"),
    ("fisherwalk.prepare.start", "probe_symmetry", "start/symmetry probe"),
    ("fisherwalk.prepare.start", "choose_sampler", "start/auto timing"),
    ("fisherwalk.prepare.start", "modeless_start", "start/no mode: window adaptation"),
    ("fisherwalk.prepare.start", "make_model", "start/make_model"),
    ("fisherwalk.prepare.start", "assemble", "start/assemble (engine, init)"),
    ("fisherwalk.prepare.warmup", "learn_metric", "refine/metric repair (window adaptation)"),
    ("fisherwalk.prepare.warmup", "fallback_walker_parts", "refine/switch to NUTS"),
    ("fisherwalk.workflow.sampling", "_trace", "walk/trace"),
)


class Phases:
    """Records (label, depth, seconds, compiles) for every wrapped call."""

    def __init__(self, monitor: CompileMonitor) -> None:
        self.monitor = monitor
        self.rows: list[tuple[str, int, float, int]] = []
        self.depth = 0

    @contextlib.contextmanager
    def phase(self, label: str):
        index = len(self.rows)
        self.rows.append((label, self.depth, 0.0, 0))
        self.depth += 1
        t0 = time.perf_counter()
        try:
            with self.monitor.window() as w:
                yield
        finally:
            self.depth -= 1
            self.rows[index] = (label, self.depth, time.perf_counter() - t0, w.compiles)

    def wrap(self, fn, label: str):
        def wrapped(*args, **kwargs):
            with self.phase(label):
                return fn(*args, **kwargs)
        return wrapped


@contextlib.contextmanager
def wrapped_phases(phases: Phases):
    import importlib

    from fisherwalk.samplers import registry
    from fisherwalk.workflow import plan

    saved = []
    for module_name, attr, label in WRAPPED:
        module = importlib.import_module(module_name)
        if hasattr(module, attr):
            saved.append((module, attr, getattr(module, attr)))
            setattr(module, attr, phases.wrap(getattr(module, attr), label))
    families = dict(registry._FAMILIES)
    for name, entry in families.items():
        registry._FAMILIES[name] = entry._replace(
            phase=phases.wrap(entry.phase, f"refine/{name} phase 1"),
            reshape=phases.wrap(entry.reshape, f"refine/{name} reshape"),
            settle=phases.wrap(entry.settle, f"refine/{name} settle"))
    verdict = plan.verdict
    rounds = {"n": 0, "t": time.perf_counter(), "span": len(phases.monitor.spans)}

    def counted_verdict(*args, **kwargs):  # the end of a round: its draws are in hand
        rounds["n"] += 1
        spans = phases.monitor.spans[rounds["span"]:]
        compiles = sum(1 for e, _, _ in spans if e.endswith("backend_compile_duration"))
        phases.rows.append((f"walk/round {rounds['n']} ({args[0].shape[1]} draws/chain)",
                            phases.depth, time.perf_counter() - rounds["t"], compiles))
        out = verdict(*args, **kwargs)
        rounds.update(t=time.perf_counter(), span=len(phases.monitor.spans))
        return out

    plan.verdict = counted_verdict
    try:
        yield rounds
    finally:
        plan.verdict = verdict
        registry._FAMILIES.clear()
        registry._FAMILIES.update(families)
        for module, attr, original in saved:
            setattr(module, attr, original)


def profile(target, sampler: str, monitor: CompileMonitor, seed: int = 0) -> list[tuple]:
    """One start + refine + planned walk of ``target``; the phase rows."""
    phases = Phases(monitor)
    logdensity = target.make()
    key = jax.random.key(seed)
    k_start, k_refine, k_walk = jax.random.split(key, 3)
    with wrapped_phases(phases) as rounds:
        with phases.phase("start"):
            walker = fisherwalk.start(logdensity, jax.numpy.asarray(target.initial), k_start,
                                      sampler=sampler, progress=False)
        with phases.phase("refine"):
            walker = fisherwalk.refine(walker, k_refine, progress=False)
        with phases.phase("walk (planned)"):
            rounds.update(t=time.perf_counter(), span=len(monitor.spans))
            trace = fisherwalk.walk(walker, k_walk, progress=False, max_seconds=300.0)
    length = trace.length
    notes = [n for n in trace.walker.report.notes if "auto" in n or "switch" in n]
    summary = (f"picked {trace.walker.tuning.sampler}; rounds {length.rounds}; stopped: "
               f"{length.stopped}; min ESS {length.min_ess:.0f}, max R-hat "
               f"{length.max_rhat:.3f}")
    return phases.rows, summary, notes


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--targets", default=",".join(HIERARCHICAL))
    parser.add_argument("--samplers", default="auto")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", default=None,
                        help="also write the tables to this markdown file (atomically)")
    args = parser.parse_args(argv)
    lines: list[str] = []

    def say(text: str) -> None:
        print(text)
        lines.append(text)
        sys.stdout.flush()
    monitor = CompileMonitor()
    targets = {t.name: t for t in hierarchical_targets()}
    for name in args.targets.split(","):
        for sampler in args.samplers.split(","):
            from fisherwalk.base import programs
            programs.forget()  # each profile compiles from scratch, as a new process would
            jax.clear_caches()
            t0 = time.perf_counter()
            with monitor.window() as whole:
                rows, summary, notes = profile(targets[name], sampler, monitor, args.seed)
            say(f"\n## {name}, sampler={sampler!r}: {time.perf_counter() - t0:.1f} s, "
                f"{whole.compiles} compilations ({whole.seconds:.1f} s compiling)\n")
            say(f"    {summary}")
            for note in notes:
                say(f"    note: {note[:300]}")
            say(f"    {'phase':<50} {'seconds':>8} {'compiles':>8}")
            for label, depth, seconds, compiles in rows:
                say(f"    {'  ' * depth + label:<50} {seconds:8.2f} {compiles:8d}")
    if args.out:
        import subprocess

        from fisherwalk.base.files import write_text_atomic
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True,
                                text=True, cwd=HERE).stdout.strip() or "unknown"
        load = os.getloadavg()[0]
        head = ["# Phases of start + refine + walk: seconds and XLA compilations", "",
                "Produced by the script, do not edit by hand. Command (from the repository "
                "root):", "", "    python benchmarks/phases.py " + " ".join(argv or sys.argv[1:]),
                "", f"Run {time.strftime('%Y-%m-%d %H:%M:%S UTC', time.gmtime())}, fisherwalk "
                f"at {commit}, load average {load:.1f} at the end (a shared 2-core machine: "
                "the seconds are noise, the compilation counts are not). Each target starts "
                "with no remembered program (`programs.forget()`, `jax.clear_caches()`).", ""]
        write_text_atomic(args.out, "\n".join(head + lines) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
