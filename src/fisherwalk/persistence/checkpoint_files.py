"""Reading a checkpoint's files: the format's names, a JSON file bounded and checked, a
segment of draws checked member by member, the chains' stored state, and the refusal of a
damaged file (one message, naming the file and what is wrong)."""

from __future__ import annotations

import hashlib
import io
import re
import zipfile
import zlib
from pathlib import Path
from typing import Any

import numpy as np

from ..base.files import read_bytes
from ..base.jsonio import decode_array, read_json
from ..errors import CheckpointError, explain
from .segments import ARRAYS, OPTIONAL, changed_field, segment_bytes, segment_layout, segment_text

__all__ = ["FORMAT", "FORMAT_VERSION", "RUN_FILE", "STATE_FILE", "SEGMENT_NAME",
           "SEGMENT_PATTERN", "damaged", "first_clause", "read_checkpoint_json", "decode_state",
           "check_start_whitened", "whitened_state", "load_segment"]

FORMAT = "fisherwalk-checkpoint"
FORMAT_VERSION = 2  # 2: lock, segment digests, fingerprint over the whole tuning record
RUN_FILE = "run.json"
STATE_FILE = "state.json"
SEGMENT_NAME = "segment-{:06d}.npz"
SEGMENT_PATTERN = re.compile(r"^segment-(\d{6})\.npz$")


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


def load_segment(path: Path, index: int, start: int, digest: str, collector,
                 fingerprint: str, total: int) -> tuple[int, str | None]:
    """Copy segment ``index`` (draws from ``start``) into ``collector``, every member
    checked (digest, fingerprint, range, shapes and dtypes); return where it stops and the
    digests of the whitened state saved with it (None in segments older than them)."""
    file = path / SEGMENT_NAME.format(index)
    chains, draws, dim = collector.flat.shape
    limit = segment_bytes(segment_layout(collector, start, draws))
    if not file.exists():
        raise damaged(file, "the segment file is missing")
    try:
        data = read_bytes(file, max_bytes=limit, follow_symlinks=False,
                          error=CheckpointError, where=f"checkpoint {path}")
    except CheckpointError as err:
        raise damaged(file, first_clause(err)) from err
    if hashlib.sha256(data).hexdigest() != digest:
        raise damaged(file, "its SHA-256 digest is not the one state.json recorded when "
                            "it was written (the file was changed or replaced)")
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as content:
            arrays = {name: content[name]
                      for name in (*ARRAYS, "start", "stop", "fingerprint")}
            arrays.update({name: content[name] for name in OPTIONAL
                           if name in content.files})
            # "" in segments written before the whitened state was digested
            saved_whitened = segment_text(content["whitened"]) \
                if "whitened" in content.files else None
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile, zlib.error) as err:
        raise damaged(file, f"it cannot be read ({type(err).__name__}: {err})") from err
    if str(arrays["fingerprint"]) != fingerprint:
        raise damaged(file, "the segment was written for another run")
    first, stop = int(arrays["start"]), int(arrays["stop"])
    if first != start or not start < stop <= total:
        raise damaged(file, f"it holds draws {first} to {stop}, expected draws from {start}")
    for name in (*ARRAYS, *OPTIONAL):
        if name not in arrays:  # a segment written before the field was kept: NaN
            continue
        target = getattr(collector, name)
        value = arrays[name]
        expected = (chains, stop - start, dim) if name == "flat" else (chains, stop - start)
        if value.shape != expected or value.dtype != target.dtype:
            raise damaged(file, f"'{name}' has shape {value.shape} and dtype {value.dtype}, "
                                 f"expected {expected} and {target.dtype}")
        target[:, start:stop] = value
    if "energy" in arrays and np.isfinite(arrays["energy"]).any():
        collector.has_energy = True  # HMC or NUTS: the Trace carries the energy
    return stop, saved_whitened
