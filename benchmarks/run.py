"""fisherwalk against three other samplers, side by side, in one run on one machine.

Usage (from the repository root)::

    python benchmarks/run.py            # full mode: every target, 3 repeats (~30-40 min)
    python benchmarks/run.py --quick    # 1 repeat, smaller targets, short runs (minutes)
    python benchmarks/run.py --quick --targets gauss-d2 --out /tmp/bench

Writes ``results.json``, ``RESULTS.md`` and ``results.png`` into ``--out`` (default: this
folder). See README.md in this folder for what each column means.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
if (HERE.parent / "src" / "fisherwalk").is_dir():
    sys.path.insert(0, str(HERE.parent / "src"))

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)  # a script, not a library: float64 as users are told

import baselines  # noqa: E402
import harness  # noqa: E402
import hierarchical  # noqa: E402
import numpy as np  # noqa: E402
import targets as target_defs  # noqa: E402
import warmups  # noqa: E402

SEED = 20_241  # the fixed key of every run: jax.random.key(SEED), folded with target and repeat
GRADIENT = ("mala", "hmc", "nuts", "auto")  # start(sampler=...) beside the random walk
FISHERWALK = ("fisherwalk", *(f"fisherwalk-{s}" for s in GRADIENT), "fisherwalk-nuts-64")
SAMPLERS = (*FISHERWALK, "nuts", "pathfinder", "chees", "chees-64", "adaptive", "textbook")
# the default list: everything but the 64-chain runs, which are asked for by name
DEFAULT_SAMPLERS = tuple(s for s in SAMPLERS if not s.endswith("-64"))
RANDOM_WALKS = ("fisherwalk", "adaptive", "textbook")
CACHE_TARGET = "logistic-n10000-d10"
SHAPE_MAX_DIM = 50  # the random-walk shape experiments (issue 6) stop here: slow beyond


class Mode:
    """Budgets of one mode (seconds are wall time on the benchmark machine)."""

    def __init__(self, quick: bool):
        self.name = "quick" if quick else "full"
        self.repeats = 1 if quick else 3
        # the answer: give up after this much wall time (the textbook walk rarely gets there)
        self.answer_seconds = 60.0 if quick else 300.0
        self.textbook_answer_seconds = 10.0 if quick else 20.0
        # the long run: on to this minimum bulk ESS or this much sampling time
        self.long_ess = harness.ESS_GOAL if quick else 1000.0
        self.long_seconds = 0.0 if quick else 20.0
        # issue 6's shapes: repeat 0 only, at most this many draws per chain
        self.shape_draws = 20_000 if quick else 40_000

    def limits(self, sampler: str) -> harness.Limits:
        answer = self.textbook_answer_seconds if sampler == "textbook" else self.answer_seconds
        return harness.Limits(answer, self.long_ess, self.long_seconds)

    def reference_draws(self, dim: int) -> int:
        return (8000 + 200 * dim) if self.name == "quick" else (20_000 + 1000 * dim)


def make_sampler(which: str, target, monitor, shape: str = "fisher"):
    logdensity = target.make()  # a fresh closure: every run compiles afresh
    if which in FISHERWALK:
        parts = which.split("-")
        sampler = parts[1] if len(parts) > 1 else "rwm"
        chains = int(parts[2]) if len(parts) > 2 else 4
        return harness.FisherwalkSampler(logdensity, target.dim, monitor, shape=shape,
                                         chains=chains, sampler=sampler)
    if which in warmups.WARMUPS:
        return warmups.WARMUPS[which](logdensity, target.dim)
    return baselines.BASELINES[which](logdensity, target.dim)


def run_key(target_index: int, repeat: int):
    return jax.random.fold_in(jax.random.fold_in(jax.random.key(SEED), target_index), repeat)


def log(message: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {message}", flush=True)


# ----------------------------------------------------------------------------- runs


def run_target(index: int, target, mode: Mode, monitor, samplers) -> dict:
    out = {"target": target.name, "family": target.family, "dim": target.dim, "n": target.n,
           "note": target.note, "runs": [], "engine_seconds_per_step": [], "shapes": []}
    raw = [harness.raw_evaluation_seconds(target.make(), target.initial + 0.01)]
    out["raw_seconds"] = raw[0]
    out["chunk_noise_seconds"] = harness.chunk_noise_seconds_per_step(target.make(),
                                                                      target.initial + 0.01)
    log(f"{target.name}: raw vmapped log density {out['raw_seconds'] * 1e6:.1f} us; "
        f"a step with its noise drawn per chunk {out['chunk_noise_seconds'] * 1e6:.1f} us")
    capped = set()
    for repeat in range(mode.repeats):
        key = run_key(index, repeat)
        if repeat:  # the machine's load drifts: time the raw evaluation again, keep the median
            raw.append(harness.raw_evaluation_seconds(target.make(), target.initial + 0.01))
            out["raw_seconds"] = float(np.median(raw))
        out["raw_seconds_samples"] = list(raw)
        for which in samplers:
            if which in capped:
                continue
            sampler = make_sampler(which, target, monitor)
            jax.clear_caches()  # every run compiles everything, as a new process would
            result = harness.measure(sampler, target.initial, key, mode.limits(which), monitor)
            result["repeat"] = repeat
            out["runs"].append(result)
            if not result["answer_reached"]:
                capped.add(which)  # a run that hit its limit says all the repeats would
            log(_line(target.name, repeat, result))
            if which == "fisherwalk":
                out["engine_seconds_per_step"].append(
                    harness.engine_seconds_per_step(sampler.walker))
        if (target.family == "logistic" and "fisherwalk" in samplers and repeat == 0
                and target.dim <= SHAPE_MAX_DIM):
            fisher = [r for r in out["runs"] if r["sampler"] == "fisherwalk"][-1]
            for shape in ("diagonal", "identity"):
                sampler = make_sampler("fisherwalk", target, monitor, shape=shape)
                row = harness.fixed_run(sampler, target.initial, key,
                                        min(fisher["draws"], mode.shape_draws))
                row.update(shape=shape, repeat=repeat)
                out["shapes"].append(row)
                log(f"{target.name} r{repeat} shape {shape}: min ESS/step "
                    f"{row['ess_per_step']:.2e} (fisher {fisher['ess_per_step']:.2e}), "
                    f"predicted efficiency {row['info']['efficiency']:.3f}")
    return out


def _line(name: str, repeat: int, r: dict) -> str:
    answer = (f"{r['answer_seconds']:.1f}s" if r.get("answer_seconds") is not None
              else f">{r.get('answer_limit', 0):.0f}s")
    if not r["answer_reached"]:
        answer += " (estimated)" if r["answer_estimated"] else " (not reached)"
    return (f"{name} r{repeat} {r['sampler']}: answer {answer}; long run {r['draws']} draws, "
            f"min ESS {r['min_ess_bulk']:.0f}, {r['ess_per_second']:.1f} ESS/s, "
            f"R-hat {r['max_rhat']:.3f}, acceptance {r['acceptance']:.3f}, "
            f"compile {r['compile_seconds']:.1f}s")


def run_references(dims, mode: Mode, monitor, samplers) -> list[dict]:
    """Each random walk on N(0, I_d): its ESS per step in the Gaussian limit."""
    rows = []
    for dim in sorted(dims):
        target = target_defs.reference(dim)
        for which in samplers:
            if which not in RANDOM_WALKS:
                continue
            sampler = make_sampler(which, target, monitor)
            jax.clear_caches()
            row = harness.fixed_run(sampler, target.initial, run_key(1000 + dim, 0),
                                    mode.reference_draws(dim))
            row.update(dim=dim)
            rows.append(row)
            log(f"reference d={dim} {which}: median ESS/step {row['median_ess_per_step']:.2e}, "
                f"min {row['ess_per_step']:.2e}, acceptance {row['acceptance']:.3f}")
    return rows


# ----------------------------------------------------------------------------- cache probe


def probe_cache(cache_dir: str, sampler: str = "rwm") -> None:
    """Child process: start + refine + walk on the d = 10 target; print figures as JSON."""
    began = time.perf_counter()
    if cache_dir != "none":
        jax.config.update("jax_compilation_cache_dir", cache_dir)
        jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.0)
        jax.config.update("jax_persistent_cache_min_entry_size_bytes", -1)
    hits = []
    jax.monitoring.register_event_listener(
        lambda event, **_: hits.append(event) if event.endswith("cache_hits") else None)
    monitor = harness.CompileMonitor()
    from fisherwalk import refine, start, walk

    target = target_defs.all_targets()[CACHE_TARGET]
    logdensity = target.make()
    imported = time.perf_counter() - began
    t0 = time.perf_counter()
    with monitor.window() as compiled:
        walker = start(logdensity, jax.numpy.asarray(target.initial), jax.random.key(SEED),
                       sampler=sampler, progress=False)
        walker = refine(walker, jax.random.key(SEED + 1), progress=False)
        trace = walk(walker, jax.random.key(SEED + 2), draws=1000, progress=False)
    seconds = time.perf_counter() - t0
    print(json.dumps({"seconds": seconds, "compile_seconds": compiled.seconds, "sampler": sampler,
                      "compiles": compiled.compiles, "cache_hits": len(hits),
                      "import_seconds": imported, "draws": int(trace.flat.shape[1])}))


def run_cache_probes(samplers=()) -> dict:
    """Three fresh processes: no cache, cache enabled (cold), cache enabled (warm); and one
    more without the cache, with NUTS, when fisherwalk-nuts is among the samplers."""
    folder = tempfile.mkdtemp(prefix="fisherwalk-cache-")
    out = {"target": CACHE_TARGET}
    env = dict(os.environ)
    probes = [("off", "none", "rwm"), ("cold", folder, "rwm"), ("warm", folder, "rwm")]
    if "fisherwalk-nuts" in samplers:
        probes.append(("nuts-off", "none", "nuts"))
    try:
        for label, arg, sampler in probes:
            t0 = time.perf_counter()
            done = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--probe-cache",
                                   arg, "--probe-sampler", sampler],
                                  capture_output=True, text=True, env=env, check=False)
            wall = time.perf_counter() - t0
            if done.returncode != 0:
                out[label] = {"error": done.stderr.strip().splitlines()[-1:]}
                continue
            out[label] = json.loads(done.stdout.strip().splitlines()[-1])
            out[label]["process_seconds"] = wall
            log(f"cache {label}: start+refine+walk {out[label]['seconds']:.2f}s, compile "
                f"{out[label]['compile_seconds']:.2f}s, {out[label]['cache_hits']} cache hits")
        size = sum(p.stat().st_size for p in Path(folder).rglob("*") if p.is_file())
        out["cache_bytes"] = size
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return out


# ----------------------------------------------------------------------------- machine


def machine() -> dict:
    import blackjax
    import jaxlib
    import optax
    import scipy

    cpu = platform.processor() or ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    commit = ""
    try:
        root = HERE.parent
        commit = subprocess.run(["git", "-C", str(root), "rev-parse", "--short", "HEAD"],
                                capture_output=True, text=True, check=False).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(root), "status", "--porcelain", "src"],
                               capture_output=True, text=True, check=False).stdout.strip()
        commit += " (src/ has uncommitted changes)" if dirty else ""
    except OSError:
        pass
    return {
        "cpu": cpu, "cores": os.cpu_count(), "platform": platform.platform(),
        "python": platform.python_version(), "jax": jax.__version__,
        "jaxlib": jaxlib.__version__, "blackjax": blackjax.__version__,
        "numpy": np.__version__, "scipy": scipy.__version__, "optax": optax.__version__,
        "fisherwalk_commit": commit, "x64": bool(jax.config.jax_enable_x64),
        "load_average_start": list(os.getloadavg()),
    }


# ----------------------------------------------------------------------------- main


def parse(argv=None):
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true",
                        help="1 repeat, the smaller targets, runs stop at the answer")
    parser.add_argument("--targets", default=None,
                        help="comma-separated target names (default: all; --quick: the smaller)")
    parser.add_argument("--samplers", default=",".join(DEFAULT_SAMPLERS),
                        help=f"comma-separated subset of {','.join(SAMPLERS)} (default: all "
                             "but the 64-chain runs)")
    parser.add_argument("--repeats", type=int, default=None, help="override the repeats")
    parser.add_argument("--out", default=str(HERE), help="folder for RESULTS.md etc.")
    parser.add_argument("--no-cache-probe", action="store_true",
                        help="skip the persistent-compilation-cache subprocesses")
    parser.add_argument("--render", metavar="RESULTS_JSON", default=None,
                        help="only redo RESULTS.md and results.png from a results.json")
    parser.add_argument("--probe-cache", default=None, help=argparse.SUPPRESS)
    parser.add_argument("--probe-sampler", default="rwm", help=argparse.SUPPRESS)
    return parser.parse_args(argv)


def main(argv=None) -> int:
    args = parse(argv)
    if args.probe_cache is not None:
        probe_cache(args.probe_cache, args.probe_sampler)
        return 0
    if args.render is not None:
        write_outputs(json.loads(Path(args.render).read_text()), Path(args.out))
        return 0
    mode = Mode(args.quick)
    if args.repeats is not None:
        mode.repeats = max(1, args.repeats)
    available = {**target_defs.all_targets(),
                 **{t.name: t for t in hierarchical.hierarchical_targets()}}
    names = (args.targets.split(",") if args.targets
             else list(target_defs.QUICK if args.quick else available))
    unknown = [n for n in names if n not in available]
    if unknown:
        print(f"unknown targets {unknown}; choose from {', '.join(available)}", file=sys.stderr)
        return 2
    samplers = tuple(s for s in args.samplers.split(",") if s)
    if any(s not in SAMPLERS for s in samplers):
        print(f"unknown samplers in {samplers}; choose from {SAMPLERS}", file=sys.stderr)
        return 2
    command = "python benchmarks/run.py " + " ".join(sys.argv[1:] if argv is None else argv)
    began = time.perf_counter()
    monitor = harness.CompileMonitor()
    results = {"command": command.strip(), "mode": mode.name, "repeats": mode.repeats,
               "started": time.strftime("%Y-%m-%d %H:%M:%S %Z"), "machine": machine(),
               "limits": {"answer_seconds": mode.answer_seconds,
                          "textbook_answer_seconds": mode.textbook_answer_seconds,
                          "long_ess": mode.long_ess, "long_seconds": mode.long_seconds,
                          "shape_draws": mode.shape_draws,
                          "reference_draws": "8000 + 200 d" if args.quick else "20000 + 1000 d",
                          "warmup_steps": "2000 + 400 d (adaptive Metropolis warm-up and "
                                          "textbook burn-in)"},
               "samplers": list(samplers), "targets": []}
    order = list(available)
    for name in names:
        target = available[name]
        results["targets"].append(run_target(order.index(name), target, mode, monitor,
                                             samplers))
    dims = {available[n].dim for n in names}
    results["references"] = run_references(dims, mode, monitor, samplers)
    if not args.no_cache_probe and "fisherwalk" in samplers:
        results["cache"] = run_cache_probes(samplers)
    results["machine"]["load_average_end"] = list(os.getloadavg())
    results["seconds"] = time.perf_counter() - began
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "results.json").write_text(json.dumps(results, indent=1, default=_plain))
    write_outputs(results, out)
    log(f"done in {results['seconds'] / 60:.1f} min: {out / 'RESULTS.md'}")
    return 0


def write_outputs(results: dict, out: Path) -> None:
    import tables

    out.mkdir(parents=True, exist_ok=True)
    (out / "RESULTS.md").write_text(tables.render(results))
    tables.plot(results, out / "results.png")


def _plain(value):
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    return str(value)


if __name__ == "__main__":
    sys.exit(main())
