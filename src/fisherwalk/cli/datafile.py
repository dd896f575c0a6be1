"""Data tables for ``fisherwalk run model.py --data table.csv``.

:func:`read_table` reads a comma-separated file with a header row through the standard
library's :mod:`csv` module and returns one float array per column. Every refusal names
the column, and the row where one applies (data rows count from 1; the file's line is
given too): a missing column the model declares, a row with too many or too few cells,
an empty cell, a cell that is not a plain ASCII decimal number (``1_000``, ``1,000``,
Arabic-Indic or full-width digits, ``nan`` and ``inf`` are refused, though Python's
``float`` would read some of them), a value beyond float64's range.

The file is read one record at a time into growing float64 arrays, one per needed
column, so the memory is the file's text and eight bytes per needed number, not a
Python string per cell.
"""

from __future__ import annotations

import csv
import hashlib
import math
import re
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import NamedTuple

import numpy as np

from ..errors import InputError, explain

__all__ = ["Table", "read_table"]


class Table(NamedTuple):
    """A data file read for a model."""

    path: Path
    columns: dict[str, np.ndarray]  # column name -> float64 array, one value per row
    rows: int
    sha256: str


def _refuse(path: Path, what: str, where: str, todo: str) -> InputError:
    return InputError(explain(what, f"data file {path}, {where}", todo))


def read_table(path, columns: Sequence[str] | None = None) -> Table:
    """Read a CSV file with a header row into float columns.

    Parameters
    ----------
    path
        The file; UTF-8 (a byte-order mark is accepted), comma-separated, first row the
        column names.
    columns
        The columns the model needs (a model file's ``columns``). Only these must be
        numeric and only these are returned; ``None``: every column, all numeric.

    Raises
    ------
    InputError
        The file is missing or unreadable, a declared column is absent, a header is
        duplicated or empty, a row has the wrong number of cells, or a needed cell is
        empty, not a number, NaN or infinite. The message names the column and the row.
    """
    path = Path(path)
    if not path.is_file():
        raise _refuse(path, "The data file does not exist (or is not a file).", "--data",
                      "give the path of a CSV file with a header row.")
    raw = path.read_bytes()
    digest = hashlib.sha256(raw).hexdigest()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise _refuse(path, f"The file is not UTF-8 text ({err.reason} at byte {err.start}).",
                      "the whole file", "save the table as UTF-8 CSV.") from None
    del raw
    if "\r" in text and "\n" not in text:  # lines ended by a carriage return alone
        text = text.replace("\r", "\n")
    try:
        return _read(path, text, columns, digest)
    except csv.Error as err:
        raise _refuse(path, f"The file is not valid CSV ({err}).", "the whole file",
                      "save the table as comma-separated text.") from None


def _read(path: Path, text: str, columns: Sequence[str] | None, digest: str) -> Table:
    reader = csv.reader(_lines(text))
    head = next((row for row in reader if row), None)
    if head is None:
        raise _refuse(path, "The file is empty.", "the whole file",
                      "write a header row of column names, then one row per observation.")
    header = [name.strip() for name in head]
    for index, name in enumerate(header):
        if not name:
            raise _refuse(path, f"Column {index + 1} of the header has no name.",
                          "the header (line 1)", "name every column.")
        if header.index(name) != index:
            raise _refuse(path, f"The header names column '{name}' twice.",
                          "the header (line 1)", "give each column a distinct name.")
    wanted = list(header) if columns is None else [str(c) for c in columns]
    missing = [name for name in wanted if name not in header]
    if missing:
        listed = ", ".join(f"'{name}'" for name in missing)
        raise _refuse(path, f"The model needs column(s) {listed}, which the file lacks.",
                      "the header (line 1)",
                      f"add the column(s) or correct the name(s); the file has "
                      f"{', '.join(header)}.")
    values = {name: np.empty(1024) for name in wanted}
    where = {name: header.index(name) for name in wanted}
    rows = 0
    line = reader.line_num + 1  # the line the next record starts on
    for cells in reader:  # one record at a time: the cells of a row are dropped after it
        first, line = line, reader.line_num + 1
        if not cells:
            continue
        rows += 1
        if len(cells) != len(header):
            raise _refuse(path, f"Row {rows} has {len(cells)} cell(s); the header has "
                          f"{len(header)}.", f"row {rows} (line {first})",
                          "give every row one cell per column (quote cells holding commas).")
        if rows > len(next(iter(values.values()))):
            values = {name: np.resize(column, 2 * len(column))
                      for name, column in values.items()}
        for name in wanted:
            values[name][rows - 1] = _number(path, cells[where[name]].strip(), name, rows,
                                             first)
    if not rows:
        raise _refuse(path, "The file has a header but no data rows.", "the whole file",
                      "add one row per observation.")
    return Table(path, {name: column[:rows].copy() for name, column in values.items()}, rows,
                 digest)


# a plain ASCII decimal number: digits 0-9 only, an optional sign, point and exponent (no
# digit separators such as 1_000, no other scripts' digits, no nan/inf words)
_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


def _number(path: Path, cell: str, name: str, row: int, line: int) -> float:
    place = f"column '{name}', row {row} (line {line})"
    if not cell:
        raise _refuse(path, f"The cell in column '{name}', row {row} is empty.", place,
                      "fill in the value, or drop the row (fisherwalk does not impute).")
    if not _NUMBER.fullmatch(cell):
        raise _refuse(path, f"The cell in column '{name}', row {row} holds {cell!r:.60}, not a "
                      "plain decimal number.", place,
                      "write a number in ASCII digits 0-9 (e.g. 3.25, -1e-3; no digit "
                      "separators such as 1_000 or 1,000, no other scripts' digits), or "
                      "leave the column out of the model's columns.")
    number = float(cell)
    if not math.isfinite(number):
        raise _refuse(path, f"The cell in column '{name}', row {row} holds {cell!r:.60}, "
                      "beyond the range of a float64.", place,
                      "give a finite number of magnitude below 1.8e308.")
    return number


def _lines(text: str) -> Iterator[str]:
    """The lines of ``text`` with their ends, one at a time (a StringIO would copy the
    text in four bytes a character, a list of lines would hold them all)."""
    begin = 0
    while begin < len(text):
        end = text.find("\n", begin)
        end = len(text) if end < 0 else end + 1
        yield text[begin:end]
        begin = end
