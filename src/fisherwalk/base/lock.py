"""One writer per folder: the kernel's advisory lock on ``<folder>/writer.lock``.

:func:`acquire_lock` opens (creating if needed) ``<folder>/writer.lock`` with
``O_NOFOLLOW`` (never through a planted link) and takes ``fcntl.flock(LOCK_EX |
LOCK_NB)`` on it. The kernel grants that lock to one open file at a time and releases it
when the holder's file is closed, which happens however the holder ends: a crash, a
``SIGKILL`` or a power cut leave no lock to reclaim, and a later run simply takes it. A
second writer while the first lives is refused, with the owner the file names (process
id, host, start time) and what to do.

The file holds the line ``fisherwalk-lock 2`` and then JSON (:mod:`.jsonio`)
``{"pid", "host", "started", "token"}``, written after the lock is taken. On release
the holder removes the file and then closes it; a process that opened the file before
the removal finds, once it holds the lock, that the path no longer names its file, and
starts again (so two processes never hold locks on two different files of one name).

Old lock files. Versions before this one wrote the JSON alone and judged the owner by
hand. For one release such a file is still judged by those rules: its owner on this host
and running (``os.kill(pid, 0)``), on another host, or unreadable: refused; on this host
and no longer running: stale, broken only when the caller asks (``break_stale=True``).

Limits. ``flock`` is local to one machine's kernel unless the file system forwards it:
Linux forwards it over NFS (v4, or v3 with the lock manager running) as a whole-file
POSIX lock, but some network or FUSE file systems (older NFS setups, SMB mounts without
lock support, sshfs) keep it local, and two machines could then both write one folder.
Keep a checkpoint on a local disk, or make sure one machine writes it.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import os
import secrets
import socket
import stat
from datetime import UTC, datetime
from pathlib import Path
from typing import NamedTuple

from ..errors import FisherwalkError, InputError, explain
from .files import fsync_folder, read_bytes
from .jsonio import dumps, loads

__all__ = ["LOCK_FILE", "LockOwner", "Lock", "acquire_lock", "read_lock", "pid_alive"]

LOCK_FILE = "writer.lock"
_MAX_LOCK_BYTES = 4096
_MAGIC = b"fisherwalk-lock 2\n"  # the first line of a lock file of this format
_FLAGS = (os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0)
          | getattr(os, "O_CLOEXEC", 0))


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


def _owner(content: bytes) -> LockOwner | None:
    """The owner in a lock file's bytes (either format), or None."""
    if content.startswith(_MAGIC):
        content = content[len(_MAGIC):]
    try:
        plain = loads(content.decode("utf-8"), max_depth=2)
    except (FisherwalkError, UnicodeDecodeError):
        return None
    if not isinstance(plain, dict) or set(plain) != set(LockOwner._fields):
        return None
    pid = plain["pid"]
    if isinstance(pid, bool) or not isinstance(pid, int) or not 0 < pid < 2**31:
        return None
    if not all(isinstance(plain[f], str) for f in ("host", "started", "token")):
        return None
    return LockOwner(**plain)


def _new_format(content: bytes) -> bool:
    """A lock file of this format (or one whose writer died before finishing its first
    line: empty, or a part of that line)."""
    return content.startswith(_MAGIC) or _MAGIC.startswith(content)


def read_lock(path: str | os.PathLike) -> LockOwner | None:
    """The owner written in a lock file, or None when the file is missing, is not a
    regular file, or does not hold a well-formed owner."""
    try:
        content = read_bytes(path, max_bytes=_MAX_LOCK_BYTES, follow_symlinks=False)
    except FisherwalkError:
        return None
    return _owner(content)


class Lock:
    """A lock held by this process; :meth:`release` it, or use it in a ``with`` block."""

    __slots__ = ("path", "owner", "broken", "_fd")

    def __init__(self, path: Path, owner: LockOwner, broken: LockOwner | None = None,
                 fd: int | None = None):
        self.path, self.owner, self._fd = path, owner, fd
        self.broken = broken  # the stale owner (old format) whose lock was broken

    @property
    def held(self) -> bool:
        return self._fd is not None

    def release(self) -> None:
        """Remove the lock file if it is still this holder's, then let the kernel's lock
        go (idempotent; never raises)."""
        fd, self._fd = self._fd, None
        if fd is None:
            return
        try:
            with contextlib.suppress(OSError):
                if _same_file(fd, self.path) and read_lock(self.path) == self.owner:
                    os.unlink(self.path)
                    fsync_folder(self.path.parent)
        finally:
            with contextlib.suppress(OSError):
                os.close(fd)  # releases the flock

    def __enter__(self) -> Lock:
        return self

    def __exit__(self, *exc) -> None:
        self.release()

    def __del__(self) -> None:  # a Lock dropped without release: the kernel lock goes
        fd = getattr(self, "_fd", None)
        if fd is not None:
            with contextlib.suppress(OSError):
                os.close(fd)

    def __repr__(self) -> str:
        state = "held" if self.held else "released"
        return f"Lock({os.fspath(self.path)!r}, pid={self.owner.pid}, {state})"


def _same_file(fd: int, path: Path) -> bool:
    """Whether ``path`` still names the file open as ``fd``."""
    try:
        here, there = os.fstat(fd), os.lstat(path)
    except OSError:
        return False
    return (here.st_dev, here.st_ino) == (there.st_dev, there.st_ino)


def _refusal(path: Path, holder: LockOwner | None, host: str, where: str,
             break_hint: str, *, held: bool) -> str:
    """The message refusing a lock: ``held`` when the kernel's lock is held by another
    open file (a live writer), else the judgement of an old-format file."""
    folder = path.parent
    remove = f"delete {path}"
    if holder is None:
        if held:
            return explain(f"The folder {folder} is in use by another process (it holds the "
                           f"lock {path} and has not yet written its name).", where,
                           "wait for that run to finish or use another folder.")
        return explain(f"The folder {folder} is locked, and the lock file {path} cannot be "
                       "read (damaged, or left by an older fisherwalk).", where,
                       f"if no other fisherwalk run writes to {folder}, {remove} and retry.")
    who = f"process {holder.pid} on host {holder.host!r}, since {holder.started}"
    if held:
        this = " (this very process: is another walk still writing here?)" \
            if holder.pid == os.getpid() and holder.host == host else ""
        return explain(f"The folder {folder} is in use by {who}{this}: only one run may "
                       "write it at a time.", where,
                       "wait for that run to finish or stop it, or use another folder.")
    # an old-format lock file, judged by the old rules
    if holder.host != host:
        return explain(f"The folder {folder} is in use by {who} (a lock file of an older "
                       "fisherwalk).", where,
                       f"wait for that run to finish or use another folder; if it has "
                       f"ended without releasing the lock, {remove}.")
    if pid_alive(holder.pid):
        return explain(f"The folder {folder} is in use by {who} (a lock file of an older "
                       "fisherwalk): only one run may write it at a time.", where,
                       "wait for that run to finish or stop it, or use another folder; if "
                       f"that process is not a fisherwalk run (a reused process id), {remove}.")
    return explain(f"The folder {folder} holds a stale lock of an older fisherwalk: it was "
                   f"taken by {who}, and that process no longer runs.", where,
                   f"if no other run writes to {folder}, {break_hint} to break the lock and "
                   "continue.")


def _open(path: Path, error: type[FisherwalkError], where: str) -> int:
    try:
        fd = os.open(path, _FLAGS, 0o644)
    except OSError as err:
        if err.errno == errno.ELOOP or os.path.islink(path):
            raise error(explain(f"The lock file {path} cannot be read: it is a symbolic "
                                "link, which fisherwalk does not follow.", where,
                                f"remove the link {path}; nothing was written.")) from err
        raise error(explain(f"The lock file {path} cannot be created ({err.strerror}).",
                            where, "check that the folder exists and is writable.")) from err
    info = os.fstat(fd)
    if not stat.S_ISREG(info.st_mode):
        os.close(fd)
        raise error(explain(f"The lock file {path} cannot be read: it is not a regular "
                            "file.", where, f"remove {path}; nothing was written."))
    return fd


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
        Break an old-format lock file whose owner (on this host) no longer runs. A lock
        of this format needs no breaking: the kernel released it when its owner ended.
    name
        The lock file's name inside ``folder``.
    error, where
        The package error to raise and where to say it happened.
    break_hint
        How the user asks for ``break_stale`` (e.g. an option name), for the message.

    Returns
    -------
    Lock
        Held by this process until :meth:`Lock.release` (or the process ends);
        ``Lock.broken`` is the stale old-format owner replaced, if any.

    Raises
    ------
    error
        A live process holds the lock (the message names its pid, host and start), an
        old-format lock is live, unreadable or stale (and ``break_stale`` is False), or
        the lock file cannot be created.
    """
    path = Path(folder) / name
    where = where or f"folder {os.fspath(folder)}"
    host = socket.gethostname()
    owner = LockOwner(os.getpid(), host, datetime.now(UTC).isoformat(timespec="seconds"),
                      secrets.token_hex(8))
    for _ in range(5):  # a file removed by its releasing holder meanwhile: retried
        fd = _open(path, error, where)
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                raise error(_refusal(path, read_lock(path), host, where, break_hint,
                                     held=True)) from None
            if not _same_file(fd, path):
                os.close(fd)
                fd = None
                continue
            content = os.pread(fd, _MAX_LOCK_BYTES + 1, 0)
            broken = None
            if not _new_format(content):
                holder = _owner(content)
                stale = (holder is not None and holder.host == host
                         and not pid_alive(holder.pid))
                if not (stale and break_stale):
                    raise error(_refusal(path, holder, host, where, break_hint, held=False))
                broken = holder
            data = _MAGIC + dumps(owner._asdict()).encode("utf-8")
            os.ftruncate(fd, 0)
            os.pwrite(fd, data, 0)
            os.fsync(fd)
        except OSError as err:
            if fd is not None:
                os.close(fd)
            raise error(explain(f"The lock file {path} cannot be written ({err.strerror}).",
                                where, "check the folder's permissions and free space."
                                )) from err
        except BaseException:
            if fd is not None:
                os.close(fd)
            raise
        fsync_folder(path.parent)
        return Lock(path, owner, broken, fd)
    raise error(explain(f"The lock of {path.parent} changed hands repeatedly.", where,
                        "make sure a single run writes to this folder, then retry."))
