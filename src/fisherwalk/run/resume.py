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

from ..base.precision import x64_enabled
from ..errors import CheckpointError, InputError, explain
from ..results.trace import Trace
from .checkpoint import DEFAULT_EVERY, RUN_FILE, STATE_FILE, damaged, decode, read_json
from .sampling import walk
from .tuningfile import walker_from_record

__all__ = ["resume"]


def resume(path, logdensity_fn: Callable, *, position: Any = None, progress: bool | None = None,
           checkpoint_every: float = DEFAULT_EVERY, pointwise: Callable | None = None,
           derived: Callable | None = None) -> Trace:
    """Finish a checkpointed run from its directory alone and the model's log density.

    The walker is rebuilt from the tuning record stored in the checkpoint
    (:func:`fisherwalk.run.tuningfile.walker_from_record`); the log density cannot be stored,
    so it is checked: recomputed at the saved chain states, it must give the saved
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
    pointwise, derived
        As in :func:`fisherwalk.walk`; evaluated on all the kept draws at the end (they
        are not stored in the checkpoint).

    Returns
    -------
    Trace

    Raises
    ------
    CheckpointError
        No checkpoint at ``path``, a damaged one, or a log density that does not
        match the one the checkpoint was written with.
    """
    directory = Path(path)
    run_file = directory / RUN_FILE
    where = f"resume({os.fspath(directory)!r})"
    if not run_file.is_file():
        raise CheckpointError(explain(f"There is no checkpoint at {directory} (no {RUN_FILE}).",
                                      where, "pass the directory given to walk(checkpoint=...)."))
    run = read_json(run_file)
    identity, start = run.get("identity"), run.get("start")
    try:
        chains, dim = identity["chains"], identity["dim"]
        dtype = np.dtype(identity["dtype"])
        positions0 = decode(start["position"], dtype, (chains, dim))
        logdensity0 = decode(start["logdensity"], dtype, (chains,))
        key = jax.random.wrap_key_data(np.asarray(identity["key"]["data"], dtype=np.uint32),
                                       impl=identity["key"]["impl"])
        draws, thin, chunk = identity["draws"], identity["thin"], identity["chunk"]
    except (KeyError, TypeError, ValueError) as err:
        raise damaged(run_file, f"its identity or starting states are malformed ({err})") from err
    if dtype == np.float64 and not x64_enabled():
        raise CheckpointError(explain(
            "The checkpoint was written in float64 and JAX now computes in float32.", where,
            'run jax.config.update("jax_enable_x64", True) before resuming, as in the '
            "original run."))
    try:
        walker = walker_from_record(run.get("record"), logdensity_fn, positions0, logdensity0,
                                    position=position)
    except InputError as err:
        raise CheckpointError(explain(
            f"The walker cannot be rebuilt from {run_file}: {str(err).splitlines()[0]}",
            where, "pass position=<a position of the model> if the message asks for it; "
                   "otherwise the file is damaged: delete the checkpoint to start afresh.",
        )) from err
    _check_logdensity(directory, walker, positions0, logdensity0, where)
    return walk(walker, key, draws, thin, chunk=chunk, progress=progress, checkpoint=directory,
                checkpoint_every=checkpoint_every, pointwise=pointwise, derived=derived)


def _check_logdensity(directory: Path, walker, positions0, logdensity0, where: str) -> None:
    """The user's log density must reproduce the saved one at the saved chain states."""
    positions, stored = positions0, logdensity0
    state_file = directory / STATE_FILE
    if state_file.exists():
        saved = read_json(state_file)
        if saved.get("done"):
            try:
                positions = decode(saved.get("position"), positions0.dtype, positions0.shape)
                stored = decode(saved.get("logdensity"), positions0.dtype, logdensity0.shape)
            except ValueError as err:
                raise damaged(state_file, f"the chains' state is malformed ({err})") from err
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
