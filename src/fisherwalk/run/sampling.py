"""walk(): run all chains, in chunks, and collect a Trace.

The chains advance in a compiled ``lax.scan`` over ``vmap``-ed Metropolis steps
(:mod:`fisherwalk.run.engine`); between chunks the host shows progress, writes the
checkpoint if one was asked for, and copies the kept draws into preallocated arrays,
so memory grows only with the draws kept (thinning keeps every ``thin``-th state).
"""

from __future__ import annotations

import time
import warnings

import jax
import numpy as np

from ..base.checks import whole_number
from ..base.keys import as_key, key_data, stream
from ..errors import FisherwalkWarning
from ..results.trace import Trace
from . import engine
from .checkpoint import Store
from .engine import DEFAULT_CHUNK, ChainState, Chunk, run_chunks
from .memory import check_walk_memory
from .progress import progress_bar
from .walker import Walker, continuable_state


class _Collector:
    """Host-side arrays the chunks are copied into."""

    def __init__(self, chains: int, draws: int, dim: int, dtype):
        self.flat = np.empty((chains, draws, dim), dtype=dtype)
        self.logdensity = np.empty((chains, draws), dtype=dtype)
        self.accepted = np.empty((chains, draws), dtype=dtype)
        self.acceptance_rate = np.empty((chains, draws), dtype=dtype)
        self.faults = np.zeros((chains, draws), dtype=np.int32)
        self.done = 0

    def add(self, chunk: Chunk, keep: int) -> None:
        s = slice(self.done, self.done + keep)
        host = jax.device_get((chunk.position, chunk.logdensity, chunk.accepted,
                               chunk.acceptance_rate, chunk.faults))
        for target, value in zip(
            (self.flat, self.logdensity, self.accepted, self.acceptance_rate, self.faults), host,
            strict=True,
        ):
            target[:, s] = np.swapaxes(value[:keep], 0, 1)
        self.done += keep

    def truncate(self) -> None:
        for name in ("flat", "logdensity", "accepted", "acceptance_rate", "faults"):
            setattr(self, name, getattr(self, name)[:, : self.done])


def walk(
    walker: Walker,
    rng_key: jax.Array,
    draws: int = 1000,
    thin: int = 1,
    *,
    chunk: int = DEFAULT_CHUNK,
    progress: bool | None = None,
    checkpoint=None,
    checkpoint_every: float = 10.0,
    checkpoint_reclaim: bool = False,
) -> Trace:
    """Run every chain of a walker for ``draws`` kept draws.

    Parameters
    ----------
    walker
        From :func:`fisherwalk.start` or :func:`fisherwalk.refine`.
    rng_key
        JAX key (typed or old-style). Same key, same draws, bit for bit, whatever the
        chunking, and after a resume.
    draws
        Kept draws per chain.
    thin
        Steps per kept draw.
    chunk
        Kept draws per compiled call (progress and checkpoints happen between chunks).
        Keep the default so that warm-up and sampling share one compilation.
    progress
        Show a progress bar with draws per second and the running acceptance. Default:
        only when standard error is a terminal.
    checkpoint
        A directory path (e.g. ``"run.ckpt"``): the finished draws are saved there
        atomically, and a call with an existing checkpoint of the same run continues from
        it; one of another run is refused, never overwritten (:mod:`fisherwalk.run.checkpoint`).
    checkpoint_every
        Seconds between checkpoint saves (0: after every chunk); the end of the run and
        Ctrl-C always save.
    checkpoint_reclaim
        Break the checkpoint directory's lock when it is stale: left by a run on this
        host that no longer runs (killed, or the machine restarted). A lock held by a
        running process is never broken; by default a stale lock is refused with a
        message naming its owner.

    Returns
    -------
    Trace

    Notes
    -----
    Ctrl-C during a run without a checkpoint returns a Trace of the draws finished so
    far (``complete=False``) with a warning, instead of losing them.

    Memory follows the kept draws, whatever ``thin`` is (the random numbers are made in
    bounded blocks). A run whose kept draws and summary would not fit in the memory this
    process can allocate is refused before anything is allocated
    (:func:`fisherwalk.run.memory.check_walk_memory`).
    """
    draws = whole_number(draws, "draws", "walk(draws=...)")
    thin = whole_number(thin, "thin", "walk(thin=...)")
    chunk = whole_number(chunk, "chunk", "walk(chunk=...)")
    key = as_key(rng_key, where="walk(rng_key=...)")
    state = continuable_state(walker, "walk()")
    chains, dim = state.position.shape
    dtype = np.asarray(state.logdensity).dtype
    check_walk_memory(draws, chains, dim, dtype=dtype)
    collector = _Collector(chains, draws, dim, dtype)
    store = None
    if checkpoint is not None:
        store = Store(checkpoint, walker, key, draws, thin, chunk, every=checkpoint_every,
                      reclaim=checkpoint_reclaim)
    try:
        if store is not None:
            state = store.restore(collector, state)
        return _sample(walker, key, state, collector, store, draws, thin, chunk, progress)
    finally:
        if store is not None:
            store.close()


def _sample(walker, key, state, collector, store, draws, thin, chunk, progress) -> Trace:
    dtype = collector.flat.dtype
    ctrl = jax.device_put(engine.control(dtype=dtype))  # moved to the device once
    noise_key = stream(key, 0)
    factor = jax.device_put(walker.tuning.factor)
    bar = progress_bar(draws, progress, "sampling")
    if bar is not None:
        bar.update(collector.done)
    began = time.perf_counter()
    try:
        for keep, out in run_chunks(walker.engine, noise_key, state, factor, ctrl, draws,
                                    chunk=chunk, thin=thin, done=collector.done):
            collector.add(out, keep)
            if keep == chunk:  # the chains continue from the chunk's end, still on the device
                state = out.state
            else:
                last = collector.done - 1
                state = ChainState(collector.flat[:, last], collector.logdensity[:, last])
            if store is not None:
                store.save(collector, state)
            if bar is not None:
                bar.update(keep)
                bar.set_postfix(acceptance=f"{collector.accepted[:, :collector.done].mean():.3f}")
    except KeyboardInterrupt:
        if store is not None:
            store.save(collector, state, force=True)
            warnings.warn(
                f"walk() was interrupted after {collector.done} of {draws} draws per chain; "
                f"they are saved in the checkpoint {store.path}: continue with "
                f"fisherwalk.resume({str(store.path)!r}, logdensity_fn).",
                FisherwalkWarning, stacklevel=3)
            raise
        collector.truncate()
        warnings.warn(
            f"walk() was interrupted after {collector.done} of {draws} draws per chain; the "
            "returned Trace holds them (complete=False). To make long runs resumable, pass "
            "checkpoint='run.ckpt'.",
            FisherwalkWarning,
            stacklevel=3,
        )
    finally:
        if bar is not None:
            bar.close()
    seconds = time.perf_counter() - began
    return _trace(walker, collector, state, thin, key, seconds, complete=collector.done == draws)


def _trace(walker, collector, state, thin, key, seconds, *, complete) -> Trace:
    flat = collector.flat
    tree = walker.unravel_many(flat) if flat.shape[1] else None
    final = walker._replace(state=ChainState(np.asarray(state.position),
                                             np.asarray(state.logdensity)))
    return Trace(tree, collector.logdensity, collector.accepted, final, flat,
                 collector.acceptance_rate, collector.faults, thin, key_data(key), seconds,
                 complete)
