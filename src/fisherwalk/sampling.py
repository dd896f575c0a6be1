"""walk(): run all chains, in chunks, and collect a Trace.

The chains advance in a compiled ``lax.scan`` over ``vmap``-ed Metropolis steps
(:mod:`fisherwalk.engine`); between chunks the host shows progress, writes the
checkpoint if one was asked for, and copies the kept draws into preallocated arrays,
so memory grows only with the draws kept (thinning keeps every ``thin``-th state).
"""

from __future__ import annotations

import math
import sys
import time
import warnings
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from blackjax.mcmc.random_walk import RWState

from . import engine as _engine
from .errors import FisherwalkWarning, InputError, SamplingError, explain
from .keys import as_key, key_data, stream
from .walker import Walker

DEFAULT_CHUNK = 100  # kept draws per compiled call; warm-up uses the same, so one compile


class Trace(NamedTuple):
    """The draws of a run, and what is needed to judge and reproduce them.

    Chain axis first, draw axis second, everywhere.
    """

    draws: Any  # the user's pytree, each leaf with leading (chains, draws) axes
    logdensity: np.ndarray  # (chains, draws) log density at each kept draw
    accepted: np.ndarray  # (chains, draws) acceptance indicator (fraction of the thin steps)
    walker: Walker  # the walker used; its states moved to each chain's last kept draw
    flat: np.ndarray  # (chains, draws, d) the draws ravelled (parameter order: walker.names)
    acceptance_rate: np.ndarray  # (chains, draws) Metropolis acceptance probability
    faults: np.ndarray  # (chains, draws) proposals with a NaN/+inf log density, rejected
    thin: int  # steps per kept draw
    rng_key: np.ndarray  # key data of the run's key (uint32)
    seconds: float  # wall time of the run, compilation included
    complete: bool  # False when the run was interrupted (the trace holds what finished)

    @property
    def names(self) -> tuple[str, ...]:
        return self.walker.names

    def summary(self, interval: float = 0.9):
        """The diagnostics table (:class:`fisherwalk.report.Summary`; print it).

        ``interval`` is the probability of the central interval shown beside the median
        (0.9: the 5% and 95% quantiles). The acceptance target, the predicted jump and
        the Gaussian picture's acceptance are those of the scale actually used.
        """
        from .report import summarize
        from .scaling import expected_acceptance, expected_jump

        tuning = self.walker.tuning
        spectrum = np.asarray(tuning.spectrum)
        if np.allclose(spectrum, 1.0, rtol=1e-6, atol=0.0):
            spectrum = None
        notes = ()
        if self.thin > 1:
            notes = (f"realised jump not measured: the trace keeps one state in {self.thin} "
                     "steps, and the jump is per step",)
        return summarize(
            self.flat,
            self.names,
            interval=interval,
            target_acceptance=tuning.target_acceptance,
            scale=tuning.scale,
            gaussian_acceptance=float(expected_acceptance(tuning.scale, tuning.dim, spectrum)),
            acceptance_steps=self.accepted,
            predicted_jump=float(expected_jump(tuning.scale, tuning.dim, spectrum)),
            cholesky=np.asarray(tuning.whitening)
            if self.thin == 1 and self.flat.shape[1] > 1 else None,
            faults=self.faults.sum(axis=1),
            header_notes=notes,
            proposal_shape=np.asarray(tuning.shape),
            seconds=self.seconds,
        )


def _positive_int(value, name: str, where: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 1:
        raise InputError(
            explain(f"{name}={value!r} is not a positive whole number.", where,
                    f"pass {name} as an int >= 1.")
        )
    return int(value)


def check_states(walker: Walker, where: str) -> _engine.ChainState:
    """The walker's chain states, ravelled, after checking they can be continued."""
    if not isinstance(walker, Walker):
        raise InputError(explain(f"Expected a Walker, got {type(walker).__name__}.", where,
                                 "pass the result of fisherwalk.start() or refine()."))
    logdens = np.asarray(walker.states.logdensity)
    bad = np.flatnonzero(~np.isfinite(logdens))
    if bad.size:
        raise SamplingError(
            explain(
                f"The log density at the current state of chain {bad[0]} is {logdens[bad[0]]}.",
                f"{where}, chain {bad[0]}, before step 0",
                "start the chains where the log density is finite (fisherwalk.start does).",
            )
        )
    return _engine.ChainState(walker.flat_positions(), logdens)


class _Collector:
    """Host-side arrays the chunks are copied into."""

    def __init__(self, chains: int, draws: int, dim: int, dtype):
        self.flat = np.empty((chains, draws, dim), dtype=dtype)
        self.logdensity = np.empty((chains, draws), dtype=dtype)
        self.accepted = np.empty((chains, draws), dtype=dtype)
        self.acceptance_rate = np.empty((chains, draws), dtype=dtype)
        self.faults = np.zeros((chains, draws), dtype=np.int32)
        self.done = 0

    def add(self, chunk: _engine.Chunk, keep: int) -> None:
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


def _progress_bar(draws: int, progress, desc: str):
    if progress is None:
        progress = sys.stderr.isatty()
    if not progress:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=draws, unit="draw", desc=desc, leave=True)


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
        it; one of another run is refused, never overwritten (:mod:`fisherwalk.checkpoint`).
    checkpoint_every
        Seconds between checkpoint saves (0: after every chunk); the end of the run and
        Ctrl-C always save.

    Returns
    -------
    Trace

    Notes
    -----
    Ctrl-C during a run without a checkpoint returns a Trace of the draws finished so
    far (``complete=False``) with a warning, instead of losing them.
    """
    draws = _positive_int(draws, "draws", "walk(draws=...)")
    thin = _positive_int(thin, "thin", "walk(thin=...)")
    chunk = _positive_int(chunk, "chunk", "walk(chunk=...)")
    key = as_key(rng_key, where="walk(rng_key=...)")
    state = check_states(walker, "walk()")
    chains, dim = state.position.shape
    dtype = np.asarray(state.logdensity).dtype
    collector = _Collector(chains, draws, dim, dtype)
    ctrl = jax.device_put(_engine.control(dtype=dtype))  # moved to the device once
    noise_key = stream(key, 0)
    factor = jax.device_put(walker.tuning.factor)
    store = None
    if checkpoint is not None:
        from . import checkpoint as _checkpoint

        store = _checkpoint.Store(checkpoint, walker, key, draws, thin, chunk,
                                  every=checkpoint_every)
        state = store.restore(collector, state)
    bar = _progress_bar(draws, progress, "sampling")
    if bar is not None:
        bar.update(collector.done)
    began = time.perf_counter()
    try:
        n_chunks = math.ceil(draws / chunk)
        for k in range(-(-collector.done // chunk), n_chunks):
            out = walker.engine(noise_key, k * chunk * thin, state, factor, ctrl, chunk, thin)
            keep = min(chunk, draws - k * chunk)
            collector.add(out, keep)
            if keep == chunk:  # the chains continue from the chunk's end, still on the device
                state = out.state
            else:
                last = collector.done - 1
                state = _engine.ChainState(collector.flat[:, last],
                                           collector.logdensity[:, last])
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
    return _trace(walker, collector, state, thin, key, seconds, complete=collector.done == draws)


def _trace(walker, collector, state, thin, key, seconds, *, complete) -> Trace:
    flat = collector.flat
    tree = walker.unravel_many(flat) if flat.shape[1] else None
    positions = jax.tree.map(jnp.asarray, walker.unravel_many(np.asarray(state.position)))
    final = walker._replace(states=RWState(positions, jnp.asarray(state.logdensity)))
    return Trace(tree, collector.logdensity, collector.accepted, final, flat,
                 collector.acceptance_rate, collector.faults, thin, key_data(key), seconds,
                 complete)
