"""One writer per folder: a lock file created exclusively, naming its owner.

:func:`acquire_lock` creates ``<folder>/writer.lock`` with
``O_CREAT | O_EXCL | O_WRONLY | O_NOFOLLOW``: the system creates it for exactly one
process, and never through a planted link. It holds JSON (:mod:`.jsonio`)
``{"pid", "host", "started", "token"}``. A second writer finds the file and is refused
with the owner's process id, host and start time, and what to do.

A lock whose owner is on this host and no longer running (``os.kill(pid, 0)`` reports
no such process) is stale: it is reported as such, and removed only when the caller asks
(``break_stale=True``). A lock from another host, or one that cannot be read, is never
broken automatically: this process cannot tell whether its owner still runs.

Limits. A pid can be reused by an unrelated process after the owner died (then the lock
looks alive and the user deletes it by hand, as the message says). Two processes
breaking the same stale lock at the same instant could both proceed; breaking is a
deliberate step for one user, not a race to win.
"""

from __future__ import annotations

import contextlib
import os
import secrets
import socket
from datetime import UTC, datetime
from pathlib import Path
from typing import NamedTuple

from ..errors import FisherwalkError, InputError, explain
from .files import fsync_folder, read_bytes
from .jsonio import dumps, loads

__all__ = ["LOCK_FILE", "LockOwner", "Lock", "acquire_lock", "read_lock", "pid_alive"]

LOCK_FILE = "writer.lock"
_MAX_LOCK_BYTES = 4096
_FLAGS = os.O_CREAT | os.O_EXCL | os.O_WRONLY | getattr(os, "O_NOFOLLOW", 0)


class LockOwner(NamedTuple):
    """Who holds a lock."""

    pid: int  # process id
    host: str  # socket.gethostname() of the owner
    started: str  # ISO 8601 UTC time the lock was taken
    token: str  # random, tells this holder from a later one with the same pid


def pid_alive(pid: int) -> bool:
    """Whether a process with this id runs on this host (a process of another user
    counts as running)."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # PermissionError: it exists, owned by someone else
        return True
    return True


def read_lock(path: str | os.PathLike) -> LockOwner | None:
    """The owner written in a lock file, or None when the file is missing, is not a
    regular file, or does not hold a well-formed owner."""
    try:
        content = loads(read_bytes(path, max_bytes=_MAX_LOCK_BYTES, follow_symlinks=False)
                        .decode("utf-8"), max_depth=2)
    except (FisherwalkError, UnicodeDecodeError):
        return None
    if not isinstance(content, dict) or set(content) != set(LockOwner._fields):
        return None
    pid = content["pid"]
    if isinstance(pid, bool) or not isinstance(pid, int) or not 0 < pid < 2**31:
        return None
    if not all(isinstance(content[f], str) for f in ("host", "started", "token")):
        return None
    return LockOwner(**content)


class Lock:
    """A lock held by this process; :meth:`release` it, or use it in a ``with`` block."""

    __slots__ = ("path", "owner", "broken", "_held")

    def __init__(self, path: Path, owner: LockOwner, broken: LockOwner | None = None):
        self.path, self.owner, self._held = path, owner, True
        self.broken = broken  # the stale owner whose lock was broken to take this one

    @property
    def held(self) -> bool:
        return self._held

    def release(self) -> None:
        """Remove the lock file if it is still this holder's (idempotent; never raises)."""
        if not self._held:
            return
        self._held = False
        if read_lock(self.path) == self.owner:
            with contextlib.suppress(OSError):
                os.unlink(self.path)
                fsync_folder(self.path.parent)

    def __enter__(self) -> Lock:
        return self

    def __exit__(self, *exc) -> None:
        self.release()

    def __repr__(self) -> str:
        state = "held" if self._held else "released"
        return f"Lock({os.fspath(self.path)!r}, pid={self.owner.pid}, {state})"


def _refusal(path: Path, holder: LockOwner | None, host: str, where: str,
             break_hint: str) -> str:
    folder = path.parent
    remove = f"delete {path}"
    if holder is None:
        return explain(f"The folder {folder} is locked, and the lock file {path} cannot be "
                       "read (being written this instant, or damaged).", where,
                       f"wait a moment and retry; if no other fisherwalk run writes to "
                       f"{folder}, {remove} and retry.")
    who = f"process {holder.pid} on host {holder.host!r}, since {holder.started}"
    if holder.host != host:
        return explain(f"The folder {folder} is in use by {who}.", where,
                       f"wait for that run to finish or use another folder; if it has "
                       f"ended without releasing the lock, {remove}.")
    if pid_alive(holder.pid):
        this = " (this very process: is another walk still writing here?)" \
            if holder.pid == os.getpid() else ""
        return explain(f"The folder {folder} is in use by {who}{this}: only one run may "
                       "write it at a time.", where,
                       "wait for that run to finish or stop it, or use another folder; if "
                       f"that process is not a fisherwalk run (a reused process id), {remove}.")
    return explain(f"The folder {folder} holds a stale lock: it was taken by {who}, and that "
                   "process no longer runs (it ended without releasing the lock).", where,
                   f"if no other run writes to {folder}, {break_hint} to break the lock and "
                   "continue.")


def acquire_lock(folder: str | os.PathLike, *, break_stale: bool = False,
                 name: str = LOCK_FILE, error: type[FisherwalkError] = InputError,
                 where: str | None = None,
                 break_hint: str = "acquire the lock with break_stale=True") -> Lock:
    """Take the lock of ``folder`` for this process.

    Parameters
    ----------
    folder
        An existing folder.
    break_stale
        Remove a stale lock (owner on this host, no longer running) and take it.
    name
        The lock file's name inside ``folder``.
    error, where
        The package error to raise and where to say it happened.
    break_hint
        How the user asks for ``break_stale`` (e.g. an option name), for the message.

    Returns
    -------
    Lock
        Held by this process; ``Lock.broken`` is the stale owner removed, if any (say
        so to the user).

    Raises
    ------
    error
        Another owner holds the lock (the message names its pid, host and start), the
        lock is stale and ``break_stale`` is False, or the lock file cannot be created.
    """
    path = Path(folder) / name
    where = where or f"folder {os.fspath(folder)}"
    host = socket.gethostname()
    owner = LockOwner(os.getpid(), host, datetime.now(UTC).isoformat(timespec="seconds"),
                      secrets.token_hex(8))
    broken = None
    for _ in range(3):  # a lock released or broken meanwhile is retried
        try:
            fd = os.open(path, _FLAGS, 0o644)
        except FileExistsError:
            holder = read_lock(path)
            if holder is None and not os.path.lexists(path):
                continue  # released between our attempt and the read
            stale = (holder is not None and holder.host == host
                     and not pid_alive(holder.pid))
            if stale and break_stale and read_lock(path) == holder:
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(path)
                broken = holder
                continue
            raise error(_refusal(path, holder, host, where, break_hint)) from None
        except OSError as err:
            raise error(explain(f"The lock file {path} cannot be created ({err.strerror}).",
                                where, "check that the folder exists and is writable.")) from err
        try:
            with os.fdopen(fd, "wb") as handle:
                handle.write(dumps(owner._asdict()).encode("utf-8"))
                handle.flush()
                os.fsync(handle.fileno())
        except BaseException as err:
            with contextlib.suppress(OSError):
                os.unlink(path)
            if isinstance(err, OSError):
                raise error(explain(f"The lock file {path} cannot be written "
                                    f"({err.strerror}).", where,
                                    "check the free space of the folder.")) from err
            raise
        fsync_folder(path.parent)
        return Lock(path, owner, broken)
    raise error(explain(f"The lock of {path.parent} changed hands repeatedly.", where,
                        "make sure a single run writes to this folder, then retry."))
