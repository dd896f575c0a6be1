"""walk(): run all chains, in chunks, and collect a Trace.

The chains advance in a compiled ``lax.scan`` over ``vmap``-ed Metropolis steps
(:mod:`fisherwalk.run.engine`); between chunks the host shows progress, writes the
checkpoint if one was asked for, and copies the kept draws into preallocated arrays,
so memory grows only with the draws kept (thinning keeps every ``thin``-th state).
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable

import jax
import numpy as np

from ..base.checks import whole_number
from ..base.keys import as_key, key_data, stream
from ..errors import FisherwalkWarning
from ..results.trace import Trace
from . import derive, engine
from .checkpoint import Store
from .engine import DEFAULT_CHUNK, ChainState, Chunk, run_chunks
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
    pointwise: Callable | None = None,
    derived: Callable | None = None,
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
    pointwise
        ``pointwise(position) -> (n_obs,)``, the log likelihood of each observation;
        evaluated after sampling at the kept draws (in chunks, :mod:`fisherwalk.run.derive`)
        and stored as ``trace.pointwise`` (chains, draws, n_obs), for leave-one-out
        cross-validation (``trace.to_arviz()``, then ``arviz.loo``).
    derived
        ``derived(position) -> pytree`` of quantities computed from the parameters (e.g.
        ``{"k": jnp.exp(p["log_k"])}``); evaluated like ``pointwise``, stored as
        ``trace.derived`` and summarised with the parameters. Neither is checkpointed:
        both are recomputed at the end of a resumed run.

    Returns
    -------
    Trace

    Notes
    -----
    Ctrl-C during a run without a checkpoint returns a Trace of the draws finished so
    far (``complete=False``) with a warning, instead of losing them.
    """
    draws = whole_number(draws, "draws", "walk(draws=...)")
    thin = whole_number(thin, "thin", "walk(thin=...)")
    chunk = whole_number(chunk, "chunk", "walk(chunk=...)")
    key = as_key(rng_key, where="walk(rng_key=...)")
    state = continuable_state(walker, "walk()")
    derive.check_functions(walker, pointwise=pointwise, derived=derived)
    chains, dim = state.position.shape
    dtype = np.asarray(state.logdensity).dtype
    collector = _Collector(chains, draws, dim, dtype)
    ctrl = jax.device_put(engine.control(dtype=dtype))  # moved to the device once
    noise_key = stream(key, 0)
    factor = jax.device_put(walker.tuning.factor)
    store = None
    if checkpoint is not None:
        store = Store(checkpoint, walker, key, draws, thin, chunk,
                                  every=checkpoint_every)
        state = store.restore(collector, state)
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
            raise
        collector.truncate()
        warnings.warn(
            f"walk() was interrupted after {collector.done} of {draws} draws per chain; the "
            "returned Trace holds them (complete=False). To make long runs resumable, pass "
            "checkpoint='run.ckpt'.",
            FisherwalkWarning,
            stacklevel=2,
        )
    finally:
        if bar is not None:
            bar.close()
    seconds = time.perf_counter() - began
    trace = _trace(walker, collector, state, thin, key, seconds, complete=collector.done == draws)
    return derive.attach(trace, pointwise=pointwise, derived=derived)


def _trace(walker, collector, state, thin, key, seconds, *, complete) -> Trace:
    flat = collector.flat
    tree = walker.unravel_many(flat) if flat.shape[1] else None
    final = walker._replace(state=ChainState(np.asarray(state.position),
                                             np.asarray(state.logdensity)))
    return Trace(tree, collector.logdensity, collector.accepted, final, flat,
                 collector.acceptance_rate, collector.faults, thin, key_data(key), seconds,
                 complete)
