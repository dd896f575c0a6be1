"""Checkpoints of a walk: a directory that grows by whole segments, written atomically.

``walk(walker, key, draws, checkpoint="run.ckpt")`` keeps its progress in a directory:

``run.json``
    Written once, when the run begins: the run's identity (random key, draws, thin,
    chunk, chains, dimension, parameter names, float type, the tuning's scale and
    target acceptance, and SHA-256 digests of the proposal factor, the Laplace mode and
    the chains' starting states), its fingerprint (the SHA-256 of that identity), the
    walker's tuning record (:mod:`fisherwalk.persistence.tuningfile`) and the starting states.
``state.json``
    Small, replaced at every save: draws done, the SHA-256 digest of each complete
    segment (checked on resume: a segment edited into another valid file is refused),
    and the chains' state (position, log density) after the last saved draw.
``segment-000000.npz``, ``segment-000001.npz``, ...
    The kept draws, log densities, acceptance indicators, acceptance rates and faults
    of draws ``[start, stop)``, written once each.
``writer.lock``
    The kernel's advisory lock of the run that writes the directory
    (:mod:`fisherwalk.base.lock`): a second writer is refused, naming the first. The
    kernel releases it when its owner ends, however it ends, so a killed run's
    checkpoint continues with no flag. (A pid-file lock of an older fisherwalk whose
    owner died is reported as stale and broken only when asked,
    ``walk(..., checkpoint_reclaim=True)``.)

Every file is written through :func:`fisherwalk.base.files.write_atomic` (an
unpredictable temporary name created exclusively, never through a link, ``fsync``-ed
and renamed over its final name), and a directory holding anything but regular files
is refused. A segment is in place before the state file that counts it, so at
whatever instant the process dies, ``state.json`` lists complete segments only and a
resume continues from the last save. Each draw is written once and ``state.json`` has a
few bytes per segment, so the I/O of a run is proportional to its draws; rewriting one file with
all the draws at every save would make it grow with draws x saves.

Saves happen at most every ``checkpoint_every`` seconds (0: after every chunk), at the
end of the run, and when Ctrl-C stops it. A resumed run is bit-identical to an
uninterrupted one: step ``s`` reads the Philox counters that belong to ``s`` alone
(:func:`fisherwalk.base.keys.step_noise`) and the chains' state is restored exactly.

Only JSON (:mod:`fisherwalk.base.jsonio`, sizes and depth bounded before reading) and
``np.load(..., allow_pickle=False)`` of bytes whose size and digest were checked are read
back, so a checkpoint cannot execute code, and every malformed content raises
:class:`~fisherwalk.errors.CheckpointError`. The fingerprint covers every field a resume
uses (the run's settings, the whole tuning record: shape, scale, whitening, Fisher
information, Cholesky factor, mode; the starting states). A checkpoint of another run
is refused, never overwritten.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import re
import time
import warnings
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..base.checks import positive_number, whole_number
from ..base.files import check_folder, fsync_folder, write_atomic
from ..base.jsonio import encode_array, write_json_atomic
from ..base.lock import LOCK_FILE, Lock, acquire_lock
from ..base.meshes import failed_processes
from ..engine.loop import ChainState
from ..errors import CheckpointError, FisherwalkWarning, explain
from .checkpoint_files import (
    FORMAT,
    FORMAT_VERSION,
    RUN_FILE,
    SEGMENT_NAME,
    SEGMENT_PATTERN,
    STATE_FILE,
    check_start_whitened,
    damaged,
    decode_state,
    load_segment,
    read_checkpoint_json,
    whitened_state,
)
from .checkpoint_identity import differences, fingerprint_of, identity, legacy_fingerprint
from .segments import (
    changed_field,
    segment_data,
    state_bytes,
    whitened_digests,
)
from .tuningfile import tuning_record
from .tuningread import MAX_RECORD_BYTES

__all__ = ["Store", "DEFAULT_EVERY", "RUN_FILE", "STATE_FILE", "read_checkpoint_json",
           "decode_state", "damaged", "whitened_state", "MAX_CHAINS", "open_store",
           "check_start_whitened"]

DEFAULT_EVERY = 10.0  # seconds between saves
MAX_CHAINS = 1_000_000
_TMP_RE = re.compile(r"^\.(run\.json|state\.json|segment-\d{6}\.npz)\.[A-Za-z0-9_]+\.tmp$")



def open_store(path, walker, rng_key, draws: int, thin: int, chunk: int, *,
                every: float = DEFAULT_EVERY, reclaim: bool = False) -> Store:
    """:class:`Store`, opened on every process of a ``jax.distributed`` run together: each
    process reports whether it opened its checkpoint (one tiny all-gather,
    :func:`fisherwalk.base.meshes.failed_processes`), so that when one is refused (its
    lock held by another process given the same folder, a damaged file, ...) it ends with
    its own error and the others end too, naming it, instead of waiting for it in the
    sampling's collectives until killed. With one process, just :class:`Store`."""
    try:
        store = Store(path, walker, rng_key, draws, thin, chunk, every=every, reclaim=reclaim)
    except Exception:
        failed_processes(False)  # tell the others, then end with this process's error
        raise
    failed = failed_processes(True)
    if failed:
        store.close()
        raise CheckpointError(explain(
            f"Process(es) {', '.join(map(str, failed))} of this jax.distributed run could "
            "not open their checkpoint; this process stops too, instead of waiting for "
            "them.", f"walk(checkpoint={os.fspath(path)!r}), process {jax.process_index()}",
            "see the error of the process(es) named; give each process its own checkpoint "
            "folder, e.g. checkpoint=f\"run.ckpt/{jax.process_index()}\"."))
    return store


def _check_every(every: Any) -> float:
    return positive_number(every, "checkpoint_every", "walk(checkpoint_every=...)",
                           allow_zero=True,
                           todo=f"pass e.g. {DEFAULT_EVERY} (seconds), or 0 to save after "
                                "every chunk.")


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
    reclaim
        Break a stale lock (left by a run on this host that no longer runs).

    The directory's lock is held from construction until :meth:`close` (call it in a
    ``finally``).

    Raises
    ------
    CheckpointError
        The path is a file or a directory of something else, holds entries that are not
        regular files, is being written by another run (or holds a stale lock and
        ``reclaim`` is False), holds a checkpoint of another run (the message says what
        differs), or is damaged.
    """

    def __init__(self, path, walker, rng_key, draws: int, thin: int, chunk: int, *,
                 every: float = DEFAULT_EVERY, reclaim: bool = False):
        self.path = Path(path)
        self.every = _check_every(every)
        self.draws, self.chunk = int(draws), int(chunk)
        self.identity = identity(walker, rng_key, draws, thin, chunk)
        self.fingerprint = fingerprint_of(self.identity)
        self._done = 0
        self._segments = 0
        self._digests: list[str] = []
        self._last = time.monotonic()
        self._saved_whitened: str | None = None
        self.lock: Lock | None = None
        # a family whose chain state holds more than the kept draw (a gradient family's
        # whitened position, log density and gradient) has it saved whole, exactly
        self._whole_state = bool(walker.family.stores_state)
        self._open(walker, bool(reclaim))

    # -- opening

    def _where(self) -> str:
        return f"walk(checkpoint={os.fspath(self.path)!r})"

    def _refuse(self, what: str, todo: str) -> CheckpointError:
        return CheckpointError(explain(what, self._where(), todo))

    def close(self) -> None:
        """Release the directory's lock (idempotent)."""
        if self.lock is not None:
            self.lock.release()

    def _open(self, walker, reclaim: bool) -> None:
        p = self.path
        if p.is_symlink() or (p.exists() and not p.is_dir()):
            raise self._refuse(
                f"{p} is a file or a link; a checkpoint is a directory.",
                "pass a directory path (e.g. 'run.ckpt') that does not exist yet or holds a "
                "checkpoint of this run; the file is left untouched.")
        if not p.exists():
            try:
                p.mkdir(parents=True)
            except OSError as err:
                raise self._refuse(f"The directory {p} cannot be created ({err.strerror}).",
                                   "pass a path in a writable folder.") from err
            fsync_folder(p.parent)
        check_folder(p, error=CheckpointError, where=self._where())
        self.lock = acquire_lock(p, break_stale=reclaim, error=CheckpointError,
                                 where=self._where(),
                                 break_hint="pass checkpoint_reclaim=True (to walk or resume)")
        try:
            if self.lock.broken is not None:
                warnings.warn(f"The stale lock of {p} (process {self.lock.broken.pid}, "
                              f"since {self.lock.broken.started}) was broken; this run "
                              "continues the checkpoint.", FisherwalkWarning, stacklevel=4)
            self._open_locked(walker)
        except BaseException:
            self.close()
            raise

    def _open_locked(self, walker) -> None:
        p = self.path
        names = check_folder(p, error=CheckpointError, where=self._where())
        run_file = p / RUN_FILE
        if RUN_FILE in names:
            run = read_checkpoint_json(run_file, max_bytes=2 * MAX_RECORD_BYTES)
            if run["fingerprint"] == legacy_fingerprint(self.identity):
                # written before the whitened starting states were digested: this walker's
                # own state is used, so nothing in run.json's start reaches the chains
                self.identity = {**self.identity, "digests": {
                    k: v for k, v in self.identity["digests"].items() if k != "whitened"}}
                self.fingerprint = run["fingerprint"]
            if run["fingerprint"] != self.fingerprint:
                there = run.get("identity") if isinstance(run.get("identity"), dict) else {}
                diffs = differences(there, self.identity) or ["its fingerprint differs"]
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
            if fingerprint_of(run.get("identity")) != self.fingerprint:
                raise damaged(run_file, "its identity does not match its fingerprint")
            return
        others = [n for n in names if n != LOCK_FILE and not _TMP_RE.match(n)]
        if others:
            raise self._refuse(
                f"The directory {p} holds other files ({', '.join(others[:4])}) and no "
                f"{RUN_FILE}: it is not a fisherwalk checkpoint.",
                "pass a new directory path for the checkpoint; nothing was written.")
        run = {
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "fingerprint": self.fingerprint,
            "identity": self.identity,
            "record": tuning_record(walker),
            "start": {"position": encode_array(walker.flat_positions()),
                      "logdensity": encode_array(walker.state.logdensity),
                      "whitened": {f: encode_array(getattr(walker.state, f))
                                   for f in walker.state._fields}
                                  if walker.family.stores_state else None},
        }
        write_json_atomic(run_file, run, indent=None, error=CheckpointError,
                          where=self._where())

    # -- reading

    def _read_state(self, chains: int, dim: int) -> dict | None:
        file = self.path / STATE_FILE
        if not file.exists():
            if any(SEGMENT_PATTERN.match(f) for f in os.listdir(self.path)):
                raise damaged(file, "it is missing while segment files exist")
            return None  # the process stopped before its first save
        state = read_checkpoint_json(file, max_bytes=state_bytes(chains, dim, self.draws,
                                                                 self.chunk))
        if state["fingerprint"] != self.fingerprint:
            raise damaged(file, "it was written for another run than run.json")
        done, digests = state.get("done"), state.get("digests")
        try:
            done = whole_number(done, "done", "state", minimum=0, maximum=self.draws,
                                error=CheckpointError)
        except CheckpointError as err:
            raise damaged(file, f"done={done!r:.40} is not a number of draws") from err
        if (not isinstance(digests, list) or len(digests) > self.draws
                or state.get("segments") != len(digests)
                or not all(isinstance(d, str) and re.fullmatch(r"[0-9a-f]{64}", d)
                           for d in digests)):
            raise damaged(file, "'digests' is not a list of SHA-256 digests")
        if (done % self.chunk and done != self.draws) or (done == 0) != (not digests):
            raise damaged(file, f"done={done} is not a chunk boundary")
        state["done"] = done
        if done:
            state["position"], state["logdensity"] = decode_state(
                state, file, self._dtype, chains, dim)
        return state

    def restore(self, collector, state: ChainState) -> ChainState:
        """Fill ``collector`` with the saved draws; return the chains' state to continue
        from (``state``, the walker's own, when nothing was saved yet)."""
        chains, _, dim = collector.flat.shape
        self._dtype = collector.flat.dtype
        saved = self._read_state(chains, dim)
        if saved is None:
            return state
        done, digests = saved["done"], saved["digests"]
        stop = 0
        for index, recorded in enumerate(digests):
            stop, self._saved_whitened = load_segment(
                self.path, index, stop, recorded, collector, self.fingerprint, self.draws)
        state_file = self.path / STATE_FILE
        if stop != done:
            raise damaged(state_file, f"it counts {done} draws, the segments hold {stop}")
        if done:
            position, logdensity = saved["position"], saved["logdensity"]
            if not (np.array_equal(position, collector.flat[:, done - 1])
                    and np.array_equal(logdensity, collector.logdensity[:, done - 1])):
                raise damaged(state_file, "the chains' state is not the last saved draw")
        collector.done = done
        self._done, self._segments, self._digests = done, len(digests), list(digests)
        self._tidy()
        if not done:
            return state
        if self._whole_state:  # the family's whole chain state, saved exactly
            return self._whitened(saved, state, chains, dim)
        return ChainState(jnp.asarray(collector.flat[:, done - 1]),
                          jnp.asarray(collector.logdensity[:, done - 1]))

    def _whitened(self, saved: dict, state, chains: int, dim: int):
        file = self.path / STATE_FILE
        restored = whitened_state(saved.get("whitened"), state, chains, dim,
                                  str(self._dtype), file)
        if self._saved_whitened is not None:  # the last segment records what was saved with it
            field = changed_field(self._saved_whitened, restored, "whitened.")
            if field is not None:
                raise damaged(file, f"'{field}' is not the gradient sampler's state saved "
                                    "with the last segment (its SHA-256 differs): the file "
                                    "was edited")
        return restored

    def _tidy(self) -> None:
        """Remove temporary files and segments no state file counts (a process died
        between writing them and the state file)."""
        for name in os.listdir(self.path):
            match = SEGMENT_PATTERN.match(name)
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
        data = segment_data(collector, start, done, self.fingerprint,
                            whitened_digests(state if self._whole_state else None))
        write_atomic(self.path / SEGMENT_NAME.format(index), lambda handle: handle.write(data),
                     error=CheckpointError, where=self._where())
        digests = [*self._digests, hashlib.sha256(data).hexdigest()]
        write_json_atomic(self.path / STATE_FILE, {
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "fingerprint": self.fingerprint,
            "done": int(done),
            "segments": len(digests),
            "digests": digests,
            "position": encode_array(collector.flat[:, done - 1]),
            "logdensity": encode_array(collector.logdensity[:, done - 1]),
            # a gradient family's chains continue from their whitened state (position,
            # log density, gradient), saved exactly so that a resume is bit-identical
            "whitened": None if state is None or not self._whole_state
            else {f: encode_array(getattr(state, f)) for f in state._fields},
        }, indent=None, error=CheckpointError, where=self._where())
        self._done, self._segments, self._digests, self._last = done, index + 1, digests, now


