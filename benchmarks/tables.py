"""RESULTS.md and results.png from the figures run.py collected (results.json)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

NAMES = {"fisherwalk": "fisherwalk", "nuts": "BlackJAX NUTS", "adaptive": "adaptive Metropolis",
         "textbook": "textbook RW", "fisherwalk-mala": "fisherwalk MALA",
         "fisherwalk-hmc": "fisherwalk HMC", "fisherwalk-nuts": "fisherwalk NUTS",
         "fisherwalk-auto": "fisherwalk auto", "fisherwalk-nuts-64": "fisherwalk NUTS 64 chains",
         "pathfinder": "BlackJAX NUTS (Pathfinder)", "chees": "BlackJAX ChEES-HMC",
         "chees-64": "BlackJAX ChEES-HMC 64 chains"}
ORDER = ("fisherwalk", "fisherwalk-mala", "fisherwalk-hmc", "fisherwalk-nuts", "fisherwalk-auto",
         "fisherwalk-nuts-64", "nuts", "pathfinder", "chees", "chees-64", "adaptive", "textbook")
FEW_MICROSECONDS = 1e-5  # "a few µs": raw evaluations under 10 µs
EXPENSIVE = 1e-4  # raw evaluations of 0.1 ms and more


def _median(values):
    values = [v for v in values if v is not None and np.isfinite(v)]
    return float(np.median(values)) if values else None


def _runs(target: dict, sampler: str) -> list[dict]:
    return [r for r in target["runs"] if r["sampler"] == sampler]


def _fmt(value, digits: int = 3) -> str:
    if value is None:
        return "–"
    if isinstance(value, str):
        return value
    if not np.isfinite(value):
        return "inf"
    if value == 0:
        return "0"
    magnitude = abs(value)
    if magnitude >= 1000 or magnitude < 1e-3:
        return f"{value:.{digits - 1}e}"
    return f"{value:.{max(digits - 1 - int(math.floor(math.log10(magnitude))), 0)}f}"


def answer(target: dict, sampler: str) -> tuple[float | None, str]:
    """Median time to answer and its cell text."""
    runs = _runs(target, sampler)
    if not runs:
        return None, "–"
    reached = [r["answer_seconds"] for r in runs if r["answer_reached"]]
    if len(reached) == len(runs):
        value = _median(reached)
        return value, _fmt(value)
    if reached:
        # a repeat that did not answer counts as infinitely long in the median
        value = float(np.median(reached + [math.inf] * (len(runs) - len(reached))))
        missed = f"{len(runs) - len(reached)} of {len(runs)} repeats not reached"
        if np.isfinite(value):
            return value, f"{_fmt(value)} ({missed})"
        return None, f"> {_fmt(max(reached))} ({missed})"
    estimated = [r["answer_seconds"] for r in runs if r.get("answer_estimated")]
    if estimated:
        value = _median(estimated)
        return None, f"~{_fmt(value)} (extrapolated)"
    run = runs[0]
    spent = run["prepare_seconds"] + run["sampling_seconds"]
    limit = run.get("answer_limit") or 0
    if spent >= limit:
        return None, f"> {limit:.0f} (not reached)"
    # stopped by a guard (memory of the kept draws, or the diagnostics' wall time)
    return None, (f"> {spent:.0f} (not reached in {run['draws']} draws/chain; "
                  f"{run.get('stop', 'memory or wall-time guard')})")


def answer_ratio(target: dict, a: str, b: str) -> float | None:
    """Median over repeats of answer(a) / answer(b), both reached in the same repeat."""
    ratios = []
    for ra in _runs(target, a):
        for rb in _runs(target, b):
            if ra["repeat"] != rb["repeat"]:
                continue
            if ra["answer_reached"] and rb["answer_reached"]:
                ratios.append(ra["answer_seconds"] / rb["answer_seconds"])
            elif rb["answer_reached"]:
                ratios.append(math.inf)  # a did not answer in this repeat, b did
            elif ra["answer_reached"]:
                ratios.append(0.0)
    if ratios:
        value = float(np.median(ratios))
        return value if np.isfinite(value) else None
    ra = [r for r in _runs(target, a) if r["answer_reached"]]
    rb = _runs(target, b)
    if ra and rb and not any(r["answer_reached"] for r in rb):
        return 0.0  # b never answered: a wins by more than any ratio we could quote
    return None


def reference(results: dict, sampler: str, dim: int) -> dict | None:
    for row in results.get("references", []):
        if row["sampler"] == sampler and row["dim"] == dim:
            return row
    return None


def limit_ratio(results: dict, target: dict, sampler: str, key: str) -> float | None:
    ref = reference(results, sampler, target["dim"])
    if ref is None or not ref[key]:
        return None
    return _median([r[key] / ref[key] for r in _runs(target, sampler)])


def limit_spread(results: dict, target: dict, sampler: str, key: str) -> str:
    """" (range a-b over repeats)" when there is more than one repeat."""
    ref = reference(results, sampler, target["dim"])
    values = [r[key] / ref[key] for r in _runs(target, sampler)] if ref and ref[key] else []
    if len(values) < 2:
        return ""
    return f" (repeats {_fmt(min(values))}-{_fmt(max(values))})"


def step_ratio(target: dict, sampler: str) -> float | None:
    return _median([r["seconds_per_step"] / target["raw_seconds"] for r in _runs(target, sampler)])


def _table(header: list[str], rows: list[list[str]]) -> str:
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(row) + " |" for row in rows]
    return "\n".join(lines)


# the helpers other table modules (gradient_tables.py) use, under public names
fmt, median_of, runs_of, markdown_table = _fmt, _median, _runs, _table


# ----------------------------------------------------------------------------- goals


def goals(results: dict) -> list[tuple[str, str, str]]:
    """(goal, measured, verdict and what would close the gap)."""
    targets = results["targets"]
    samplers = results["samplers"]
    out = []
    if "fisherwalk" not in samplers:
        return out
    logistic = [t for t in targets if t["family"] == "logistic"]
    # 1. ESS per step against the Gaussian-target limit
    if logistic:
        ratios = {t["target"]: limit_ratio(results, t, "fisherwalk", "median_ess_per_step")
                  for t in logistic}
        mins = {t["target"]: limit_ratio(results, t, "fisherwalk", "ess_per_step")
                for t in logistic}
        spread = {t["target"]: limit_spread(results, t, "fisherwalk", "median_ess_per_step")
                  for t in logistic}
        measured = "; ".join(f"{k}: {_fmt(v)}{spread[k]} (min-ESS basis {_fmt(mins[k])})"
                             for k, v in ratios.items())
        known = [v for v in ratios.values() if v is not None]
        met = bool(known) and all(v >= 0.95 for v in known)
        worst = min(known) if known else None
        verdict = ("met" if met else
                   f"not met (worst {_fmt(worst)}): the Monte Carlo error of an ESS ratio from "
                   "runs of this length is several per cent (see §3), so a ratio a few per "
                   "cent under 0.95 is within noise; a real shortfall would come from the "
                   "posterior's departure from its Laplace approximation (skewness at small "
                   "n) or from the warm-up's scale; longer runs (more repeats) would settle it")
        out.append(("fisherwalk's ESS per step ≥ 0.95 × its Gaussian-target limit on every "
                    "logistic-regression target (median over parameters of bulk ESS)",
                    measured, verdict))
    # 2. time per step against a raw vmapped evaluation
    expensive, cheap = [], []
    for t in targets:
        ratio = step_ratio(t, "fisherwalk")
        if ratio is None:
            continue
        if t["raw_seconds"] >= EXPENSIVE:
            expensive.append((t, ratio))
        elif t["raw_seconds"] < FEW_MICROSECONDS:
            cheap.append((t, ratio))
    for group, bound, label in ((expensive, 1.2, "≥ 0.1 ms"), (cheap, 2.0, "a few µs")):
        if not group:
            continue
        measured = "; ".join(f"{t['target']} ({_fmt(t['raw_seconds'] * 1e6)} µs): {_fmt(r)}×"
                             for t, r in group)
        met = all(r <= bound for _, r in group)
        detail = "; ".join(
            f"{t['target']}: engine alone "
            f"{_fmt(_median([e / t['raw_seconds'] for e in t['engine_seconds_per_step'] if e]))}×, "
            f"the baselines' Metropolis steps {_fmt(step_ratio(t, 'adaptive'))}× (adaptive) "
            f"and {_fmt(step_ratio(t, 'textbook'))}× (textbook)" for t, _ in group)
        near = all(r <= bound * 1.1 for _, r in group)
        verdict = "met" if met else (
            f"not met{' (within 10 %: the timing noise on this shared machine)' if near else ''}"
            f". {detail}. The gap between walk() and its engine is walk()'s host work "
            "between chunks of 100 draws; the gap between the engine and a raw evaluation "
            "is the Metropolis step's own work (random numbers, the d x d proposal product, "
            "the acceptance test) and the compiled loop's cost per iteration, which the "
            "baselines pay too. For densities costing about a microsecond that work is "
            "several microseconds per step whoever does it (the side experiment of §3, last "
            "column, is a lean step with its noise drawn per chunk): a bound of 2x is out of "
            "reach of any one-step-per-iteration Metropolis loop on this machine")
        out.append((f"time per step ≤ {bound}× a raw vmapped log-density evaluation when it "
                    f"costs {label}", measured, verdict))
    # 3. time to answer against NUTS and adaptive Metropolis
    for other, bound, dmin in (("nuts", 1 / 3, 0), ("adaptive", 1 / 5, 10)):
        if other not in samplers:
            continue
        rows = [(t, answer_ratio(t, "fisherwalk", other)) for t in targets
                if t["dim"] >= dmin and t["dim"] <= 50]
        rows = [(t, r) for t, r in rows if r is not None]
        if not rows:
            continue
        measured = "; ".join(f"{t['target']}: {_fmt(r)}" for t, r in rows)
        losing = [t["target"] for t, r in rows if r > bound]
        verdict = "met" if not losing else (
            f"not met on {', '.join(losing)}. " + _answer_reason(results, other, rows))
        where = "every d ≤ 50" if dmin == 0 else f"d ≥ {dmin}"
        out.append((f"fisherwalk's time to answer ≤ 1/{round(1 / bound)} of {NAMES[other]}'s "
                    f"at {where} (ratio fisherwalk / {NAMES[other]}, median over repeats)",
                    measured, verdict))
    # 4. compile time on the d = 10 target, and the persistent cache
    d10 = [t for t in targets if t["target"] == "logistic-n10000-d10"]
    if d10:
        runs = _runs(d10[0], "fisherwalk")
        total = _median([r["prepare_compile_seconds"] + _walk_compile_to_answer(r)
                         for r in runs])
        count = _median([r["prepare_compiles"] + r["sampling_compiles"] for r in runs])
        cache = results.get("cache") or {}
        fresh = cache.get("off", {}).get("compile_seconds")
        judged = fresh if fresh is not None else total
        verdict = ("met" if judged is not None and judged <= 2.0 else "not met") + (
            " in a fresh process (§6)" if fresh is not None else "") + (
            f"; inside the benchmark process, under the machine's load at that moment, the "
            f"median was {_fmt(total)} s" if total is not None and fresh is not None else "") + (
            ". Most of it is the Laplace search (L-BFGS, Hessian and Newton polish in one "
            "jitted function: see §4, column \"Laplace compile\"), then the warm-up/"
            "sampling loop; the data arrays closed over by the log density are compiled in "
            "as constants")
        measured = f"{_fmt(total)} s in {count:.0f} compilations in the benchmark process"
        if fresh is not None:
            measured += (f"; {_fmt(fresh)} s in a fresh process (§6, "
                         f"{cache['off']['compiles']} compilations)")
        out.append(("total compile time of start + refine + walk ≤ 2 s on the d = 10 target",
                    measured, verdict))
    cache = results.get("cache")
    if cache and all(isinstance(cache.get(k), dict) and "seconds" in cache[k]
                     for k in ("off", "warm")):
        off, warm = cache["off"], cache["warm"]
        saved = off["seconds"] - warm["seconds"]
        out.append((
            "a second run in a new process reuses compiled code through JAX's persistent "
            "compilation cache (opt-in)",
            f"start + refine + walk: {off['seconds']:.2f} s without the cache, "
            f"{warm['seconds']:.2f} s with a warm cache ({warm['cache_hits']} hits; compile "
            f"{off['compile_seconds']:.2f} → {warm['compile_seconds']:.2f} s)",
            f"{'met' if saved > 0 and warm['cache_hits'] > 0 else 'not met'}: saves "
            f"{saved:.2f} s; what remains is tracing and lowering, which the cache does not "
            "skip, and the run itself"))
    return out


def _span(values) -> str:
    values = [v for v in values if v is not None and np.isfinite(v)]
    if not values:
        return "–"
    return f"{_fmt(min(values))}-{_fmt(max(values))}"


def _answer_reason(results: dict, other: str, rows) -> str:
    """Why fisherwalk's time to answer is not far below the other sampler's, from the data."""
    small = [(t, r) for t, r in rows if t["dim"] < 25]
    large = [(t, r) for t, r in rows if t["dim"] >= 25]
    fw_compile = _span([r["compile_seconds"] for t, _ in small
                        for r in _runs(t, "fisherwalk")])
    ot_compile = _span([r["compile_seconds"] for t, _ in small for r in _runs(t, other)])
    text = ""
    if small:
        text += (f"At d < 25 compilation is a large part of both answers (fisherwalk "
                 f"{fw_compile} s, {NAMES[other]} {ot_compile} s, §2) and the ratio is "
                 f"{_span([r for _, r in small])}. ")
    if other == "nuts" and large:
        text += (f"At d ≥ 25 sampling dominates: the random walk's ESS per step falls like "
                 f"1/d (§3) while NUTS's does not, and the ratio is "
                 f"{_span([r for _, r in large])}. ")
        text += ("Closing the gap would take less compilation at small d (the Laplace "
                 "search is most of it, §4); at d = 50 no random walk closes it (see the "
                 "crossovers above)")
    if other == "adaptive":
        text += ("Once adapted, adaptive Metropolis is the same random walk with the same "
                 "ESS per step (§3), it compiles about as little, and it started from the "
                 "same point; fisherwalk's lead is its shorter set-up (Laplace fit and 400 "
                 "warm-up steps against 2000 + 400 d), worth a factor 5 only where the "
                 "covariance adaptation is slow (gauss-d50: adaptive Metropolis never "
                 "answered)")
    return text


def _walk_compile_to_answer(run: dict) -> float:
    return run["sampling_compile_seconds"]


def _crossing(points: list[tuple[int, float]], better_above: bool) -> str:
    """Where a fisherwalk/other ratio crosses 1 (log-log interpolation between d's)."""
    wins = [(d, (r > 1) == better_above) for d, r in points]
    if all(w for _, w in wins):
        return "fisherwalk ahead at every d measured"
    if not any(w for _, w in wins):
        return "fisherwalk behind at every d measured"
    for (d0, r0), (d1, r1) in zip(points, points[1:], strict=False):
        if (r0 > 1) != (r1 > 1) and r0 > 0 and r1 > 0:
            t = math.log(r0) / (math.log(r0) - math.log(r1))
            cross = math.exp(math.log(d0) + t * (math.log(d1) - math.log(d0)))
            lead = "ahead" if (r0 > 1) == better_above else "behind"
            return (f"fisherwalk {lead} below d ≈ {cross:.0f} and "
                    f"{'behind' if lead == 'ahead' else 'ahead'} above (interpolated)")
    losing = [str(d) for d, w in wins if not w]
    return f"fisherwalk behind at d = {', '.join(losing)}"


def crossovers(results: dict) -> list[str]:
    """Plain statements of where fisherwalk loses, by family and figure."""
    lines = []
    for family in ("logistic", "gauss"):
        ts = sorted([t for t in results["targets"] if t["family"] == family],
                    key=lambda t: t["dim"])
        if not ts:
            continue
        for other in ("nuts", "adaptive"):
            if other not in results["samplers"] or "fisherwalk" not in results["samplers"]:
                continue
            for label, key in (("long-run ESS per second", "ess_per_second"),
                               ("ESS per evaluation", "ess_per_evaluation")):
                points = []
                for t in ts:
                    fw = _median([r[key] for r in _runs(t, "fisherwalk")])
                    ot = _median([r[key] for r in _runs(t, other)])
                    if fw is not None and ot:
                        points.append((t["dim"], fw / ot))
                if points:
                    text = ", ".join(f"d={d}: {_fmt(r)}" for d, r in points)
                    lines.append(f"- {family}, {label}, fisherwalk / {NAMES[other]}: {text}; "
                                 f"{_crossing(points, better_above=True)}.")
            points = [(t["dim"], answer_ratio(t, "fisherwalk", other)) for t in ts]
            points = [(d, r) for d, r in points if r is not None]
            if points:
                text = ", ".join(f"d={d}: {_fmt(r)}" for d, r in points)
                lines.append(f"- {family}, time to answer, fisherwalk / {NAMES[other]}: {text}; "
                             f"{_crossing(points, better_above=False)}.")
    return lines


# ----------------------------------------------------------------------------- render


def render(results: dict) -> str:
    m = results["machine"]
    targets = results["targets"]
    samplers = [s for s in ORDER if s in results["samplers"]]
    parts = [
        "# Benchmarks: fisherwalk and other samplers, side by side",
        "",
        "Produced by the script, do not edit by hand. Command (from the repository root):",
        "",
        f"    {results['command']}",
        "",
        f"Run {results['started']}, {results['mode']} mode, {results['repeats']} repeat(s), "
        f"{results['seconds'] / 60:.1f} min in all.",
        f"Machine: {m['cpu']}, {m['cores']} cores, {m['platform']}; load average "
        f"{m['load_average_start'][0]:.1f} at the start and {m['load_average_end'][0]:.1f} at "
        "the end (a shared machine: read the medians and the ratios, not single timings).",
        f"Libraries: Python {m['python']}, jax {m['jax']} / jaxlib {m['jaxlib']}, blackjax "
        f"{m['blackjax']}, numpy {m['numpy']}, scipy {m['scipy']}, optax {m['optax']}; "
        f"fisherwalk at {m['fisherwalk_commit'] or 'an unknown commit'}; float64 "
        f"({'on' if m['x64'] else 'OFF'}).",
        "",
        "Every sampler runs 4 chains vmapped, on the same targets with the same keys. "
        "fisherwalk: `start` + `refine` + `walk` with their defaults, from the target's "
        "initial position. The baselines start from that position plus N(0, 0.1²) noise per "
        "chain: BlackJAX NUTS after `blackjax.window_adaptation(blackjax.nuts, logdensity)` "
        "(defaults: 1000 steps, diagonal mass matrix, one adaptation per chain); adaptive "
        "Metropolis (Haario, Saksman & Tamminen 2001) with a warm-up of "
        f"{results['limits']['warmup_steps']} steps whose draws are discarded, adapting "
        "throughout as in the paper (factor refreshed every 10 steps); the textbook random "
        "walk (identity proposal, scale 2.38/√d) after a burn-in of the same length. "
        f"Limits: an answer is given up after {results['limits']['answer_seconds']:.0f} s "
        f"({results['limits']['textbook_answer_seconds']:.0f} s for the textbook walk); a "
        "sampler that does not answer on a target is not repeated there; long runs stop at "
        "min bulk ESS "
        f"{results['limits']['long_ess']:.0f} or {results['limits']['long_seconds']:.0f} s "
        "of sampling. Definitions of every column: benchmarks/README.md.",
        "",
        "## Goals",
        "",
    ]
    import gradient_tables

    rows = [[g, meas, verdict] for g, meas, verdict in goals(results)]
    rows += [[g, meas, verdict] for g, meas, verdict in gradient_tables.goals(results)]
    parts += [_table(["goal", "measured", "verdict"], rows), ""]
    cross = crossovers(results)
    if cross:
        parts += ["## Where fisherwalk loses", "",
                  "Ratios > 1 favour fisherwalk for rates (ESS per second, per evaluation); "
                  "ratios < 1 favour it for times.", ""] + cross + [""]

    # 1. time to answer
    header = ["target", "d", "n"] + [NAMES[s] + " (s)" for s in samplers]
    others = [s for s in ("nuts", "adaptive") if s in samplers]
    if "fisherwalk" in samplers:
        header += [f"fisherwalk / {NAMES[s]}" for s in others]
    rows = []
    for t in targets:
        row = [t["target"], str(t["dim"]), str(t["n"] or "–")]
        row += [answer(t, s)[1] for s in samplers]
        if "fisherwalk" in samplers:
            row += [_fmt(answer_ratio(t, "fisherwalk", s)) for s in others]
        rows.append(row)
    parts += ["## 1. Time to answer", "",
              "Wall time, everything included (compilation, mode, Hessian, warm-up, "
              "sampling), until every parameter has bulk ESS ≥ 400 and R-hat < 1.01; median "
              "over repeats; located to within one compiled chunk by bisection inside the "
              "last round (the diagnostics are off the clock). Ratios are taken repeat by "
              "repeat, then the median; 0 means the other sampler never answered.", "",
              _table(header, rows), ""]

    # 2. long runs
    header = ["target", "sampler", "ESS/s", "ESS/eval", "evals before 1st draw",
              "evals to answer", "compile (s)", "compiles", "max R-hat", "R-hat 1st round",
              "acceptance", "draws/chain", "min bulk ESS", "min tail ESS"]
    rows = []
    for t in targets:
        for s in samplers:
            runs = _runs(t, s)
            if not runs:
                continue
            rows.append([
                t["target"], NAMES[s],
                _fmt(_median([r["ess_per_second"] for r in runs])),
                _fmt(_median([r["ess_per_evaluation"] for r in runs])),
                _fmt(_median([r["evaluations_before"] for r in runs])),
                _fmt(_median([r.get("answer_evaluations") for r in runs])),
                _fmt(_median([r["compile_seconds"] for r in runs])),
                _fmt(_median([r["prepare_compiles"] + r["sampling_compiles"] for r in runs])),
                _fmt(_median([r["max_rhat"] for r in runs]), 4),
                _fmt(_median([r["rhat_first_round"] for r in runs]), 4),
                _fmt(_median([r["acceptance"] for r in runs])),
                _fmt(_median([r["draws"] for r in runs])),
                _fmt(_median([r["min_ess_bulk"] for r in runs])),
                _fmt(_median([r["min_ess_tail"] for r in runs])),
            ])
    parts += ["## 2. Long runs", "",
              "ESS is the minimum over parameters of the bulk ESS of the whole sampling "
              "phase; ESS/s divides by the sampling wall time without its compilation; "
              "ESS/eval by the log-density or gradient evaluations of the sampling phase "
              "(all chains; NUTS: integration steps). Medians over repeats.", "",
              _table(header, rows), ""]

    # 3. random walks against their limits
    header = ["target", "raw eval (µs)", "sampler", "ESS/step", "limit ESS/step",
              "ratio to limit", "ratio (min-ESS basis)", "µs/step", "× raw eval",
              "fisherwalk engine alone × raw eval", "chunk-noise step × raw eval"]
    rows = []
    for t in targets:
        for s in ("fisherwalk", "adaptive", "textbook"):
            runs = _runs(t, s)
            ref = reference(results, s, t["dim"])
            if not runs:
                continue
            engine = (_median([e / t["raw_seconds"] for e in t["engine_seconds_per_step"] if e])
                      if s == "fisherwalk" else None)
            rows.append([
                t["target"], _fmt(t["raw_seconds"] * 1e6), NAMES[s],
                _fmt(_median([r["median_ess_per_step"] for r in runs])),
                _fmt(ref["median_ess_per_step"] if ref else None),
                _fmt(limit_ratio(results, t, s, "median_ess_per_step")),
                _fmt(limit_ratio(results, t, s, "ess_per_step")),
                _fmt(_median([r["seconds_per_step"] * 1e6 for r in runs])),
                _fmt(step_ratio(t, s)),
                _fmt(engine),
                _fmt(t["chunk_noise_seconds"] / t["raw_seconds"]
                     if s == "fisherwalk" and t.get("chunk_noise_seconds") else None),
            ])
    parts += ["## 3. Random walks against their limits", "",
              "ESS/step: median over parameters of bulk ESS, per step of one chain, over the "
              "long run. The limit is the same sampler, same settings, on N(0, I_d) (an "
              "exactly Gaussian target of the same d). µs/step: sampling wall time per step "
              "of all 4 chains (compilation excluded); the raw evaluation is a vmapped "
              "(4 chains) log-density evaluation inside a compiled loop, timed in the same "
              "run. \"fisherwalk engine alone\" times fisherwalk's engine calls "
              "(`walker.engine`, chunks of 100 draws: its random numbers and its compiled "
              "loop) without the rest of walk()'s host work. The last column is a side "
              "experiment, not a sampler: a Metropolis step with the chunk's noise drawn in "
              "one jitted call before the scan (`harness.chunk_noise_seconds_per_step`).", "",
              _table(header, rows), ""]
    refs = results.get("references", [])
    if refs:
        rrows = [[str(r["dim"]), NAMES[r["sampler"]], _fmt(r["median_ess_per_step"]),
                  _fmt(r["ess_per_step"]), _fmt(r["acceptance"]), str(r["draws"]),
                  _fmt(r["seconds_per_step"] * 1e6)] for r in refs]
        parts += ["Limits measured on N(0, I_d):", "",
                  _table(["d", "sampler", "median ESS/step", "min ESS/step", "acceptance",
                          "draws/chain", "µs/step"], rrows), ""]

    # 4. fisherwalk's own time
    if "fisherwalk" in samplers:
        header = ["target", "start (s)", "of which compile", "refine (s)", "of which compile",
                  "walk to answer (s)", "walk compile (s)", "compiles start/refine/walk",
                  "Laplace evals", "Laplace compile (s)", "walk µs/step",
                  "engine µs/step", "target acceptance", "realised"]
        rows = []
        for t in targets:
            runs = _runs(t, "fisherwalk")
            if not runs:
                continue

            def info(key, runs=runs):
                return _median([r["info"].get(key) for r in runs])

            walk_to_answer = _median([r["answer_seconds"] - r["prepare_seconds"]
                                      for r in runs if r["answer_reached"]])
            rows.append([
                t["target"], _fmt(info("start_seconds")), _fmt(info("start_compile_seconds")),
                _fmt(info("refine_seconds")), _fmt(info("refine_compile_seconds")),
                _fmt(walk_to_answer),
                _fmt(_median([r["sampling_compile_seconds"] for r in runs])),
                f"{_fmt(info('start_compiles'))}/{_fmt(info('refine_compiles'))}/"
                f"{_fmt(_median([r['sampling_compiles'] for r in runs]))}",
                _fmt(info("laplace_evaluations")),
                _fmt(_median([r["info"]["laplace_seconds"].get("compile") for r in runs])),
                _fmt(_median([r["seconds_per_step"] * 1e6 for r in runs])),
                _fmt(_median([e * 1e6 for e in t["engine_seconds_per_step"] if e])),
                _fmt(info("target_acceptance")),
                _fmt(_median([r["acceptance"] for r in runs])),
            ])
        parts += ["## 4. Where fisherwalk's time goes", "",
                  "Compile times from JAX's monitoring events (tracing, lowering, backend "
                  "compilation; the union of their spans); compiles = backend compilations. "
                  "JAX's in-process caches are cleared before every run "
                  "(`jax.clear_caches()`), so each run compiles what a new process would. "
                  "walk to answer: from the end of refine() to the answer (walk() is called "
                  "once per round; each call with a new number of draws compiles a few "
                  "small eager operations again).", "",
                  _table(header, rows), ""]

    # 5. proposal shapes (issue 6)
    rows = []
    for t in targets:
        if not t.get("shapes"):
            continue
        fisher = _runs(t, "fisherwalk")
        dense = _median([r["ess_per_step"] for r in fisher])
        dense_info = fisher[0]["info"] if fisher else {}
        entries = [("fisher", dense_info, fisher)]
        for shape in ("diagonal", "identity"):
            entries.append((shape, None, [r for r in t["shapes"] if r["shape"] == shape]))
        for shape, inf, runs in entries:
            if not runs:
                continue
            inf = inf or runs[0]["info"]
            realised = _median([r["ess_per_step"] for r in runs])
            jump = inf.get("slowest_jump")
            predicted = jump / (4.0 - jump) if jump is not None else None
            rows.append([
                t["target"], str(t["dim"]), shape, _fmt(inf.get("efficiency")),
                _fmt(realised / dense if realised is not None and dense else None),
                _fmt(predicted), _fmt(realised),
                _fmt(inf.get("target_acceptance")),
                _fmt(_median([r["acceptance"] for r in runs])),
                "yes" if inf.get("reshaped") else "no",
            ])
    if rows:
        parts += ["## 5. Proposal shape: predicted against realised (issue 6)", "",
                  "fisherwalk with `start(..., shape=\"fisher\" | \"diagonal\" | "
                  "\"identity\")`, repeat 0, the same draws as the dense run (at most "
                  f"{results['limits'].get('shape_draws', '–')} per chain). Predicted efficiency: "
                  "`walker.tuning.choice.efficiency` (the slowest direction's expected jump "
                  "relative to the matched proposal's). Predicted ESS/step: J/(4 − J) with "
                  "J = `choice.slowest_jump`, the integrated autocorrelation time 4/J − 1 of "
                  "a chain whose lag-1 autocorrelation is 1 − J/2 (an AR(1) approximation, "
                  "no published source for random-walk Metropolis). Realised: min bulk ESS "
                  "per step of one chain, and its ratio to the dense shape's.", "",
                  _table(["target", "d", "shape", "predicted efficiency",
                          "realised relative to dense", "predicted ESS/step",
                          "realised ESS/step", "target acceptance", "acceptance",
                          "reshaped in warm-up"], rows), ""]

    # 6. persistent cache
    cache = results.get("cache")
    if cache:
        rows = []
        for label, meaning in (("off", "no cache"), ("cold", "cache enabled, empty"),
                               ("warm", "cache enabled, filled by the previous process")):
            c = cache.get(label, {})
            if "seconds" not in c:
                rows.append([meaning, f"failed: {c.get('error')}", "", "", "", ""])
                continue
            rows.append([meaning, _fmt(c["seconds"]), _fmt(c["compile_seconds"]),
                         str(c["compiles"]), str(c["cache_hits"]), _fmt(c["process_seconds"])])
        parts += ["## 6. Persistent compilation cache", "",
                  f"Three fresh processes, each running start + refine + walk (1000 draws) on "
                  f"{cache['target']}. The opt-in: `jax.config.update(\"jax_compilation_cache_"
                  "dir\", folder)`, `jax_persistent_cache_min_compile_time_secs = 0`, "
                  "`jax_persistent_cache_min_entry_size_bytes = -1`. Cache size after the run: "
                  f"{cache.get('cache_bytes', 0) / 1e6:.1f} MB.", "",
                  _table(["process", "start+refine+walk (s)", "compile (s)",
                          "compilations (cache loads included)", "cache hits",
                          "whole process (s)"], rows), ""]
    parts += gradient_tables.section(results)
    return "\n".join(parts) + "\n"


# ----------------------------------------------------------------------------- plot


def plot(results: dict, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import matplotlib.ticker

    fig, axes = plt.subplots(1, 2, figsize=(11, 6.0))
    colours = {"fisherwalk": "C0", "nuts": "C1", "adaptive": "C2", "textbook": "C3",
               "fisherwalk-mala": "C4", "fisherwalk-hmc": "C5", "fisherwalk-nuts": "C6",
               "fisherwalk-auto": "C9", "fisherwalk-nuts-64": "C6", "pathfinder": "C7",
               "chees": "C8", "chees-64": "C8"}
    families = (("logistic", "-", "o", "logistic regression"),
                ("gauss", "--", "s", "Gaussian, condition 1e3"))
    for family, style, marker, label in families:
        ts = sorted([t for t in results["targets"] if t["family"] == family],
                    key=lambda t: t["dim"])
        if not ts:
            continue
        for s in ORDER:
            if s not in results["samplers"]:
                continue
            dims, times, missing = [], [], []
            for t in ts:
                value, _ = answer(t, s)
                if value is not None:
                    dims.append(t["dim"])
                    times.append(value)
                elif _runs(t, s):
                    missing.append(t["dim"])
            if dims:
                axes[0].plot(dims, times, style, marker=marker, color=colours[s],
                             label=f"{NAMES[s]}, {label}")
            if missing:
                tops = [max(r.get("answer_limit") or 0 for r in _runs(t, s))
                        for t in ts if t["dim"] in missing]
                axes[0].plot(missing, tops, marker="^", linestyle="none",
                             color=colours[s], markerfacecolor="none")
            rates, unconverged = [], []
            for t in ts:
                runs = _runs(t, s)
                value = _median([r["ess_per_second"] for r in runs]) if runs else None
                if value is None or value <= 0:
                    continue
                good = _median([r["max_rhat"] for r in runs])
                (rates if good is not None and good < 1.01 else unconverged).append(
                    (t["dim"], value))
            if rates:
                axes[1].plot(*zip(*rates, strict=True), style, marker=marker, color=colours[s],
                             label=f"{NAMES[s]}, {label}")
            if unconverged:
                axes[1].plot(*zip(*unconverged, strict=True), marker=marker,
                             linestyle="none", color=colours[s], markerfacecolor="none")
    axes[0].set_title("time to answer (bulk ESS ≥ 400, R-hat < 1.01)")
    axes[0].set_ylabel("wall time, all included (s)")
    axes[1].set_title("long runs: min bulk ESS per second of sampling")
    axes[1].set_ylabel("ESS / s")
    dims = sorted({t["dim"] for t in results["targets"]})
    plain = matplotlib.ticker.FuncFormatter(lambda v, _: f"{v:g}")
    for ax in axes:
        ax.yaxis.set_major_formatter(plain)
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xticks(dims)
        ax.set_xticks([], minor=True)
        ax.set_xticklabels([str(d) for d in dims])
        ax.set_xlabel("d (number of parameters)")
        ax.grid(True, which="both", alpha=0.3)
    axes[0].text(0.01, 0.01, "open triangles: not reached within the limit",
                 transform=axes[0].transAxes, fontsize=7, va="bottom")
    axes[1].text(0.01, 0.01, "open markers: R-hat ≥ 1.01 (chains not mixed; ESS meaningless)",
                 transform=axes[1].transAxes, fontsize=7, va="bottom")
    handles, labels = axes[1].get_legend_handles_labels()
    if handles:
        fig.legend(handles, labels, loc="lower center", ncol=4, fontsize=7, frameon=False)
    fig.suptitle(f"fisherwalk and other samplers, 4 chains, {results['mode']} mode "
                 f"(medians over {results['repeats']} repeat(s))", fontsize=10)
    fig.tight_layout(rect=(0, 0.26, 1, 0.95))
    fig.savefig(path, dpi=120)
    plt.close(fig)
