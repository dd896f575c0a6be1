"""reopen(): a finished run read back from its folder as a Trace, without the model.

Two kinds of folder open:

* the output folder of ``fisherwalk run`` / ``demo`` / ``resume`` (``draws.npz`` and
  ``record.json``, optionally ``pointwise.npz``): the draws are read back in ravelled
  order and the run's facts (:class:`fisherwalk.results.facts.RunFacts`) from the record,
  so the summary, the figures and ``to_arviz()`` are those of the original run;
* a finished checkpoint folder (``walk(..., checkpoint=...)``): its segments are read
  through the same checks as a resume, and the facts are rebuilt from its tuning record
  (which holds no warm-up: the summary's target is then the Gaussian picture's
  prediction at the scale or step size used).

The reopened Trace has ``walker=None``: it cannot be continued, only read. Files are read
with their sizes checked first and ``np.load(..., allow_pickle=False)``.
"""

from __future__ import annotations

import io
import os
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from ..base.files import read_bytes
from ..base.jsonio import read_json
from ..base.pytrees import written_order
from ..errors import CheckpointError, InputError, explain
from ..persistence.checkpoint import RUN_FILE, STATE_FILE, read_checkpoint_json
from ..results.facts import facts_from_record, in_written_order
from ..results.trace import Trace
from .plan import RunLength
from .resume import rebuild_walker
from .runfacts import run_facts
from .sampling import walk

__all__ = ["reopen", "RECORD_FILE", "DRAWS_FILE", "POINTWISE_FILE"]

RECORD_FILE, DRAWS_FILE, POINTWISE_FILE = "record.json", "draws.npz", "pointwise.npz"
MAX_RECORD_BYTES = 1 << 30
MAX_ARRAY_BYTES = 1 << 40  # the draws: bounded by the disk, read whole


def reopen(path: str | os.PathLike) -> Trace:
    """Open a finished run's folder as a :class:`~fisherwalk.Trace` without the model.

    Parameters
    ----------
    path
        The output folder of ``fisherwalk run`` (``draws.npz`` + ``record.json``) or a
        finished checkpoint folder (``walk(..., checkpoint=...)``; a ``fisherwalk run
        --checkpoint`` folder whose sampling finished has its checkpoint in
        ``checkpoint/``).

    Returns
    -------
    Trace
        With ``walker=None``; ``summary()``, the figures (:mod:`fisherwalk.plots`) and
        ``to_arviz()`` work as on the original trace; ``trace.facts`` holds the run's
        sampler, tuning and Laplace facts.

    Raises
    ------
    InputError
        Not a run folder, or a file that is not what fisherwalk wrote.
    CheckpointError
        A damaged or unfinished checkpoint.
    """
    folder = Path(path)
    where = f"reopen({os.fspath(folder)!r})"
    if (folder / RECORD_FILE).is_file() and (folder / DRAWS_FILE).is_file():
        return _run_folder(folder, where)
    if (folder / RUN_FILE).is_file():
        return _checkpoint(folder, where)
    raise InputError(explain(
        f"{folder} holds neither {DRAWS_FILE} with {RECORD_FILE} (a 'fisherwalk run' folder) "
        f"nor {RUN_FILE} (a checkpoint).", where,
        "pass the --out folder of a finished 'fisherwalk run', or a checkpoint folder."))


def _bad(folder: Path, what: str, where: str) -> InputError:
    return InputError(explain(f"{folder}: {what}", where,
                              "use a folder written by fisherwalk, unedited."))


def _arrays(file: Path, where: str) -> dict[str, np.ndarray]:
    data = read_bytes(file, max_bytes=MAX_ARRAY_BYTES, where=where)
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as content:
            return {name: content[name] for name in content.files}
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as err:
        raise _bad(file.parent, f"{file.name} cannot be read ({err})", where) from err


def _columns(values: np.ndarray, names) -> dict[str, np.ndarray]:
    """One (chains, draws) array per scalar column, keyed by its name, in the order given."""
    return {str(name): values[..., k] for k, name in enumerate(names)}


def _run_folder(folder: Path, where: str) -> Trace:
    record = read_json(folder / RECORD_FILE, max_bytes=MAX_RECORD_BYTES, where=where)
    arrays = _arrays(folder / DRAWS_FILE, where)
    try:
        facts = facts_from_record(record["facts"])
        sampling = record["sampling"]
        seconds, thin = float(sampling["seconds"]), int(sampling["thin"])
        complete = bool(sampling["complete"])
        key = np.asarray(record["keys"]["sampling"], dtype=np.uint32)
        length = sampling.get("run_length")
        if length is not None:
            length = RunLength(**{**length, "rounds": tuple(length["rounds"])})
    except (KeyError, TypeError, ValueError) as err:
        raise _bad(folder, f"{RECORD_FILE} lacks the run's facts ({err!r}); it was written "
                           "by an older fisherwalk", where) from err
    written = np.asarray(arrays.get("draws"))
    dim = facts.dim
    order = in_written_order(facts.order, dim)
    expected = [facts.names[j] for j in order]
    if (written.ndim != 3 or written.shape[-1] != dim
            or [str(n) for n in arrays.get("names", ())] != expected):
        raise _bad(folder, f"{DRAWS_FILE} does not hold the {dim} parameters {RECORD_FILE} "
                           "names", where)
    flat = np.empty_like(written)
    flat[..., order] = written
    chains, count = flat.shape[:2]
    accepted = arrays["accepted"]
    optional = {name: arrays[name] for name in ("divergent", "energy", "gradients")
                if name in arrays}
    extra: dict[str, Any] = {}
    for field, names in (("derived", "derived_names"), ("predicted", "predicted_names")):
        if field in arrays:
            tree = _columns(arrays[field], arrays[names])
            target = "derived" if field == "derived" else "predictions"
            extra[target] = tree
            extra[f"{target}_order"] = written_order(
                {name: np.empty(()) for name in tree})
    pointwise = None
    if (folder / POINTWISE_FILE).is_file():
        pointwise = _arrays(folder / POINTWISE_FILE, where)["pointwise"]
    elif "pointwise" in arrays:  # folders written before the pointwise file
        pointwise = arrays["pointwise"]
    return Trace(
        draws=_leaves(flat, facts.leaves), logdensity=arrays["logdensity"],
        accepted=accepted, walker=None, flat=flat,
        acceptance_rate=arrays.get("acceptance_rate", accepted),
        faults=arrays.get("faults", np.zeros((chains, count), dtype=np.int32)),
        thin=thin, rng_key=key, seconds=seconds, complete=complete, pointwise=pointwise,
        length=length, facts=facts, **optional, **extra)


def _leaves(flat: np.ndarray, leaves) -> dict[str, np.ndarray]:
    """The draws per leaf of the position, keyed by the leaf's path (ravelled order)."""
    out, start = {}, 0
    batch = flat.shape[:2]
    for name, shape in leaves:
        size = int(np.prod(shape, dtype=int))
        out[name] = flat[..., start:start + size].reshape(*batch, *shape)
        start += size
    return out


def _no_model(position):
    raise CheckpointError(explain(
        "A reopened checkpoint has no model; its log density cannot be evaluated.",
        "reopen()", "use fisherwalk.resume(path, logdensity_fn) to run a checkpoint on."))


def _checkpoint(folder: Path, where: str) -> Trace:
    run = read_checkpoint_json(folder / RUN_FILE, max_bytes=1 << 30)
    state_file = folder / STATE_FILE
    state = read_checkpoint_json(state_file, max_bytes=1 << 31) if state_file.exists() else {}
    draws = (run.get("identity") or {}).get("draws")
    if state.get("done") != draws:
        raise CheckpointError(explain(
            f"The checkpoint {folder} is not finished: {state.get('done', 0)} of {draws} "
            "draws per chain are saved.", where,
            "finish it first with fisherwalk.resume(path, logdensity_fn)."))
    walker, key, draws, thin, chunk, _ = rebuild_walker(folder, _no_model, where=where)
    trace = walk(walker, key, draws, thin, chunk=chunk, progress=False, checkpoint=folder)
    return trace._replace(walker=None, facts=run_facts(walker))
