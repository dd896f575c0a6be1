"""Data tables for ``fisherwalk run model.py --data table.csv``.

:func:`read_table` reads a comma-separated file with a header row through the standard
library's :mod:`csv` module and returns one float array per column. Every refusal names
the column, and the row where one applies (data rows count from 1; the file's line is
given too): a missing column the model declares, a row with too many or too few cells,
an empty cell, a cell that is not a number, a NaN or infinite value.
"""

from __future__ import annotations

import csv
import hashlib
import math
from collections.abc import Sequence
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
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise _refuse(path, f"The file is not UTF-8 text ({err.reason} at byte {err.start}).",
                      "the whole file", "save the table as UTF-8 CSV.") from None
    records = [row for row in csv.reader(text.splitlines()) if row]
    if not records:
        raise _refuse(path, "The file is empty.", "the whole file",
                      "write a header row of column names, then one row per observation.")
    header = [name.strip() for name in records[0]]
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
    body = records[1:]
    if not body:
        raise _refuse(path, "The file has a header but no data rows.", "the whole file",
                      "add one row per observation.")
    values = {name: np.empty(len(body)) for name in wanted}
    where = {name: header.index(name) for name in wanted}
    lines = _line_numbers(text)
    for row, cells in enumerate(body, start=1):
        line = lines[row] if row < len(lines) else row + 1
        if len(cells) != len(header):
            raise _refuse(path, f"Row {row} has {len(cells)} cell(s); the header has "
                          f"{len(header)}.", f"row {row} (line {line})",
                          "give every row one cell per column (quote cells holding commas).")
        for name in wanted:
            cell = cells[where[name]].strip()
            values[name][row - 1] = _number(path, cell, name, row, line)
    return Table(path, values, len(body), hashlib.sha256(raw).hexdigest())


def _number(path: Path, cell: str, name: str, row: int, line: int) -> float:
    place = f"column '{name}', row {row} (line {line})"
    if not cell:
        raise _refuse(path, f"The cell in column '{name}', row {row} is empty.", place,
                      "fill in the value, or drop the row (fisherwalk does not impute).")
    try:
        number = float(cell)
    except ValueError:
        raise _refuse(path, f"The cell in column '{name}', row {row} holds {cell!r}, not a "
                      "number.", place, "write a plain number there (e.g. 3.25 or 1e-3), or "
                      "leave the column out of the model's columns.") from None
    if not math.isfinite(number):
        raise _refuse(path, f"The cell in column '{name}', row {row} holds {cell!r}.", place,
                      "give a finite number; a missing value must be handled in the model or "
                      "the row dropped.")
    return number


def _line_numbers(text: str) -> list[int]:
    """The file line on which each non-empty record starts (records may span lines)."""
    starts = []
    reader = csv.reader(text.splitlines())
    line = 1
    for record in reader:
        if record:
            starts.append(line)
        line = reader.line_num + 1
    return starts
