"""Checkpoints of a walk: a directory that grows by whole segments, written atomically.

``walk(walker, key, draws, checkpoint="run.ckpt")`` keeps its progress in a directory:

``run.json``
    Written once, when the run begins: the run's identity (random key, draws, thin,
    chunk, chains, dimension, parameter names, float type, the tuning's scale and
    target acceptance, and SHA-256 digests of the proposal factor, the Laplace mode and
    the chains' starting states), its fingerprint (the SHA-256 of that identity), the
    walker's tuning record (:mod:`fisherwalk.run.tuningfile`) and the starting states.
``state.json``
    Small and of fixed size, replaced at every save: draws done, the number of complete
    segments, and the chains' state (position, log density) after the last saved draw.
``segment-000000.npz``, ``segment-000001.npz``, ...
    The kept draws, log densities, acceptance indicators, acceptance rates and faults
    of draws ``[start, stop)``, written once each.

Every file is written to a temporary file in the same directory, flushed, ``fsync``-ed
and renamed over its final name (``os.replace`` is atomic), then the directory is
``fsync``-ed. A segment is in place before the state file that counts it, so at
whatever instant the process dies, ``state.json`` lists complete segments only and a
resume continues from the last save. Each draw is written once and ``state.json`` has a
fixed size, so the I/O of a run is proportional to its draws; rewriting one file with
all the draws at every save would make it grow with draws x saves.

Saves happen at most every ``checkpoint_every`` seconds (0: after every chunk), at the
end of the run, and when Ctrl-C stops it. A resumed run is bit-identical to an
uninterrupted one: step ``s`` reads the Philox counters that belong to ``s`` alone
(:func:`fisherwalk.base.keys.step_noise`) and the chains' state is restored exactly.

Only JSON and ``np.load(..., allow_pickle=False)`` are read back, so a checkpoint cannot
execute code. A checkpoint of another run is refused, never overwritten.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import math
import os
import re
import time
import zipfile
import zlib
from collections.abc import Callable
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..base.keys import key_data
from ..base.pytrees import name_difference
from ..errors import CheckpointError, InputError, explain
from .engine import ChainState
from .tuningfile import tuning_record

__all__ = ["Store", "DEFAULT_EVERY", "RUN_FILE", "STATE_FILE", "read_json", "decode",
           "damaged"]

FORMAT = "fisherwalk-checkpoint"
FORMAT_VERSION = 1
DEFAULT_EVERY = 10.0  # seconds between saves
RUN_FILE = "run.json"
STATE_FILE = "state.json"
_SEGMENT = "segment-{:06d}.npz"
_SEGMENT_RE = re.compile(r"^segment-(\d{6})\.npz$")
_TMP_RE = re.compile(r"^\.(run\.json|state\.json|segment-\d{6}\.npz)\.\d+\.tmp$")
_ARRAYS = ("flat", "logdensity", "accepted", "acceptance_rate", "faults")


# ----------------------------------------------------------------------------- files


def _fsync_dir(directory: Path) -> None:
    """Make a rename durable (POSIX); a no-op where directories cannot be opened."""
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _write_atomic(path: Path, write: Callable) -> None:
    """Write through a temporary file in the same directory, fsync, rename."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "wb") as handle:
            write(handle)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    _fsync_dir(path.parent)


def _write_json(path: Path, content: dict) -> None:
    text = json.dumps(content, allow_nan=False, separators=(",", ":"))
    _write_atomic(path, lambda handle: handle.write(text.encode("utf-8")))


def _encode(array: Any) -> dict:
    """An array as JSON: shape and a flat list of floats; a non-finite value is written
    explicitly as the string "nan", "inf" or "-inf"."""
    values = np.asarray(array, dtype=np.float64)
    flat = [v if math.isfinite(v) else repr(v) for v in values.ravel().tolist()]
    return {"shape": list(values.shape), "values": flat}


def decode(content: Any, dtype, shape: tuple) -> np.ndarray:
    """The inverse of :func:`_encode`; ValueError when malformed."""
    if not isinstance(content, dict) or content.get("shape") != list(shape):
        raise ValueError(f"an array of shape {shape} was expected")
    values = content.get("values")
    if not isinstance(values, list) or len(values) != math.prod(shape):
        raise ValueError("wrong number of values")
    for v in values:
        if isinstance(v, bool) or not (isinstance(v, int | float) or v in ("nan", "inf", "-inf")):
            raise ValueError(f"{v!r} is not a number")
    return np.asarray([float(v) for v in values], dtype=np.float64).astype(dtype).reshape(shape)


def _digest(array: Any) -> str:
    a = np.ascontiguousarray(np.asarray(array))
    h = hashlib.sha256()
    h.update(a.dtype.str.encode())
    h.update(repr(a.shape).encode())
    h.update(a.tobytes())
    return h.hexdigest()


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


def _refuse_constant(name: str):
    raise ValueError(f"{name} is not allowed")


def read_json(file: Path) -> dict:
    try:
        with open(file, "rb") as handle:
            content = json.loads(handle.read().decode("utf-8"), parse_constant=_refuse_constant)
    except OSError as err:
        raise damaged(file, f"it cannot be read ({err.strerror})") from err
    except (UnicodeDecodeError, ValueError) as err:
        raise damaged(file, f"it is not valid JSON ({err})") from err
    if not isinstance(content, dict) or content.get("format") != FORMAT:
        raise damaged(file, "it is not a fisherwalk checkpoint file")
    if content.get("format_version") != FORMAT_VERSION:
        raise damaged(file, f"format version {content.get('format_version')!r}, this "
                             f"fisherwalk reads {FORMAT_VERSION}")
    if not isinstance(content.get("fingerprint"), str):
        raise damaged(file, "it has no fingerprint")
    return content


def _whole(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and value >= 0


# ----------------------------------------------------------------------------- identity


def _identity(walker, key, draws: int, thin: int, chunk: int) -> dict:
    positions = np.asarray(walker.flat_positions())
    logdensity = np.asarray(walker.state.logdensity)
    tuning = walker.tuning
    return {
        "draws": int(draws),
        "thin": int(thin),
        "chunk": int(chunk),
        "chains": int(positions.shape[0]),
        "dim": int(positions.shape[1]),
        "names": list(walker.names),
        "dtype": str(logdensity.dtype),
        "key": {"impl": str(jax.random.key_impl(key)), "data": key_data(key).tolist()},
        "tuning": {"scale": float(tuning.scale),
                   "target_acceptance": float(tuning.target_acceptance),
                   "shape_kind": str(tuning.shape_kind)},
        "digests": {"factor": _digest(tuning.factor),
                    "mode": _digest(walker.report.laplace.mode_flat),
                    "states": _digest(positions) + _digest(logdensity)},
    }


def _fingerprint(identity: dict) -> str:
    text = json.dumps(identity, sort_keys=True, allow_nan=False, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _differences(there: dict, here: dict) -> list[str]:
    """What differs between a checkpoint's run and this one, in words."""
    out = []
    if there.get("dim") != here["dim"]:
        out.append(f"dimension {there.get('dim')} in the checkpoint, {here['dim']} here")
    elif there.get("names") != here["names"]:
        out.append("other parameters: " + name_difference(
            tuple(there.get("names") or ()), tuple(here["names"]),
            there="the checkpoint", here="this walker"))
    if there.get("dtype") != here["dtype"]:
        out.append(f"float type {there.get('dtype')} in the checkpoint, {here['dtype']} here "
                   "(set jax_enable_x64 as in the original run)")
    for field in ("chains", "draws", "thin", "chunk"):
        if there.get(field) != here[field]:
            out.append(f"{field}={there.get(field)} in the checkpoint, {field}={here[field]} here")
    if there.get("key") != here["key"]:
        out.append("another random key")
    digests = there.get("digests") or {}
    if there.get("tuning") != here["tuning"] or digests.get("factor") != here["digests"]["factor"]:
        old = there.get("tuning") or {}
        out.append(f"another proposal (scale {old.get('scale')} in the checkpoint, "
                   f"{here['tuning']['scale']} here)")
    if digests.get("mode") != here["digests"]["mode"]:
        out.append("another Laplace mode (another model or data set?)")
    if digests.get("states") != here["digests"]["states"]:
        out.append("other starting states of the chains (another start() or refine() call)")
    return out


def _check_every(every: Any) -> float:
    if (isinstance(every, bool) or not isinstance(every, int | float | np.number)
            or not math.isfinite(every) or every < 0):
        raise InputError(explain(f"checkpoint_every={every!r} is not a number of seconds >= 0.",
                                 "walk(checkpoint_every=...)",
                                 f"pass e.g. {DEFAULT_EVERY} (seconds), or 0 to save after "
                                 "every chunk."))
    return float(every)


# ----------------------------------------------------------------------------- the store


class Store:
    """The checkpoint of one walk (see the module docstring for the layout).

    Parameters
    ----------
    path
        The checkpoint directory (created if missing; e.g. ``"run.ckpt"``).
    walker, rng_key, draws, thin, chunk
        The run, as given to :func:`fisherwalk.walk`.
    every
        Seconds between saves (0: after every chunk).

    Raises
    ------
    CheckpointError
        The path is a file or a directory of something else, or holds a checkpoint of
        another run (the message says what differs), or is damaged.
    """

    def __init__(self, path, walker, rng_key, draws: int, thin: int, chunk: int, *,
                 every: float = DEFAULT_EVERY):
        self.path = Path(path)
        self.every = _check_every(every)
        self.draws, self.chunk = int(draws), int(chunk)
        self.identity = _identity(walker, rng_key, draws, thin, chunk)
        self.fingerprint = _fingerprint(self.identity)
        self._done = 0
        self._segments = 0
        self._last = time.monotonic()
        self._open(walker)

    # -- opening

    def _refuse(self, what: str, todo: str) -> CheckpointError:
        return CheckpointError(explain(what, f"walk(checkpoint={os.fspath(self.path)!r})", todo))

    def _open(self, walker) -> None:
        p = self.path
        if p.exists() and not p.is_dir():
            raise self._refuse(
                f"{p} is a file; a checkpoint is a directory.",
                "pass a directory path (e.g. 'run.ckpt') that does not exist yet or holds a "
                "checkpoint of this run; the file is left untouched.")
        run_file = p / RUN_FILE
        if run_file.exists():
            run = read_json(run_file)
            if run["fingerprint"] != self.fingerprint:
                there = run.get("identity") if isinstance(run.get("identity"), dict) else {}
                diffs = _differences(there, self.identity) or ["its fingerprint differs"]
                same_model = not any(d.startswith(("dimension", "other param", "another Lap"))
                                     for d in diffs)
                hint = ""
                if same_model and there.get("draws") != self.identity["draws"]:
                    hint = (f" To continue that run, call walk() with draws={there.get('draws')}, "
                            f"thin={there.get('thin')}, chunk={there.get('chunk')}.")
                raise self._refuse(
                    f"The checkpoint {p} belongs to another run: {'; '.join(diffs)}.",
                    f"pass another checkpoint path for this run, or delete {p} if its draws "
                    f"are no longer needed (a checkpoint is never overwritten).{hint}")
            return
        if p.is_dir():
            others = sorted(f for f in os.listdir(p) if not _TMP_RE.match(f))
            if others:
                raise self._refuse(
                    f"The directory {p} holds other files ({', '.join(others[:4])}) and no "
                    f"{RUN_FILE}: it is not a fisherwalk checkpoint.",
                    "pass a new directory path for the checkpoint; nothing was written.")
        else:
            p.mkdir(parents=True)
            _fsync_dir(p.parent)
        run = {
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "fingerprint": self.fingerprint,
            "identity": self.identity,
            "record": tuning_record(walker),
            "start": {"position": _encode(walker.flat_positions()),
                      "logdensity": _encode(walker.state.logdensity)},
        }
        _write_json(run_file, run)

    # -- reading

    def _read_state(self) -> dict | None:
        file = self.path / STATE_FILE
        if not file.exists():
            if any(_SEGMENT_RE.match(f) for f in os.listdir(self.path)):
                raise damaged(file, "it is missing while segment files exist")
            return None  # the process stopped before its first save
        state = read_json(file)
        if state["fingerprint"] != self.fingerprint:
            raise damaged(file, "it was written for another run than run.json")
        done, segments = state.get("done"), state.get("segments")
        if not (_whole(done) and _whole(segments)) or done > self.draws:
            raise damaged(file, f"done={done!r} and segments={segments!r} are not valid")
        if (done % self.chunk and done != self.draws) or (done == 0) != (segments == 0):
            raise damaged(file, f"done={done} is not a chunk boundary")
        return state

    def _load_segment(self, index: int, start: int, collector) -> int:
        file = self.path / _SEGMENT.format(index)
        if not file.exists():
            raise damaged(file, "the segment file is missing")
        try:
            with np.load(file, allow_pickle=False) as data:
                arrays = {name: data[name] for name in (*_ARRAYS, "start", "stop", "fingerprint")}
        except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile, zlib.error) as err:
            raise damaged(file, f"it cannot be read ({type(err).__name__}: {err})") from err
        if str(arrays["fingerprint"]) != self.fingerprint:
            raise damaged(file, "the segment was written for another run")
        first, stop = int(arrays["start"]), int(arrays["stop"])
        if first != start or not start < stop <= self.draws:
            raise damaged(file, f"it holds draws {first} to {stop}, expected draws from {start}")
        chains, _, dim = collector.flat.shape
        for name, target in zip(_ARRAYS, (collector.flat, collector.logdensity, collector.accepted,
                                          collector.acceptance_rate, collector.faults),
                                strict=True):
            value = arrays[name]
            expected = (chains, stop - start, dim) if name == "flat" else (chains, stop - start)
            if value.shape != expected or value.dtype != target.dtype:
                raise damaged(file, f"'{name}' has shape {value.shape} and dtype {value.dtype}, "
                                     f"expected {expected} and {target.dtype}")
            target[:, start:stop] = value
        return stop

    def restore(self, collector, state: ChainState) -> ChainState:
        """Fill ``collector`` with the saved draws; return the chains' state to continue
        from (``state``, the walker's own, when nothing was saved yet)."""
        saved = self._read_state()
        if saved is None:
            return state
        done, segments = saved["done"], saved["segments"]
        stop = 0
        for index in range(segments):
            stop = self._load_segment(index, stop, collector)
        state_file = self.path / STATE_FILE
        if stop != done:
            raise damaged(state_file, f"it counts {done} draws, the segments hold {stop}")
        chains, _, dim = collector.flat.shape
        if done:
            try:
                position = decode(saved.get("position"), collector.flat.dtype, (chains, dim))
                logdensity = decode(saved.get("logdensity"), collector.flat.dtype, (chains,))
            except ValueError as err:
                raise damaged(state_file, f"the chains' state is malformed ({err})") from err
            if not (np.array_equal(position, collector.flat[:, done - 1])
                    and np.array_equal(logdensity, collector.logdensity[:, done - 1])):
                raise damaged(state_file, "the chains' state is not the last saved draw")
        collector.done = done
        self._done, self._segments = done, segments
        self._tidy()
        if not done:
            return state
        return ChainState(jnp.asarray(collector.flat[:, done - 1]),
                          jnp.asarray(collector.logdensity[:, done - 1]))

    def _tidy(self) -> None:
        """Remove temporary files and segments no state file counts (a process died
        between writing them and the state file)."""
        for name in os.listdir(self.path):
            match = _SEGMENT_RE.match(name)
            if _TMP_RE.match(name) or (match and int(match.group(1)) >= self._segments):
                with contextlib.suppress(OSError):
                    (self.path / name).unlink()

    # -- writing

    def save(self, collector, state: ChainState | None = None, *, force: bool = False) -> None:
        """Write the draws finished since the last save (one new segment), then the state.

        Skipped when less than ``every`` seconds passed since the last save, unless the
        run is complete or ``force``. The chains' state written is the last kept draw
        (which is what ``walk`` continues from), so ``state`` is not needed.
        """
        done = collector.done
        if done <= self._done:
            return
        now = time.monotonic()
        if not force and done < self.draws and now - self._last < self.every:
            return
        start, index = self._done, self._segments
        arrays = {name: getattr(collector, name)[:, start:done] for name in _ARRAYS}
        arrays.update(start=np.int64(start), stop=np.int64(done),
                      fingerprint=np.array(self.fingerprint))
        _write_atomic(self.path / _SEGMENT.format(index),
                      lambda handle: np.savez(handle, **arrays))
        _write_json(self.path / STATE_FILE, {
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "fingerprint": self.fingerprint,
            "done": int(done),
            "segments": index + 1,
            "position": _encode(collector.flat[:, done - 1]),
            "logdensity": _encode(collector.logdensity[:, done - 1]),
        })
        self._done, self._segments, self._last = done, index + 1, now
