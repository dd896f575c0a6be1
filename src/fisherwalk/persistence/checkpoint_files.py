"""Reading a checkpoint's files: the format's names, a JSON file bounded and checked, the
chains' stored state, and the refusal of a damaged file (one message, naming the file and
what is wrong)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from ..base.jsonio import decode_array, read_json
from ..errors import CheckpointError, explain
from .segments import changed_field

__all__ = ["FORMAT", "FORMAT_VERSION", "RUN_FILE", "STATE_FILE", "damaged", "first_clause",
           "read_checkpoint_json", "decode_state", "check_start_whitened", "whitened_state"]

FORMAT = "fisherwalk-checkpoint"
FORMAT_VERSION = 2  # 2: lock, segment digests, fingerprint over the whole tuning record
RUN_FILE = "run.json"
STATE_FILE = "state.json"


def damaged(file: Path, reason: str) -> CheckpointError:
    directory = file.parent
    return CheckpointError(
        explain(
            f"The checkpoint file {file} is damaged or incomplete: {reason}.",
            f"checkpoint {directory}",
            f"delete the directory {directory} to start the run afresh, or restore the file "
            "from a copy; the run cannot be continued from it as it is.",
        )
    )


def first_clause(err: Exception) -> str:
    """The first line of a package error's message, as a clause."""
    first = str(err).splitlines()[0].rstrip(".")
    return first[:1].lower() + first[1:]


def read_checkpoint_json(file: Path, *, max_bytes: int) -> dict:
    """A checkpoint's JSON file, size and depth bounded, format checked."""
    try:
        content = read_json(file, max_bytes=max_bytes, follow_symlinks=False,
                            error=CheckpointError, where=f"checkpoint {file.parent}")
    except CheckpointError as err:
        raise damaged(file, first_clause(err)) from err
    if not isinstance(content, dict) or content.get("format") != FORMAT:
        raise damaged(file, "it is not a fisherwalk checkpoint file")
    if content.get("format_version") != FORMAT_VERSION:
        raise damaged(file, f"format version {content.get('format_version')!r:.20}, this "
                             f"fisherwalk reads {FORMAT_VERSION}")
    if not isinstance(content.get("fingerprint"), str):
        raise damaged(file, "it has no fingerprint")
    return content


def decode_state(content: Any, file: Path, dtype, chains: int, dim: int
                 ) -> tuple[np.ndarray, np.ndarray]:
    """The chains' (position, logdensity) stored in a checkpoint file, shapes checked
    before allocating."""
    if not isinstance(content, dict):
        raise damaged(file, "the chains' state is missing")
    where = f"checkpoint {file.parent}, file {file.name}"
    name = np.dtype(dtype).name
    try:
        position = decode_array(content.get("position"), "position", where,
                                max_size=chains * dim, shape=(chains, dim), dtype=name,
                                error=CheckpointError)
        logdensity = decode_array(content.get("logdensity"), "logdensity", where,
                                  max_size=chains, shape=(chains,), dtype=name,
                                  error=CheckpointError)
    except CheckpointError as err:
        raise damaged(file, f"the chains' state is malformed ({first_clause(err)})") from err
    return position, logdensity


def check_start_whitened(run: dict, state, run_file: Path) -> None:
    """Refuse a run file whose ``start.whitened`` fields (decoded into ``state``) are not
    the ones digested in its identity when the run began, naming the field."""
    identity = run.get("identity") if isinstance(run.get("identity"), dict) else {}
    recorded = (identity.get("digests") or {}).get("whitened")
    if recorded is None:
        return  # written before the digests: the fingerprint check of walk() applies
    field = changed_field(str(recorded), state, "start.whitened.")
    if field is not None:
        raise damaged(run_file, f"'{field}' is not the chains' starting state the run began "
                                "with (its SHA-256 differs from identity.digests.whitened): "
                                "the file was edited")


def whitened_state(content, state, chains: int, dim: int, dtype: str, state_file: Path):
    """A gradient sampler's whitened chain state (of ``state``'s type) from a checkpoint
    file's exact record of it."""
    if not isinstance(content, dict) or set(content) != set(state._fields):
        raise damaged(state_file, "it lacks the gradient sampler's whitened state")
    shapes = {"position": (chains, dim), "logdensity": (chains,),
              "logdensity_grad": (chains, dim)}
    parts = [decode_array(content[f], f"whitened.{f}", f"checkpoint {state_file.parent}",
                          max_size=chains * dim, shape=shapes[f], dtype=dtype,
                          finite=True, error=CheckpointError) for f in state._fields]
    return type(state)(*parts)
