"""Safe file I/O: atomic writes that never follow a planted link, bounded reads, and the
checks on folders made before any work (a checkpoint folder, the command line's output).

Writing. :func:`write_atomic` creates its temporary file with :func:`tempfile.mkstemp`
in the target's own folder: an unpredictable name, opened with ``O_CREAT | O_EXCL``
(and ``O_NOFOLLOW`` where the system has it), so a symlink planted in the folder is never
followed and never written through. The data is written, flushed and ``fsync``-ed, the
file renamed over the target with :func:`os.replace` (atomic on POSIX: a reader sees the
old file or the new one, never a part), and the folder ``fsync``-ed so that the rename
survives a power cut. On any failure, Ctrl-C included, the temporary file is removed and
the old target is left as it was. A target that is a symlink, a folder or a device is
refused rather than replaced.

Reading. :func:`read_bytes` opens without blocking (a fifo planted in place of a file
cannot hang the reader), refuses anything but a regular file, and checks the size
before reading a byte.

Every refusal raises the package error the caller names (``error=``) with a message from
:func:`fisherwalk.errors.explain`; operating-system errors become that error too, with
the file and the system's reason.
"""

from __future__ import annotations

import contextlib
import os
import re
import shutil
import stat
import tempfile
from collections.abc import Callable, Collection
from pathlib import Path
from typing import BinaryIO

from ..errors import FisherwalkError, InputError, explain
from .checks import whole_number

__all__ = [
    "write_atomic",
    "write_text_atomic",
    "read_bytes",
    "fsync_folder",
    "check_folder",
    "check_output_folder",
]

TEMP_SUFFIX = ".tmp"  # temporary files are ".<target name>.<random>.tmp"
_DEFAULT_MODE = 0o644
_CHUNK = 2**20  # bytes per read: memory follows the file's real size, not the limit


def _where(path: Path, where: str | None) -> str:
    return where or f"file {os.fspath(path)}"


def _umask() -> int:
    """The process's umask, read without changing it (Linux); 0o022 when unknown."""
    with contextlib.suppress(OSError, ValueError):
        with open("/proc/self/status", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    return 0o022


def fsync_folder(folder: str | os.PathLike) -> None:
    """Make the creation, rename or removal of entries in ``folder`` durable (POSIX); a
    no-op where a folder cannot be opened (e.g. Windows)."""
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _target_mode(path: Path, error: type[FisherwalkError], where: str) -> int:
    """The permission bits the written file gets: the old target's, or 0o644 less the
    umask; refuses a target that is not a regular file."""
    try:
        info = os.lstat(path)
    except FileNotFoundError:
        return _DEFAULT_MODE & ~_umask()
    except OSError as err:
        raise error(explain(f"{path} cannot be inspected ({err.strerror}).", where,
                            "check the path and its permissions.")) from err
    if stat.S_ISLNK(info.st_mode):
        raise error(explain(f"{path} is a symbolic link; fisherwalk does not write through "
                            "links.", where, "remove the link or write to another path; "
                                             "nothing was written."))
    if not stat.S_ISREG(info.st_mode):
        raise error(explain(f"{path} exists and is not a regular file.", where,
                            "pass a file path that does not exist yet or is a regular file; "
                            "nothing was written."))
    return stat.S_IMODE(info.st_mode)


def write_atomic(path: str | os.PathLike, write: Callable[[BinaryIO], object], *,
                 error: type[FisherwalkError] = InputError, where: str | None = None) -> Path:
    """Write a file atomically: ``write(handle)`` fills a fresh temporary file in the same
    folder, which then replaces ``path`` (see the module docstring).

    Parameters
    ----------
    path
        The target file; its folder must exist.
    write
        Called once with a binary file handle open for writing.
    error, where
        The package error to raise and where to say it happened (default: the path).

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    error
        The target is a link or not a regular file, or the system refused a step
        (no space, no permission, no such folder), also inside ``write``. Other
        exceptions raised by ``write`` propagate unchanged; in every case the temporary
        file is removed.
    """
    path = Path(path)
    where = _where(path, where)
    mode = _target_mode(path, error, where)
    temp: str | None = None
    try:
        fd, temp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=TEMP_SUFFIX,
                                    dir=path.parent)
        with os.fdopen(fd, "wb") as handle:
            os.fchmod(handle.fileno(), mode)
            write(handle)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, path)
        temp = None
    except OSError as err:
        raise error(explain(f"{path} could not be written ({err.strerror or err}).", where,
                            "check that the folder exists, is writable and has free space; "
                            "the previous file, if any, is unchanged.")) from err
    finally:
        if temp is not None:
            with contextlib.suppress(OSError):
                os.unlink(temp)
    fsync_folder(path.parent)
    return path


def write_text_atomic(path: str | os.PathLike, text: str, *,
                      error: type[FisherwalkError] = InputError,
                      where: str | None = None) -> Path:
    """:func:`write_atomic` of ``text`` encoded as UTF-8."""
    data = text.encode("utf-8")
    return write_atomic(path, lambda handle: handle.write(data), error=error, where=where)


def read_bytes(path: str | os.PathLike, *, max_bytes: int, follow_symlinks: bool = True,
               error: type[FisherwalkError] = InputError, where: str | None = None) -> bytes:
    """The content of a regular file of at most ``max_bytes`` bytes.

    The file is opened without blocking and inspected (``fstat``) before anything is
    read: a fifo, a device or a folder is refused, and so is a file larger than
    ``max_bytes`` (nothing is allocated for it). With ``follow_symlinks=False`` a
    symbolic link is refused too.
    """
    path = Path(path)
    where = _where(path, where)
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0)
    if not follow_symlinks:
        flags |= getattr(os, "O_NOFOLLOW", 0)
    try:
        fd = os.open(path, flags)
    except OSError as err:
        link = not follow_symlinks and os.path.islink(path)
        reason = "it is a symbolic link, which is not followed" if link else err.strerror
        raise error(explain(f"{path} cannot be read ({reason}).", where,
                            "check the path; pass a regular file.")) from err
    chunks, total = [], 0
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise error(explain(f"{path} is not a regular file.", where,
                                "pass a regular file (not a folder, fifo or device)."))
        if info.st_size > max_bytes:
            raise error(explain(f"{path} holds {info.st_size} bytes, more than the "
                                f"{max_bytes} allowed for this file.", where,
                                "check that this is the right file; it is not read."))
        while chunk := os.read(fd, min(_CHUNK, max_bytes + 1 - total)):
            chunks.append(chunk)
            total += len(chunk)
            if total > max_bytes:  # the file grew after fstat
                raise error(explain(f"{path} grew beyond the {max_bytes} bytes allowed while "
                                    "being read.", where, "make sure no other program "
                                                          "writes it."))
    except OSError as err:
        raise error(explain(f"{path} cannot be read ({err.strerror}).", where,
                            "check the file and its permissions.")) from err
    finally:
        os.close(fd)
    return b"".join(chunks)


def check_folder(path: str | os.PathLike, *,
                 expected: Collection[str] | re.Pattern[str] | None = None,
                 error: type[FisherwalkError] = InputError,
                 where: str | None = None) -> list[str]:
    """The sorted entry names of ``path``, after checking that every entry is a regular
    file (not a symbolic link, folder, fifo, socket or device) and, when ``expected`` is
    given, that every name is in it (a collection of names, or a pattern every name must
    match in full).
    """
    path = Path(path)
    where = where or f"folder {os.fspath(path)}"
    if not path.is_dir():
        raise error(explain(f"{path} is not a folder.", where, "pass the path of a folder."))
    odd, unknown = [], []
    try:
        with os.scandir(path) as entries:
            for entry in entries:
                if not entry.is_file(follow_symlinks=False):
                    odd.append(entry.name)
                elif expected is not None and not (
                        expected.fullmatch(entry.name) if isinstance(expected, re.Pattern)
                        else entry.name in expected):
                    unknown.append(entry.name)
    except OSError as err:
        raise error(explain(f"{path} cannot be listed ({err.strerror}).", where,
                            "check the folder's permissions.")) from err
    if odd:
        raise error(explain(f"{path} holds entries that are not regular files: "
                            f"{', '.join(sorted(odd)[:5])}.", where,
                            "remove them (links, folders, fifos); fisherwalk does not read "
                            "or write through them."))
    if unknown:
        raise error(explain(f"{path} holds files fisherwalk did not write: "
                            f"{', '.join(sorted(unknown)[:5])}.", where,
                            "use another folder, or remove those files if they are not "
                            "needed."))
    return sorted(os.listdir(path))


def _size(n: int) -> str:
    return f"{n / 2**20:.1f} MiB" if n < 2**30 else f"{n / 2**30:.2f} GiB"


def check_output_folder(path: str | os.PathLike, needed_bytes: int, *,
                        error: type[FisherwalkError] = InputError,
                        where: str = "--out") -> Path:
    """Make sure ``path`` is a folder fisherwalk can write ``needed_bytes`` into, before
    any work: it exists (or is created), is a folder, accepts a new file (tested by
    creating and removing one) and has the free space. Returns ``path``.
    """
    needed = whole_number(needed_bytes, "needed_bytes", "check_output_folder()", minimum=0)
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise error(explain(f"{path} is a file, not a folder.", where,
                            "pass a folder for the outputs (it is created if missing)."))
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise error(explain(f"The output folder {path} cannot be created ({err.strerror}).",
                            where, "pass a folder under a writable existing folder.")) from err
    try:
        fd, probe = tempfile.mkstemp(prefix=".write-test.", suffix=TEMP_SUFFIX, dir=path)
        os.close(fd)
        os.unlink(probe)
    except OSError as err:
        raise error(explain(f"The output folder {path} is not writable ({err.strerror}).",
                            where, "pass a folder you can write to.")) from err
    free = shutil.disk_usage(path).free
    if free < needed:
        raise error(explain(f"The output folder {path} has {_size(free)} free; the outputs "
                            f"need about {_size(needed)}.", where,
                            "free some space, pass another folder, or ask for fewer draws."))
    return path
