"""resume(): finish a checkpointed run from its directory and the model's log density."""

from __future__ import annotations

import math
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..base.checks import whole_number
from ..base.precision import x64_enabled
from ..engine.memory import check_steps, check_walk_memory
from ..errors import CheckpointError, InputError, explain
from ..persistence.checkpoint import (
    DEFAULT_EVERY,
    MAX_CHAINS,
    RUN_FILE,
    STATE_FILE,
    check_start_whitened,
    damaged,
    decode_state,
    read_checkpoint_json,
    state_bytes,
    whitened_state,
)
from ..persistence.tuningfile import walker_from_record
from ..persistence.tuningread import MAX_DIM, MAX_RECORD_BYTES
from ..results.trace import Trace
from .sampling import walk

__all__ = ["resume", "rebuild_walker"]


def resume(path, logdensity_fn: Callable, *, position: Any = None, progress: bool | None = None,
           checkpoint_every: float = DEFAULT_EVERY, checkpoint_reclaim: bool = False,
           pointwise: Callable | None = None, derived: Callable | None = None,
           predict: Callable | None = None) -> Trace:
    """Finish a checkpointed run from its directory alone and the model's log density.

    The walker is rebuilt from the tuning record stored in the checkpoint
    (:func:`fisherwalk.persistence.tuningfile.walker_from_record`); the log density cannot
    be stored, so it is checked: recomputed at the saved chain states, it must give the saved
    values. The run then continues as ``walk(..., checkpoint=path)`` would, with the
    saved key, draws, thin and chunk, and gives the same draws as an uninterrupted run.

    Parameters
    ----------
    path
        The checkpoint directory.
    logdensity_fn
        The log density of the original run.
    position
        A position of the model; needed only if the model's position is a pytree that
        JSON cannot describe (e.g. a NamedTuple).
    progress
        Progress bar, as in :func:`fisherwalk.walk`.
    checkpoint_every
        Seconds between saves (0: after every chunk).
    checkpoint_reclaim
        Break a stale pid-file lock left by an older fisherwalk; not needed after a crash
        of this version (the kernel released its lock). A lock of a running process is
        never broken.
    pointwise, derived, predict
        As in :func:`fisherwalk.walk`; evaluated on all the kept draws at the end (they
        are not stored in the checkpoint; predictions use each draw's own key, so they
        equal an uninterrupted run's).

    Returns
    -------
    Trace

    Raises
    ------
    CheckpointError
        No checkpoint at ``path``, a damaged one (every field is checked before it is
        used, sizes before anything is allocated), one another run is writing, or a log
        density that does not match the one the checkpoint was written with.
    """
    directory = Path(path)
    where = f"resume({os.fspath(directory)!r})"
    walker, key, draws, thin, chunk, (positions0, logdensity0) = rebuild_walker(
        directory, logdensity_fn, position=position, where=where)
    _check_logdensity(directory, walker, positions0, logdensity0, where,
                      state_bytes(walker.chains, walker.dim, draws, chunk))
    return walk(walker, key, draws, thin, chunk=chunk, progress=progress, checkpoint=directory,
                checkpoint_every=checkpoint_every, checkpoint_reclaim=checkpoint_reclaim,
                pointwise=pointwise, derived=derived, predict=predict)


def rebuild_walker(directory: Path, logdensity_fn: Callable, *, position: Any = None,
                   where: str) -> tuple:
    """The walker, key, draws, thin, chunk and the stored starting (positions, log
    densities) of the checkpoint in ``directory``, every field checked (the log density
    is not evaluated here)."""
    run_file = directory / RUN_FILE
    if not run_file.is_file():
        raise CheckpointError(explain(f"There is no checkpoint at {directory} (no {RUN_FILE}).",
                                      where, "pass the directory given to walk(checkpoint=...)."))
    run = read_checkpoint_json(run_file, max_bytes=2 * MAX_RECORD_BYTES)
    identity, start = run.get("identity"), run.get("start")
    if not isinstance(identity, dict) or not isinstance(start, dict):
        raise damaged(run_file, "its identity or starting states are missing")
    try:
        chains = whole_number(identity.get("chains"), "chains", where, maximum=MAX_CHAINS,
                              error=CheckpointError)
        dim = whole_number(identity.get("dim"), "dim", where, maximum=MAX_DIM,
                           error=CheckpointError)
        draws = whole_number(identity.get("draws"), "draws", where, error=CheckpointError)
        thin = whole_number(identity.get("thin"), "thin", where, error=CheckpointError)
        chunk = whole_number(identity.get("chunk"), "chunk", where, error=CheckpointError)
    except CheckpointError as err:
        raise damaged(run_file, str(err).splitlines()[0].rstrip(".")) from err
    if identity.get("dtype") not in ("float32", "float64"):
        raise damaged(run_file, f"dtype {identity.get('dtype')!r:.40} is not float32 or float64")
    dtype = np.dtype(identity["dtype"])
    positions0, logdensity0 = decode_state(start, run_file, dtype, chains, dim)
    key = _key(identity.get("key"), run_file)
    check_steps(draws, thin, where=where, error=CheckpointError)
    check_walk_memory(draws, chains, dim, dtype=dtype, where=where, error=CheckpointError,
                      thin=thin)
    if dtype == np.float64 and not x64_enabled():
        raise CheckpointError(explain(
            "The checkpoint was written in float64 and JAX now computes in float32.", where,
            'run jax.config.update("jax_enable_x64", True) before resuming, as in the '
            "original run."))
    try:
        walker = walker_from_record(run.get("record"), logdensity_fn, positions0, logdensity0,
                                    position=position)
    except InputError as err:  # the record failed a check of tuningfile.read_record
        raise CheckpointError(explain(
            f"The walker cannot be rebuilt from {run_file}: {str(err).splitlines()[0]}",
            where, "pass position=<a position of the model> if the message asks for it; "
                   "otherwise the file is damaged: delete the checkpoint to start afresh.",
        )) from err
    if walker.family.stores_state:  # the chains' exact start (a refit would round it)
        walker = walker._replace(state=whitened_state(
            start.get("whitened"), walker.state, chains, dim, str(dtype), run_file))
        check_start_whitened(run, walker.state, run_file)
    return walker, key, draws, thin, chunk, (positions0, logdensity0)


def _key(content: Any, run_file: Path) -> jax.Array:
    """The run's key from its stored implementation name and key data."""
    if (not isinstance(content, dict) or not isinstance(content.get("impl"), str)
            or not isinstance(content.get("data"), list) or not 1 <= len(content["data"]) <= 16
            or not all(isinstance(v, int) and not isinstance(v, bool) and 0 <= v < 2**32
                       for v in content["data"])):
        raise damaged(run_file, "its random key is malformed")
    try:
        return jax.random.wrap_key_data(np.asarray(content["data"], dtype=np.uint32),
                                        impl=content["impl"])
    except (KeyError, TypeError, ValueError) as err:
        raise damaged(run_file, f"its random key is malformed ({err})") from err


def _check_logdensity(directory: Path, walker, positions0, logdensity0, where: str,
                      max_state_bytes: int) -> None:
    """The user's log density must reproduce the saved one at the saved chain states."""
    positions, stored = positions0, logdensity0
    state_file = directory / STATE_FILE
    if state_file.exists():
        saved = read_checkpoint_json(state_file, max_bytes=max_state_bytes)
        if saved.get("done"):
            positions, stored = decode_state(saved, state_file, positions0.dtype,
                                             *positions0.shape)
    values = np.asarray(walker.evaluate(jnp.asarray(positions)))
    # Same model, same data: equal up to rounding of the sum (a different compilation
    # may order it differently), so allow sqrt(machine epsilon) relative to |log density|.
    tol = math.sqrt(np.finfo(positions0.dtype).eps) * (1.0 + np.abs(stored))
    bad = np.flatnonzero(~(np.abs(values - stored) <= tol))
    if bad.size:
        c = int(bad[0])
        raise CheckpointError(explain(
            f"The log density given to resume() is not the one this checkpoint was written "
            f"with: at the saved state of chain {c} it gives {values[c]!r}, the run had "
            f"{stored[c]!r}.",
            f"{where}, chain {c}",
            "pass the log density of the original run (same model, same data); for a new "
            "model or data set start a new run with another checkpoint path."))
