"""walk(): run all chains, in chunks, and collect a Trace.

The chains advance in a compiled ``lax.scan`` over ``vmap``-ed Metropolis steps
(:mod:`fisherwalk.engine.loop`); between chunks the host shows progress, writes the
checkpoint if one was asked for, and copies the kept draws into preallocated arrays,
so memory grows only with the draws kept (thinning keeps every ``thin``-th state).
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable

import jax
import numpy as np

from ..base.checks import positive_number, whole_number
from ..base.keys import as_key, key_data
from ..engine.loop import DEFAULT_CHUNK, Chunk
from ..engine.memory import check_steps, check_walk_memory
from ..engine.progress import progress_bar
from ..errors import FisherwalkWarning, InputError, explain
from ..models.space import space_of
from ..persistence.checkpoint import open_store
from ..results.trace import Trace
from ..tuned.walker import Walker, continuable_state
from . import derive, plan
from .runfacts import run_facts
from .switch import switch_reason, switched_walker

_FIELDS = ("position", "logdensity", "accepted", "acceptance_rate", "faults", "divergent",
           "gradients", "energy")  # what a chunk may carry (the last three: gradient families)
_ARRAYS = ("flat", "logdensity", "accepted", "acceptance_rate", "faults", "divergent",
           "gradients", "energy")


class _Collector:
    """Host-side arrays the chunks are copied into."""

    def __init__(self, chains: int, draws: int, dim: int, dtype):
        self.flat = np.empty((chains, draws, dim), dtype=dtype)
        self.logdensity = np.empty((chains, draws), dtype=dtype)
        self.accepted = np.empty((chains, draws), dtype=dtype)
        self.acceptance_rate = np.empty((chains, draws), dtype=dtype)
        self.faults = np.zeros((chains, draws), dtype=np.int32)
        self.divergent = np.zeros((chains, draws), dtype=np.int32)
        self.gradients = np.zeros((chains, draws), dtype=np.int32)
        self.energy = np.full((chains, draws), np.nan, dtype=dtype)
        self.has_energy = False  # set when a chunk carries the Hamiltonian (HMC, NUTS)
        self.done = 0

    def add(self, chunk: Chunk, keep: int) -> None:
        s = slice(self.done, self.done + keep)
        names = [n for n in _FIELDS if getattr(chunk, n, None) is not None]
        self.has_energy = self.has_energy or "energy" in names
        host = jax.device_get(tuple(getattr(chunk, n) for n in names))
        for name, value in zip(names, host, strict=True):
            getattr(self, "flat" if name == "position" else name)[:, s] = np.swapaxes(
                value[:keep], 0, 1)
        self.done += keep

    def grow(self, draws: int) -> None:
        """Room for ``draws`` kept draws per chain in all (a planned run's next round)."""
        for name in _ARRAYS:
            old = getattr(self, name)
            new = np.zeros((old.shape[0], draws) + old.shape[2:], dtype=old.dtype)
            new[:, : self.done] = old[:, : self.done]
            setattr(self, name, new)

    def truncate(self) -> None:
        for name in _ARRAYS:
            setattr(self, name, getattr(self, name)[:, : self.done])


def walk(
    walker: Walker,
    rng_key: jax.Array,
    draws: int | None = None,
    thin: int = 1,
    *,
    ess_limit: float = plan.ESS_LIMIT,
    rhat_limit: float = plan.RHAT_LIMIT,
    max_draws: int = plan.MAX_DRAWS,
    max_seconds: float = plan.MAX_SECONDS,
    chunk: int = DEFAULT_CHUNK,
    progress: bool | None = None,
    checkpoint=None,
    checkpoint_every: float = 10.0,
    checkpoint_reclaim: bool = False,
    pointwise: Callable | None = None,
    derived: Callable | None = None,
    predict: Callable | None = None,
) -> Trace:
    """Run every chain of a walker (a Walker holds all the chains) and collect the draws.

    Parameters
    ----------
    walker
        From :func:`fisherwalk.start` or :func:`fisherwalk.refine`.
    rng_key
        JAX key (typed or old-style). Same key, same draws, bit for bit, whatever the
        chunking, the rounds, and after a resume.
    draws
        Kept draws per chain. ``None`` (default): run in rounds until every parameter
        has bulk and tail ESS >= ``ess_limit`` and R-hat < ``rhat_limit``, or a budget
        runs out (:mod:`fisherwalk.workflow.plan`: the first round is sized from the
        predicted ESS per step of this walker, later ones from the measured ESS).
        ``trace.length`` and a line of the summary say how the run ended.
    thin
        Steps per kept draw.
    ess_limit, rhat_limit
        The targets of a planned run (Vehtari et al. 2021 recommend 400 and 1.01); the
        summary warns against the same numbers.
    max_draws, max_seconds
        The budgets of a planned run: kept draws per chain, and wall seconds of sampling
        (checked between chunks).
    chunk
        Kept draws per compiled call (progress and checkpoints happen between chunks).
        Keep the default so that warm-up and sampling share one compilation.
    progress
        Show a progress bar with the round, the running acceptance and the predicted time
        left. Default: in a terminal (standard error) and in a notebook.
    checkpoint
        A directory path (e.g. ``"run.ckpt"``), with ``draws=N`` only: the finished draws
        are saved there atomically, and a call with an existing checkpoint of the same
        run continues from it; one of another run is refused, never overwritten
        (:mod:`fisherwalk.persistence.checkpoint`).
    checkpoint_every
        Seconds between checkpoint saves (0: after every chunk); the end of the run and
        Ctrl-C always save.
    checkpoint_reclaim
        Break a stale pid-file lock left by an older fisherwalk (its owner on this host
        no longer runs). The lock of this version is the kernel's: it goes when its
        process ends, however it ends, so a killed run continues with no flag; a lock
        held by a running process is never broken.
    pointwise
        ``pointwise(position) -> (n_obs,)``, the log likelihood of each observation;
        evaluated after sampling at the kept draws (in chunks, :mod:`fisherwalk.workflow.derive`)
        and stored as ``trace.pointwise`` (chains, draws, n_obs), for leave-one-out
        cross-validation (``trace.to_arviz()``, then ``arviz.loo``).
    derived
        ``derived(position) -> pytree`` of quantities computed from the parameters (e.g.
        ``{"k": jnp.exp(p["log_k"])}``); evaluated like ``pointwise``, stored as
        ``trace.derived`` and summarised with the parameters. Neither is checkpointed:
        both are recomputed at the end of a resumed run.
    predict
        ``predict(position, key) -> pytree``: predictions with their own randomness
        (e.g. a new observation drawn at each kept draw). Evaluated after sampling with
        each draw's own key, ``fold_in`` of the run's key and the draw's index
        (:func:`fisherwalk.workflow.derive.prediction_keys`), so the same key gives the same
        predictions whatever the chunking; stored as ``trace.predictions``, summarised
        after the derived quantities and exported to ArviZ as ``posterior_predictive``.

    Returns
    -------
    Trace

    Notes
    -----
    A planned run is a prefix of the fixed run with the same key: its rounds continue the
    same step counter, so ``walk(w, key)`` stopping at N draws equals
    ``walk(w, key, draws=N)`` bit for bit.

    Ctrl-C during a run without a checkpoint returns a Trace of the draws finished so
    far (``complete=False``) with a warning, instead of losing them.

    Memory follows the kept draws, whatever ``thin`` is (the random numbers are made in
    bounded blocks). A run whose kept draws and summary would not fit in the memory this
    process can allocate is refused before anything is allocated
    (:func:`fisherwalk.engine.memory.check_walk_memory`).
    """
    planned = draws is None
    thin = whole_number(thin, "thin", "walk(thin=...)")
    chunk = whole_number(chunk, "chunk", "walk(chunk=...)")
    key = as_key(rng_key, where="walk(rng_key=...)")
    state = continuable_state(walker, "walk()")
    per_draw = derive.check_functions(walker, pointwise=pointwise, derived=derived,
                                      predict=predict)
    chains, dim = state.position.shape
    if planned:
        ess_limit = positive_number(ess_limit, "ess_limit", "walk(ess_limit=...)")
        rhat_limit = positive_number(rhat_limit, "rhat_limit", "walk(rhat_limit=...)")
        if rhat_limit <= 1.0:
            raise InputError(explain(f"rhat_limit={rhat_limit} is not above 1.",
                                     "walk(rhat_limit=...)",
                                     "use a limit above 1, such as 1.01 (the default)."))
        max_draws = whole_number(max_draws, "max_draws", "walk(max_draws=...)")
        max_seconds = positive_number(max_seconds, "max_seconds", "walk(max_seconds=...)")
        if checkpoint is not None:
            raise InputError(explain(
                "A checkpoint needs a run of fixed length, and draws was not given (a "
                "planned run).", "walk(checkpoint=...)",
                "pass draws=N with checkpoint=..., e.g. the draws per chain of a planned "
                "run you made before (trace.length.rounds[-1])."))
        total = plan.first_round(walker.tuning, chains, thin, chunk, ess_limit, rhat_limit,
                                 max_draws)
    else:
        total = whole_number(draws, "draws", "walk(draws=...)")
    dtype = np.asarray(state.logdensity).dtype
    check_steps(max_draws if planned else total, thin)
    check_walk_memory(total, chains, dim, dtype=dtype, thin=thin,
                      pointwise=per_draw[0], derived=per_draw[1])
    collector = _Collector(chains, total, dim, dtype)
    family, engine = walker.family, walker.model.engine

    def chunks(state, total, done):
        return family.chunks(engine, walker.tuning, key, state, total, chunk, thin, done)
    store = None
    if checkpoint is not None:
        store = open_store(checkpoint, walker, key, total, thin, chunk, every=checkpoint_every,
                           reclaim=checkpoint_reclaim)  # all processes open it, or none
    try:
        if store is not None:
            state = store.restore(collector, state)
        return _sample(walker, key, state, collector, store, chunks, planned, total, thin,
                       chunk, progress, (ess_limit, rhat_limit, max_draws, max_seconds),
                       (pointwise, derived, predict))
    finally:
        if store is not None:
            store.close()


def _sample(walker, key, state, collector, store, chunks, planned, total, thin, chunk,
            progress, limits, functions) -> Trace:
    """The chunk loop of walk(): rounds (a planned run) or one fixed length."""
    ess_limit, rhat_limit, max_draws, max_seconds = limits
    bar = progress_bar(total, progress, "sampling, round 1" if planned else "sampling")
    if bar is not None:
        bar.update(collector.done)
    began = time.perf_counter()
    first_done = collector.done
    rounds: list[int] = []
    stopped, min_ess, max_rhat, previous = "fixed length", None, None, None
    reason = ""  # why the walk switches sampler after its first round (workflow/switch.py)
    try:
        while True:
            for keep, out in chunks(state, total, collector.done):
                collector.add(out, keep)
                state = out.state  # the family's chunks end a last, short one at its last draw
                if store is not None:
                    store.save(collector, state)
                elapsed = time.perf_counter() - began
                if bar is not None:
                    bar.update(keep)
                    _show(bar, collector, total, elapsed, first_done, len(rounds) + 1, planned)
                if planned and elapsed > max_seconds and collector.done < total:
                    stopped = "seconds budget"
                    break
            if not planned:
                break
            rounds.append(collector.done)
            min_ess, max_rhat = plan.verdict(collector.flat[:, :collector.done])
            if stopped == "seconds budget":
                break
            if min_ess >= ess_limit and max_rhat < rhat_limit:
                stopped = "targets met"
                break
            if len(rounds) == 1 and store is None:  # far below its prediction: switch once
                reason = switch_reason(walker, min_ess, max_rhat, collector.done, thin)
                if reason:
                    stopped = "switching"
                    break
            if plan.stalled(previous, (collector.done, max_rhat)):
                stopped = "chains disagree"
                break
            if collector.done >= max_draws:
                stopped = "draws budget"
                break
            if time.perf_counter() - began > max_seconds:
                stopped = "seconds budget"
                break
            previous = (collector.done, max_rhat)
            total = plan.next_total(collector.done, min_ess, max_rhat, chunk, ess_limit,
                                    rhat_limit, max_draws)
            if total <= collector.done:  # no new draw to take: never an empty round
                stopped = "draws budget"
                break
            collector.grow(total)
            if bar is not None:
                bar.total = total
                bar.set_description(f"sampling, round {len(rounds) + 1}")
                bar.refresh()
    except KeyboardInterrupt:
        if store is not None:
            store.save(collector, state, force=True)
            warnings.warn(
                f"walk() was interrupted after {collector.done} of {total} draws per chain; "
                f"they are saved in the checkpoint {store.path}: continue with "
                f"fisherwalk.resume({str(store.path)!r}, logdensity_fn).",
                FisherwalkWarning, stacklevel=3)
            raise
        collector.truncate()
        stopped = "interrupted"
        warnings.warn(
            f"walk() was interrupted after {collector.done} of {total} draws per chain; the "
            "returned Trace holds them (complete=False). To make long runs resumable, pass "
            "draws=N and checkpoint='run.ckpt'.",
            FisherwalkWarning,
            stacklevel=3,
        )
    finally:
        if bar is not None:
            bar.close()
    seconds = time.perf_counter() - began
    if stopped == "switching":  # workflow/switch.py: the walk goes on with NUTS, from here
        switched = switched_walker(walker, walker.family.positions(walker.model.engine, state),
                                   jax.random.fold_in(key, 2**31 - 7), reason)
        return walk(switched, jax.random.fold_in(key, 2**31 - 11), thin=thin,
                    ess_limit=ess_limit, rhat_limit=rhat_limit, max_draws=max_draws,
                    max_seconds=max(max_seconds - seconds, 1e-3), chunk=chunk,
                    progress=progress, pointwise=functions[0], derived=functions[1],
                    predict=functions[2])
    collector.truncate()
    if not planned and stopped != "interrupted":
        rounds = [collector.done]
    length = plan.RunLength(
        planned, stopped, tuple(rounds) or (collector.done,), float(ess_limit),
        float(rhat_limit), max_draws if planned else None, max_seconds if planned else None,
        plan.predicted_ess_per_step(walker.tuning), min_ess, max_rhat)
    complete = stopped != "interrupted" and (planned or collector.done == total)
    trace = _trace(walker, collector, state, thin, key, seconds, complete=complete,
                   length=length)
    pointwise, derived, predict = functions
    return derive.attach(trace, pointwise=pointwise, derived=derived, predict=predict)


def _show(bar, collector, total, elapsed, first_done, round_number, planned) -> None:
    """The bar's postfix: running acceptance, and the predicted seconds left."""
    per_draw = elapsed / max(collector.done - first_done, 1)
    info = {"acceptance": f"{collector.accepted[:, :collector.done].mean():.3f}"}
    if planned:
        info["round"] = round_number
    info["left"] = f"{per_draw * (total - collector.done):.0f}s"
    bar.set_postfix(info, refresh=False)  # the bar refreshes at its own pace


def _trace(walker, collector, state, thin, key, seconds, *, complete, length=None) -> Trace:
    flat = collector.flat
    tree = walker.unravel_many(flat) if flat.shape[1] else None
    final = walker._replace(state=jax.tree.map(np.asarray, state))
    gradient = walker.family.evaluation == "gradient"
    return Trace(tree, collector.logdensity, collector.accepted, final, flat,
                 collector.acceptance_rate, collector.faults, thin, key_data(key), seconds,
                 complete, length=length,
                 divergent=collector.divergent if gradient else None,
                 gradients=collector.gradients if gradient else None,
                 energy=collector.energy if collector.has_energy else None,
                 facts=run_facts(final),
                 space=space_of(walker.logdensity_fn))  # a model's own space, or None
