"""fisherwalk's one JSON convention, written and read the same way by every file it keeps
(tuning records, checkpoints, run records, locks).

Numbers
    A finite float is a JSON number, written as Python's shortest repr, which reads back
    to the same double bit for bit (float32 values are written as their exact double).
    NaN, +infinity and -infinity are the strings ``"NaN"``, ``"Infinity"`` and
    ``"-Infinity"``. Why strings: JSON (RFC 8259) has no non-finite numbers, so the bare
    tokens Python's :mod:`json` writes by default make a file other readers reject; the
    strings keep the file strict JSON, keep the three cases apart, and use the spellings
    of ECMAScript's ``Number.prototype.toString`` and of Python's own tokens, so a reader
    in any language recognises them. ``null`` would merge the three and collide with its
    other meaning, so ``null`` means only "no value" (an optional field left empty),
    never a number.
Decoding by field
    A reader turns the three strings back into floats only where it expects a float
    (:func:`decode_number`, :func:`decode_array`); nowhere else is a string converted,
    so a parameter named ``"NaN"`` stays a name. Bare ``NaN``/``Infinity`` tokens and
    duplicate keys are refused when reading.
Arrays
    :func:`to_plain` writes an array as nested lists (records people read).
    :func:`encode_array` writes the sized form ``{"dtype", "shape", "values"}`` (flat
    values), whose declared size a reader checks before allocating (checkpoints).
    :func:`decode_array` reads both.
Limits
    :func:`read_json` checks the file's size before reading it and the nesting depth
    before parsing it, so a hostile file raises the caller's package error, never
    RecursionError or MemoryError.
"""

from __future__ import annotations

import json
import math
import os
import re
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import FisherwalkError, InputError, explain
from .checks import whole_number
from .files import read_bytes, write_text_atomic

__all__ = [
    "NONFINITE",
    "to_plain",
    "dumps",
    "loads",
    "read_json",
    "write_json_atomic",
    "encode_array",
    "decode_number",
    "decode_array",
]

NONFINITE = {"NaN": math.nan, "Infinity": math.inf, "-Infinity": -math.inf}
DEFAULT_MAX_DEPTH = 64
_FLOAT_DTYPES = ("float32", "float64")
_MAX_NDIM = 32
_TOKENS = re.compile(r'["\\\[\]{}]')
_TODO = "use a file written by fisherwalk, unedited."


def _number(x: float) -> float | str:
    if math.isfinite(x):
        return x
    return "NaN" if math.isnan(x) else ("Infinity" if x > 0 else "-Infinity")


def _plain_list(items: Any) -> Any:
    if isinstance(items, list):
        return [_plain_list(v) for v in items]
    return _number(items) if isinstance(items, float) else items


def to_plain(obj: Any) -> Any:
    """``obj`` as JSON-ready data in the convention of this module: dicts (string or int
    keys), NamedTuples (as dicts), lists and tuples, strings, bools, None, Python and
    numpy numbers, numpy and JAX arrays of real numbers (nested lists), paths (strings).

    Raises
    ------
    InputError
        For anything else (complex numbers, arbitrary objects, other dict keys).
    """
    if obj is None or isinstance(obj, str | bool):
        return obj
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, int | np.integer):
        return int(obj)
    if isinstance(obj, float | np.floating):
        return _number(float(obj))
    if isinstance(obj, dict):
        out = {}
        for key, value in obj.items():
            if isinstance(key, bool) or not isinstance(key, str | int):
                raise InputError(explain(f"The key {key!r} cannot be a JSON key.", "to_plain()",
                                         "use string keys."))
            out[str(key)] = to_plain(value)
        return out
    if hasattr(obj, "_asdict"):
        return to_plain(obj._asdict())
    if isinstance(obj, list | tuple):
        return [to_plain(v) for v in obj]
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    kind = getattr(getattr(obj, "dtype", None), "kind", None)
    if kind in ("b", "i", "u", "f") and hasattr(obj, "shape"):
        return _plain_list(np.asarray(obj).tolist())
    raise InputError(explain(f"A {type(obj).__name__} ({obj!r:.60}) cannot be written as JSON.",
                             "to_plain()", "convert it to numbers, strings or lists first."))


def dumps(obj: Any, *, indent: int | None = None, sort_keys: bool = False) -> str:
    """:func:`to_plain` of ``obj`` as strict, ASCII-only JSON text (compact when ``indent``
    is None; the same text as ``json.dumps(..., allow_nan=False)`` for finite content)."""
    separators = (",", ":") if indent is None else (",", ": ")
    return json.dumps(to_plain(obj), allow_nan=False, indent=indent,
                      sort_keys=sort_keys, separators=separators)


def _too_deep(text: str, max_depth: int) -> bool:
    """Whether arrays and objects nest deeper than ``max_depth`` (brackets inside strings
    do not count). Linear in the text, no recursion."""
    depth, in_string, skip = 0, False, -1
    for match in _TOKENS.finditer(text):
        pos = match.start()
        if pos == skip:  # the character after a backslash inside a string
            continue
        ch = match.group()
        if in_string:
            if ch == "\\":
                skip = pos + 1
            elif ch == '"':
                in_string = False
        elif ch == '"':
            in_string = True
        elif ch in "[{":
            depth += 1
            if depth > max_depth:
                return True
        elif ch in "]}":
            depth -= 1
    return False


def _refuse_constant(token: str):
    raise ValueError(f"the bare token {token} is not JSON (fisherwalk writes non-finite "
                     "numbers as the strings \"NaN\", \"Infinity\", \"-Infinity\")")


def _object(pairs: list[tuple[str, Any]]) -> dict:
    seen: set[str] = set()
    for key, _ in pairs:
        if key in seen:
            raise ValueError(f"the key {key!r} appears twice in one object")
        seen.add(key)
    return dict(pairs)


def loads(text: str, *, max_depth: int = DEFAULT_MAX_DEPTH,
          error: type[FisherwalkError] = InputError, where: str = "JSON text") -> Any:
    """Parse JSON text: nesting deeper than ``max_depth`` is refused before parsing;
    bare NaN/Infinity tokens, duplicate keys and syntax errors raise ``error``."""
    if _too_deep(text, max_depth):
        raise error(explain(f"The JSON nests arrays or objects deeper than {max_depth} levels.",
                            where, _TODO))
    try:
        return json.loads(text, parse_constant=_refuse_constant, object_pairs_hook=_object)
    except (ValueError, RecursionError) as err:
        raise error(explain(f"The content is not valid JSON: {err}.", where, _TODO)) from err


def read_json(path: str | os.PathLike, *, max_bytes: int, max_depth: int = DEFAULT_MAX_DEPTH,
              follow_symlinks: bool = True, error: type[FisherwalkError] = InputError,
              where: str | None = None) -> Any:
    """Read a JSON file with its size checked before reading (:func:`files.read_bytes`)
    and its depth before parsing (:func:`loads`); every problem raises ``error`` naming
    the file."""
    where = where or f"file {os.fspath(path)}"
    data = read_bytes(path, max_bytes=max_bytes, follow_symlinks=follow_symlinks,
                      error=error, where=where)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as err:
        raise error(explain(f"{path} is not UTF-8 text ({err.reason} at byte {err.start}).",
                            where, _TODO)) from err
    return loads(text, max_depth=max_depth, error=error, where=where)


def write_json_atomic(path: str | os.PathLike, content: Any, *, indent: int | None = 1,
                      error: type[FisherwalkError] = InputError,
                      where: str | None = None) -> Path:
    """Write :func:`dumps` of ``content`` (and a final newline) atomically
    (:func:`files.write_atomic`)."""
    text = dumps(content, indent=indent) + "\n"
    return write_text_atomic(path, text, error=error, where=where)


def encode_array(array: Any) -> dict:
    """A real array in the sized form ``{"dtype", "shape", "values"}``: float32 and
    float64 keep their dtype, other real dtypes are written as float64."""
    values = np.asarray(array)
    if values.dtype.kind not in "biuf":
        raise InputError(explain(f"An array of dtype {values.dtype} cannot be encoded.",
                                 "encode_array()", "pass an array of real numbers."))
    if values.dtype.name not in _FLOAT_DTYPES:
        values = values.astype(np.float64)
    flat = values.ravel().tolist()
    if not np.isfinite(values).all():
        flat = [_number(v) for v in flat]
    return {"dtype": values.dtype.name, "shape": list(values.shape), "values": flat}


def decode_number(value: Any, name: str, where: str, *, finite: bool = False,
                  error: type[FisherwalkError] = InputError) -> float:
    """A JSON number, or one of the strings of :data:`NONFINITE` (refused when
    ``finite``), as a float."""
    if isinstance(value, str) and value in NONFINITE and not finite:
        return NONFINITE[value]
    if isinstance(value, int | float) and not isinstance(value, bool):
        try:
            number = float(value)
        except OverflowError:
            number = math.nan
        if math.isfinite(number):
            return number
    kind = "a finite number" if finite else 'a number, "NaN", "Infinity" or "-Infinity"'
    raise error(explain(f"Field '{name}' is {value!r:.40}, not {kind}.", where, _TODO))


def _flatten(value: Any, shape: tuple[int, ...], name: str, where: str,
             error: type[FisherwalkError]) -> list:
    """Nested lists of exactly ``shape``, flattened; at most len(shape) levels deep."""
    level = [value]
    for depth, length in enumerate(shape):
        if not all(isinstance(v, list) and len(v) == length for v in level):
            raise error(explain(f"Field '{name}' is not nested lists of shape {shape} "
                                f"(level {depth}).", where, _TODO))
        level = [item for v in level for item in v]
    return level


def decode_array(content: Any, name: str, where: str, *, max_size: int,
                 shape: tuple[int, ...] | None = None, dtype: str | None = None,
                 finite: bool = False, error: type[FisherwalkError] = InputError) -> np.ndarray:
    """An array from the sized form (:func:`encode_array`) or nested lists.

    The declared dtype must be float32 or float64 (and equal ``dtype`` when given), the
    declared shape whole numbers whose product is at most ``max_size`` (checked before
    anything is allocated) and equal to ``shape`` when given; nested lists need
    ``shape``. Non-finite values follow the convention and are refused when ``finite``.
    """
    def bad(what: str) -> FisherwalkError:
        return error(explain(f"Field '{name}' {what}.", where, _TODO))

    if isinstance(content, dict):
        if set(content) != {"dtype", "shape", "values"}:
            raise bad("must hold exactly 'dtype', 'shape' and 'values'")
        declared = content["dtype"]
        if declared not in _FLOAT_DTYPES or (dtype is not None and declared != dtype):
            raise bad(f"has dtype {declared!r:.40}; expected {dtype or ' or '.join(_FLOAT_DTYPES)}")
        dims = content["shape"]
        if not isinstance(dims, list) or len(dims) > _MAX_NDIM:
            raise bad(f"has a shape that is not a list of at most {_MAX_NDIM} sizes")
        dims = tuple(whole_number(n, f"{name}.shape", where, minimum=0, error=error)
                     for n in dims)
        size = math.prod(dims)
        if size > max_size:
            raise bad(f"declares {size} values, more than the {max_size} allowed")
        if shape is not None and dims != tuple(shape):
            raise bad(f"has shape {dims}; expected {tuple(shape)}")
        flat = content["values"]
        if not isinstance(flat, list) or len(flat) != size:
            raise bad(f"must list {size} values")
    else:
        if shape is None:
            raise bad("must be an object with 'dtype', 'shape' and 'values'")
        dims, declared = tuple(shape), dtype or "float64"
        if math.prod(dims) > max_size:
            raise bad(f"would hold {math.prod(dims)} values, more than the {max_size} allowed")
        flat = _flatten(content, dims, name, where, error)
    numbers = [decode_number(v, name, where, finite=finite, error=error) for v in flat]
    wide = np.asarray(numbers, dtype=np.float64)
    with np.errstate(over="ignore"):
        array = wide.astype(declared).reshape(dims)
    if (np.isfinite(wide) != np.isfinite(array).ravel()).any():
        raise bad(f"holds values too large for {declared}")
    return array
