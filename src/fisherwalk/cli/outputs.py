"""The command line's output folder: the names it writes, checked before any work, and the
error note of a failed command.

Every file the commands write goes through :func:`fisherwalk.base.files.write_atomic`
(never through a link). Here, before the fit, each output name in ``--out`` must be
absent or a regular file: a link, a folder or a fifo planted at ``draws.npz`` or
``traces.png`` would otherwise be found only after the sampling, when the draws could no
longer be written. ``demo`` also refuses a ``data.csv`` or ``record.json`` that a demo did
not write (a user's own files in that folder are never replaced).

The error note (``error.txt``) of a failed ``run`` or ``resume`` is written only into an
output folder that already exists, through the same safe write: a failed command never
creates folders and never writes outside its folder.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import stat
from collections.abc import Iterable
from pathlib import Path

from ..base.files import read_bytes, write_text_atomic
from ..base.jsonio import loads
from ..errors import FisherwalkError, InputError, explain

__all__ = ["ERROR_NOTE", "output_names", "check_output_names", "check_demo_folder",
           "write_error_note"]

ERROR_NOTE = "error.txt"
_MAX_RECORD_BYTES = 64 * 2**20


def output_names(command: str, *, checkpoint: bool = False) -> tuple[str, ...]:
    """The file names ``command`` writes into its output folder."""
    from ..results.plots import FILE_NAMES

    names = ["draws.npz", "record.json", *FILE_NAMES.values(), ERROR_NOTE]
    if command == "demo":
        names.append("data.csv")
    if checkpoint:
        names.append("command.json")
    return tuple(names)


def check_output_names(out: Path, names: Iterable[str], *, where: str = "--out") -> None:
    """Refuse, before any work, an output name in ``out`` that is a link, a folder or
    anything but a regular file."""
    for name in names:
        path = out / name
        try:
            info = os.lstat(path)
        except FileNotFoundError:
            continue
        except OSError as err:
            raise InputError(explain(f"{path} cannot be inspected ({err.strerror}).", where,
                                     "check the folder's permissions.")) from err
        if stat.S_ISREG(info.st_mode):
            continue
        kind = "a symbolic link" if stat.S_ISLNK(info.st_mode) else \
            "a folder" if stat.S_ISDIR(info.st_mode) else "not a regular file"
        raise InputError(explain(
            f"{path} is {kind}, and fisherwalk writes its {name} there; it does not write "
            "through links or replace folders.", where,
            f"remove {path} or pass another --out; nothing was fitted or sampled."))


def _demo_record(out: Path) -> dict | None:
    """record.json of an earlier demo in ``out``, or None."""
    try:
        record = loads(read_bytes(out / "record.json", max_bytes=_MAX_RECORD_BYTES,
                                  follow_symlinks=False).decode("utf-8"))
    except (FisherwalkError, UnicodeDecodeError):
        return None
    if (isinstance(record, dict) and record.get("format") == "fisherwalk-run"
            and record.get("command") == "demo" and isinstance(record.get("scenario"), dict)):
        return record
    return None


def check_demo_folder(out: Path) -> None:
    """``demo`` writes ``data.csv`` and ``record.json``: refuse, before any work, a folder
    where either exists and was not written by a demo (the record names the data file's
    SHA-256, which must match)."""
    data, record_path = out / "data.csv", out / "record.json"
    if not (data.exists() or record_path.exists()):
        return
    record = _demo_record(out) if record_path.exists() else None
    ours = record is not None
    if ours and data.exists():
        try:
            digest = hashlib.sha256(read_bytes(data, max_bytes=2**31,
                                               follow_symlinks=False)).hexdigest()
        except FisherwalkError:
            digest = None
        ours = digest == record["scenario"].get("data_sha256")
    if not ours:
        found = " and ".join(p.name for p in (data, record_path) if p.exists())
        raise InputError(explain(
            f"{out} holds {found} that the demo did not write (no record of an earlier demo "
            "names them); the demo writes files of these names and would replace them.",
            "fisherwalk demo --out",
            "pass another --out (a new folder is created); your files are left untouched."))


def write_error_note(folder: str | os.PathLike | None, text: str) -> Path | None:
    """``folder/error.txt`` holding ``text``, when ``folder`` is an existing folder; never
    creates a folder, never writes through a link; returns the path, or None when the
    note was not written (the message is on standard error anyway)."""
    if folder is None or not Path(folder).is_dir():
        return None
    with contextlib.suppress(FisherwalkError, OSError):
        return write_text_atomic(Path(folder) / ERROR_NOTE, text + "\n")
    return None
