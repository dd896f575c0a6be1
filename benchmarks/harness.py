"""Measuring one sampler on one target: the clock, the rounds, the compile monitor.

The harness treats every sampler alike (see ``baselines.py`` for the interface):

1. ``prepare`` (everything before the first kept draw) is timed as a whole;
2. ``advance`` is called in rounds of draws (each round about half the draws so far,
   in whole chunks of the sampler's compiled loop) until every parameter has bulk ESS
   >= 400 and R-hat < 1.01 (Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021,
   Bayesian Analysis 16(2): the working thresholds), computed with
   ``fisherwalk.results.diagnostics`` on the draws so far;
3. the draw count at which the criteria first held is then located inside the last round
   by bisection over whole chunks (diagnostics on prefixes of the kept draws), and the
   time to answer is the preparation time, plus the earlier rounds, plus that fraction of
   the last round (its compilation, if any, counted whole). The diagnostics themselves
   are not on the clock (they cost the same whichever sampler produced the draws);
4. sampling continues to a long run (a minimum bulk ESS or a time limit), from which
   ESS per second of sampling (compilation excluded), ESS per evaluation and ESS per
   step are computed.

Two guards stop a run that the sampler's clock would let go on: the wall time including
the diagnostics (1.5 times the limits plus 20 s) and the memory of the kept draws
(``MAX_STORED`` numbers).

Compilation time is read from JAX's own monitoring events (tracing, lowering to MLIR,
backend compilation): the union of their time spans inside a window, so nested traces
are not counted twice.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import jax
import numpy as np

from fisherwalk.results.diagnostics import ess_bulk, ess_tail, rhat

ESS_GOAL = 400.0  # Vehtari et al. (2021): bulk ESS > 400 ...
RHAT_GOAL = 1.01  # ... and R-hat < 1.01 before trusting the draws
MAX_STORED = 10_000_000  # kept draws x chains x d held in memory at most (80 MB)

_COMPILE_EVENTS = (
    "/jax/core/compile/jaxpr_trace_duration",
    "/jax/core/compile/jaxpr_to_mlir_module_duration",
    "/jax/core/compile/backend_compile_duration",
)
_BACKEND = "/jax/core/compile/backend_compile_duration"


class CompileMonitor:
    """Collects the time spans of JAX's compile events (register once per process)."""

    def __init__(self) -> None:
        self.spans: list[tuple[str, float, float]] = []
        jax.monitoring.register_event_time_span_listener(self._on_span)

    def _on_span(self, event: str, start_time: float, end_time: float, **_: Any) -> None:
        if event in _COMPILE_EVENTS:
            self.spans.append((event, start_time, end_time))

    @contextlib.contextmanager
    def window(self):
        """``with monitor.window() as w:`` then ``w.seconds`` and ``w.compiles``."""
        record = _Window()
        began = time.time()
        first = len(self.spans)
        try:
            yield record
        finally:
            ended = time.time()
            spans = [s for s in self.spans[first:] if s[1] >= began - 1e-3 and s[2] <= ended + 1e-3]
            record.seconds = _union([(a, b) for _, a, b in spans])
            record.compiles = sum(1 for e, _, _ in spans if e == _BACKEND)


@dataclass
class _Window:
    seconds: float = 0.0
    compiles: int = 0


def _union(intervals: list[tuple[float, float]]) -> float:
    total, end = 0.0, -math.inf
    for a, b in sorted(intervals):
        if a > end:
            total += b - a
            end = b
        elif b > end:
            total += b - end
            end = b
    return total


# ----------------------------------------------------------------------------- diagnostics


def criteria(x: np.ndarray) -> tuple[bool, float, float]:
    """(met, min bulk ESS, max R-hat) for draws (chains, draws, d)."""
    ess = np.atleast_1d(ess_bulk(x))
    rh = np.atleast_1d(rhat(x))
    min_ess = float(np.min(ess)) if np.all(np.isfinite(ess)) else 0.0
    max_rhat = float(np.max(rh)) if np.all(np.isfinite(rh)) else math.inf
    return (min_ess >= ESS_GOAL and max_rhat < RHAT_GOAL), min_ess, max_rhat


class _Store:
    """Kept draws, grown by doubling."""

    def __init__(self, chains: int, dim: int):
        self.x = np.empty((chains, 1024, dim))
        self.acc = np.empty((chains, 1024))
        self.n = 0

    def add(self, positions: np.ndarray, accepted: np.ndarray) -> None:
        k = positions.shape[1]
        while self.n + k > self.x.shape[1]:
            grow = self.x.shape[1]
            self.x = np.concatenate([self.x, np.empty_like(self.x[:, :grow])], axis=1)
            self.acc = np.concatenate([self.acc, np.empty_like(self.acc[:, :grow])], axis=1)
        self.x[:, self.n:self.n + k] = positions
        self.acc[:, self.n:self.n + k] = accepted
        self.n += k

    def view(self, m: int | None = None) -> np.ndarray:
        return self.x[:, : self.n if m is None else m]


@dataclass
class Limits:
    """How long a measurement may run."""

    answer_seconds: float  # give up on the answer after this much wall time
    long_ess: float  # the long run stops at this minimum bulk ESS ...
    long_seconds: float  # ... or after this much sampling time, whichever first


def _next_round(total: int, chunk: int) -> int:
    return max(chunk, int(math.ceil(0.5 * total / chunk)) * chunk)


def measure(sampler, initial: np.ndarray, key, limits: Limits,
            monitor: CompileMonitor) -> dict:
    """Run one sampler to its answer and on to a long run; return the figures."""
    k_prep, k_walk = jax.random.split(key)
    began = time.perf_counter()
    with monitor.window() as prep_compile:
        prepared = sampler.prepare(initial, k_prep)
    prep_seconds = time.perf_counter() - began
    state = prepared.state
    chains = 0
    store = None
    rounds: list[dict] = []
    answer: dict | None = None
    total, n = 0, sampler.first_round
    stats = (False, 0.0, math.inf)
    stop = "long run done"
    while True:
        t0 = time.perf_counter()
        with monitor.window() as comp:
            adv = sampler.advance(state, k_walk, total, n)
        dt = time.perf_counter() - t0
        state = adv.state
        if store is None:
            chains = adv.positions.shape[0]
            store = _Store(chains, adv.positions.shape[2])
        store.add(adv.positions, adv.accepted)
        rounds.append({"start": total, "end": total + n, "seconds": dt,
                       "compile": comp.seconds, "compiles": comp.compiles,
                       "evaluations": adv.evaluations})
        total += n
        stats = criteria(store.view())
        if answer is None and stats[0]:
            answer = _locate(store, rounds, prep_seconds, prepared.evaluations, sampler.chunk)
        sampling = sum(r["seconds"] for r in rounds)
        if answer is not None and (stats[1] >= limits.long_ess or sampling >= limits.long_seconds):
            break
        if answer is None and prep_seconds + sampling >= limits.answer_seconds:
            stop = "time limit"
            break
        # guards on what the clock does not see: the diagnostics' own time, and memory
        wall = time.perf_counter() - began
        if wall >= 1.5 * (limits.answer_seconds + limits.long_seconds) + 20.0:
            stop = "wall-time guard"
            break
        n = _next_round(total, sampler.chunk)
        if (total + n) * chains * store.x.shape[2] > MAX_STORED:
            stop = "memory guard"
            break
    x = store.view()
    ess = np.atleast_1d(ess_bulk(x))
    tails = np.atleast_1d(ess_tail(x))
    rh = np.atleast_1d(rhat(x))
    sampling_seconds = sum(r["seconds"] for r in rounds)
    sampling_compile = sum(r["compile"] for r in rounds)
    evaluations = sum(r["evaluations"] for r in rounds)
    first_rhat = float(np.max(np.atleast_1d(rhat(store.view(rounds[0]["end"])))))
    run_seconds = max(sampling_seconds - sampling_compile, 1e-9)
    # time per step in the steady state: the rounds after the first (the first carries
    # one-time work besides compilation: first calls, caches), when there are any
    steady = rounds[1:] or rounds
    steady_seconds = sum(r["seconds"] - r["compile"] for r in steady)
    steady_draws = sum(r["end"] - r["start"] for r in steady)
    min_ess = float(np.min(ess)) if np.all(np.isfinite(ess)) else 0.0
    out = {
        "sampler": sampler.key,
        "chains": chains,
        "draws": total,
        "prepare_seconds": prep_seconds,
        "prepare_compile_seconds": prep_compile.seconds,
        "prepare_compiles": prep_compile.compiles,
        "sampling_seconds": sampling_seconds,
        "sampling_compile_seconds": sampling_compile,
        "sampling_compiles": sum(r["compiles"] for r in rounds),
        "compile_seconds": prep_compile.seconds + sampling_compile,
        "evaluations_before": prepared.evaluations,
        "evaluations_sampling": evaluations,
        "min_ess_bulk": min_ess,
        "median_ess_bulk": float(np.median(ess)),
        "min_ess_tail": float(np.min(tails)) if np.all(np.isfinite(tails)) else 0.0,
        "max_rhat": float(np.max(rh)) if np.all(np.isfinite(rh)) else math.inf,
        "rhat_first_round": first_rhat,
        "acceptance": float(store.acc[:, :total].mean()),
        "ess_per_second": min_ess / run_seconds,
        "ess_per_evaluation": min_ess / max(evaluations, 1),
        "ess_per_step": min_ess / (chains * total),
        "median_ess_per_step": float(np.median(ess)) / (chains * total),
        "seconds_per_step": max(steady_seconds, 1e-9) / steady_draws,
        "info": prepared.info,
        "rounds": len(rounds),
        "stop": stop,
    }
    if answer is not None:
        out.update(answer_reached=True, answer_estimated=False, **answer)
    else:
        out.update(_extrapolate(stats, prep_seconds, sampling_seconds, limits))
    return out


def _locate(store: _Store, rounds: list[dict], prep_seconds: float, evals_before: int,
            chunk: int) -> dict:
    """The first draw count (whole chunks) inside the last round meeting the criteria."""
    last = rounds[-1]
    lo, hi = last["start"] // chunk, last["end"] // chunk  # criteria hold at hi
    lo = max(lo, 0)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if mid * chunk >= 4 and criteria(store.view(mid * chunk))[0]:
            hi = mid
        else:
            lo = mid
    m = hi * chunk
    fraction = (m - last["start"]) / (last["end"] - last["start"])
    earlier = sum(r["seconds"] for r in rounds[:-1])
    earlier_evals = sum(r["evaluations"] for r in rounds[:-1])
    seconds = (prep_seconds + earlier + last["compile"]
               + fraction * max(last["seconds"] - last["compile"], 0.0))
    return {"answer_seconds": seconds, "answer_draws": m,
            "answer_evaluations": int(evals_before + earlier_evals
                                      + fraction * last["evaluations"])}


def _extrapolate(stats, prep_seconds: float, sampling_seconds: float, limits: Limits) -> dict:
    """No answer within the limit: extrapolate from the ESS rate when R-hat is fine."""
    _, min_ess, max_rhat = stats
    if max_rhat < RHAT_GOAL and min_ess > 0:
        seconds = prep_seconds + sampling_seconds * ESS_GOAL / min_ess
        return {"answer_reached": False, "answer_estimated": True, "answer_seconds": seconds,
                "answer_draws": None, "answer_evaluations": None}
    return {"answer_reached": False, "answer_estimated": False,
            "answer_seconds": None, "answer_limit": limits.answer_seconds,
            "answer_draws": None, "answer_evaluations": None}


# ----------------------------------------------------------------------------- raw cost


def raw_evaluation_seconds(logdensity_fn: Callable, point: np.ndarray, chains: int = 4,
                           budget: float = 0.3) -> float:
    """Seconds per vmapped (``chains``) log-density evaluation inside a compiled loop.

    Each iteration's input depends on the previous output (a 1e-30 nudge), so XLA
    cannot hoist the evaluation out of the loop; the loop's own cost is part of the
    figure, as it is of any sampler's.
    """
    batched = jax.vmap(logdensity_fn)

    def loop(x, steps):
        def body(c, _):
            v = batched(c)
            return c + 1e-30 * v[:, None], None

        return jax.lax.scan(body, x, None, length=steps)[0]

    looped = jax.jit(loop, static_argnums=1)
    x = jax.numpy.asarray(np.broadcast_to(point, (chains, len(point))).copy())
    looped(x, 100).block_until_ready()
    t0 = time.perf_counter()
    looped(x, 100).block_until_ready()
    per = max((time.perf_counter() - t0) / 100, 1e-8)
    steps = int(min(max(budget / per, 200), 200_000))
    looped(x, steps).block_until_ready()  # compile the measured length
    samples = []
    for _ in range(3):
        t0 = time.perf_counter()
        looped(x, steps).block_until_ready()
        samples.append((time.perf_counter() - t0) / steps)
    return float(np.median(samples))


# ----------------------------------------------------------------------------- fisherwalk


class FisherwalkSampler:
    """fisherwalk: start(sampler=...) + refine(), then walk() in rounds.

    ``shape`` is start()'s proposal shape ("fisher", the default, "diagonal" or
    "identity"); ``sampler`` is start()'s sampler ("rwm", the default, "mala", "hmc",
    "nuts" or "auto"). Evaluations before the first kept draw: the Laplace fit's
    value-and-gradient evaluations, one Hessian counted as d gradient evaluations
    (up to two more may be taken by the Newton polish: LaplaceFit does not say how many),
    the draws of N(mode, H⁻¹) that seed the chains and the PSIS check, and the warm-up:
    for the random walk one evaluation per step and chain; for a gradient sampler the
    warm-up's gradient evaluations as its dual-averaging runs counted them (read from the
    warm-up's own result, see :func:`_counting_warmups`), one gradient per chain at the
    chain starts, and for "auto" the timing of one batched value and one batched gradient
    (8 calls each over the chains). Evaluations while sampling: one per step and chain
    for the random walk, ``trace.gradients`` for a gradient sampler.
    """

    name = "fisherwalk"
    chunk = 100  # fisherwalk.engine.loop.DEFAULT_CHUNK

    def __init__(self, logdensity_fn: Callable, dim: int, monitor: CompileMonitor,
                 shape: str = "fisher", chains: int = 4, sampler: str = "rwm"):
        self.logdensity_fn = logdensity_fn
        self.dim = dim
        self.monitor = monitor
        self.shape = shape
        self.chains = chains
        self.sampler = sampler
        self.key = "fisherwalk" if sampler == "rwm" else f"fisherwalk-{sampler}"
        if chains != 4:
            self.key += f"-{chains}"
        # a gradient sampler's draw carries far more ESS: its rounds start at one chunk
        self.first_round = 500 if sampler == "rwm" else self.chunk
        self.walker = None

    def prepare(self, initial: np.ndarray, key):
        from baselines import Prepared

        from fisherwalk import refine, start
        from fisherwalk.prepare.start import LAPLACE_DRAWS as laplace_draws  # PSIS check draws

        k_start, k_refine = jax.random.split(key)
        t0 = time.perf_counter()
        with self.monitor.window() as c_start:
            walker = start(self.logdensity_fn, jax.numpy.asarray(initial), k_start,
                           chains=self.chains, shape=self.shape, sampler=self.sampler,
                           progress=False)
        t1 = time.perf_counter()
        with self.monitor.window() as c_refine, _counting_warmups() as warm_gradients:
            walker = refine(walker, k_refine, progress=False)
        t2 = time.perf_counter()
        fit = walker.report.laplace
        warm = walker.report.warmup
        steps = int(getattr(warm, "steps", 400))
        gradient = walker.family.evaluation == "gradient"
        picked = walker.tuning.sampler
        evaluations = fit.evaluations + self.dim + max(laplace_draws, self.chains)
        if gradient:
            counted = sum(warm_gradients)
            evaluations += self.chains + counted
        else:
            evaluations += steps * self.chains
        if self.sampler == "auto":
            evaluations += 2 * 8 * self.chains
        info = {
            "start_seconds": t1 - t0, "refine_seconds": t2 - t1,
            "start_compile_seconds": c_start.seconds, "start_compiles": c_start.compiles,
            "refine_compile_seconds": c_refine.seconds, "refine_compiles": c_refine.compiles,
            "laplace_seconds": dict(getattr(fit, "seconds", {}) or {}),
            "laplace_evaluations": fit.evaluations,
            "burn_in": steps, "sampler": picked,
            "reshaped": bool(getattr(warm, "reshaped", False)),
            "khat": getattr(warm, "khat", None),
        }
        if gradient:
            info.update(step_size_start=getattr(warm, "tuned_start", None),
                        step_size=float(walker.tuning.step_size),
                        target_acceptance=getattr(warm, "target_acceptance", None),
                        acceptance_warmup=getattr(warm, "acceptance_final", None),
                        warmup_gradients=int(sum(warm_gradients)),
                        auto_note=next((n for n in walker.report.notes
                                        if n.startswith("sampler='auto'")), None))
        else:
            choice = walker.tuning.choice
            info.update(acceptance_warmup=getattr(warm, "acceptance_final", None),
                        target_acceptance=walker.tuning.target_acceptance,
                        scale=walker.tuning.scale, shape_kind=walker.tuning.shape_kind,
                        efficiency=getattr(choice, "efficiency", None),
                        slowest_jump=getattr(choice, "slowest_jump", None))
        self.walker = walker
        return Prepared(walker, int(evaluations), info)

    def advance(self, walker, key, first: int, draws: int):
        from baselines import Advanced

        from fisherwalk import walk

        trace = walk(walker, jax.random.fold_in(key, first), draws=draws, progress=False)
        self.walker = trace.walker
        if trace.gradients is not None:
            evaluations = int(np.sum(trace.gradients))
        else:
            evaluations = self.chains * draws
        return Advanced(trace.walker, trace.flat, trace.accepted, evaluations)


@contextlib.contextmanager
def _counting_warmups():
    """Collect the gradient evaluations of every gradient warm-up run inside the block.

    refine() does not report them, but each warm-up's own result does
    (``GradientWarmup.gradients``); this wraps the function refine() calls so that the
    results pass through unchanged and their counts land in the yielded list. Nothing
    else changes: no extra evaluation, no change to the compiled programs.
    """
    counts: list[int] = []
    try:
        from fisherwalk.samplers import stepfamily
    except ImportError:  # a package layout without gradient samplers: nothing to count
        yield counts
        return
    original = stepfamily.warm_up

    def counted(*args, **kwargs):
        out = original(*args, **kwargs)
        counts.append(int(np.sum(out.gradients)))
        return out

    stepfamily.warm_up = counted
    try:
        yield counts
    finally:
        stepfamily.warm_up = original


def _median_seconds_per_step(call, chunk: int, budget: float) -> float:
    """Median over 3 batches of the seconds per step of ``call(i)`` (one chunk per call),
    after a warm-up call; batches sized to about ``budget`` seconds."""
    call(0)
    t0 = time.perf_counter()
    call(1)
    per = max(time.perf_counter() - t0, 1e-6)
    calls = int(min(max(budget / per, 3), 500))
    samples = []
    for _ in range(3):
        t0 = time.perf_counter()
        for i in range(calls):
            call(i)
        samples.append((time.perf_counter() - t0) / (calls * chunk))
    return float(np.median(samples))


def engine_seconds_per_step(walker, budget: float = 0.3) -> float | None:
    """Seconds per step of fisherwalk's engine call alone (no walk() host work):
    the host-side noise of each chunk and the compiled loop. None if it cannot run."""
    from fisherwalk.base.keys import stream
    from fisherwalk.engine import loop as engine

    try:
        dtype = np.asarray(walker.state.logdensity).dtype
        state = engine.ChainState(walker.flat_positions(),
                                  jax.numpy.asarray(walker.state.logdensity))
        factor = walker.tuning.factor
        ctrl = engine.control(dtype=dtype)
        source = stream(jax.random.key(0), 7)
        chunk = 100

        def call(i):
            out = walker.engine(source, i * chunk, state, factor, ctrl, chunk)
            jax.block_until_ready(out.position)

        return _median_seconds_per_step(call, chunk, budget)
    except Exception as err:  # noqa: BLE001 - a figure we can do without
        print(f"engine timing skipped: {type(err).__name__}: {err}", flush=True)
        return None


def fixed_run(sampler, initial: np.ndarray, key, draws: int) -> dict:
    """Prepare, then exactly ``draws`` kept draws (whole chunks); ESS per step and rate."""
    k_prep, k_walk = jax.random.split(key)
    prepared = sampler.prepare(initial, k_prep)
    draws = int(math.ceil(draws / sampler.chunk) * sampler.chunk)
    # one chunk first so that compilation stays off the sampling clock
    adv0 = sampler.advance(prepared.state, k_walk, 0, sampler.chunk)
    t0 = time.perf_counter()
    adv = sampler.advance(adv0.state, k_walk, sampler.chunk, draws)
    seconds = time.perf_counter() - t0
    x = adv.positions
    chains = x.shape[0]
    ess = np.atleast_1d(ess_bulk(x))
    rh = np.atleast_1d(rhat(x))
    ess = np.where(np.isfinite(ess), ess, 0.0)
    return {
        "sampler": sampler.key, "draws": draws, "chains": chains,
        "min_ess_bulk": float(ess.min()), "median_ess_bulk": float(np.median(ess)),
        "ess_per_step": float(ess.min()) / (chains * draws),
        "median_ess_per_step": float(np.median(ess)) / (chains * draws),
        "max_rhat": float(np.max(rh)) if np.all(np.isfinite(rh)) else math.inf,
        "acceptance": float(adv.accepted.mean()),
        "seconds_per_step": seconds / draws,
        "info": prepared.info,
    }


def chunk_noise_seconds_per_step(logdensity_fn: Callable, point: np.ndarray, chains: int = 4,
                                 chunk: int = 100, budget: float = 0.3) -> float:
    """Seconds per step of a Metropolis loop whose noise is drawn once per chunk.

    A side experiment, not a sampler of the comparison: the same random-walk step as
    the others (a dense d x d factor, Gaussian proposal, log-uniform acceptance test), but
    the chunk's normal and uniform draws come from one call before the ``lax.scan``
    instead of a key split and fold-in per step. Its ratio to a raw evaluation shows how
    much of a cheap step is the per-step random-number work.
    """
    dim = len(point)
    factor = jax.numpy.eye(dim) * (0.1 / math.sqrt(dim))
    batched = jax.vmap(logdensity_fn)

    @jax.jit
    def advance(key, first, x, logdens):
        k_noise, k_accept = jax.random.split(jax.random.fold_in(key, first))
        noise = jax.random.normal(k_noise, (chunk, chains, dim), dtype=x.dtype)
        log_u = jax.numpy.log(jax.random.uniform(k_accept, (chunk, chains), dtype=x.dtype))

        def one(carry, inputs):
            x, logdens = carry
            z, lu = inputs
            proposed = x + z @ factor.T
            new = batched(proposed)
            accept = lu < new - logdens
            x = jax.numpy.where(accept[:, None], proposed, x)
            logdens = jax.numpy.where(accept, new, logdens)
            return (x, logdens), (x, accept)

        return jax.lax.scan(one, (x, logdens), (noise, log_u))

    x = jax.numpy.asarray(np.broadcast_to(point, (chains, dim)).copy())
    logdens = batched(x)
    key = jax.random.key(0)
    return _median_seconds_per_step(
        lambda i: jax.block_until_ready(advance(key, i, x, logdens)), chunk, budget)
