"""One validator of each kind for the values users and files give: whole numbers, positive
numbers, probabilities, finite arrays and symmetric positive-definite matrices.

Each validator returns the value in its working form (``int``, ``float``, a float64
array) or raises the package error the caller names (``error=``, :class:`InputError` by
default) with a message built by :func:`fisherwalk.errors.explain`: what is wrong, where
(``where``: the option, the file or field), and what to pass instead.
"""

from __future__ import annotations

import math
import numbers
import operator
import re
from collections.abc import Sequence
from typing import Any

import numpy as np

from ..errors import FisherwalkError, InputError, explain

__all__ = [
    "SYMMETRY_RTOL",
    "DEFINITENESS_RTOL",
    "whole_number",
    "parse_whole_number",
    "positive_number",
    "probability",
    "finite_array",
    "spd_matrix",
    "definiteness_problem",
]

SYMMETRY_RTOL = 1e-6
"""Largest allowed asymmetry of a matrix, ``max |M - Mᵀ| <= SYMMETRY_RTOL * max |M|``.

Measured against the largest entry, not entry by entry: rounding in a computed matrix
(a Hessian summed over n observations, a covariance of draws) is of order
n x machine epsilon x the size of the terms, so a small off-diagonal entry can differ
from its mirror by many of its own ulps while the matrix is correct. 1e-6 is about
4500 float64 ulps of the largest entry (room for sums over many terms) and still about
17 float32 ulps; an asymmetry above it is a wrong matrix (a transposed block, a typo),
not rounding. Within it the matrix is symmetrised, ``(M + Mᵀ) / 2``.
"""

DEFINITENESS_RTOL = 1e-12
"""A matrix counts as positive definite when its smallest eigenvalue exceeds
``DEFINITENESS_RTOL`` x its largest, i.e. its condition number is below 1e12.

``numpy.linalg.eigh`` finds each eigenvalue to within about eps x λ_max (backward
stability of the symmetric QR algorithm: Golub & Van Loan 2013, "Matrix Computations",
4th ed., section 8.3); below 1e-12 x λ_max in float64 the smallest eigenvalue has at most
about four correct digits, and its inverse (a posterior variance) is rounding noise.
"""

_WHOLE_TEXT = re.compile(r"[+-]?[0-9]+")
_MAX_DIGITS = 30  # longer digit strings are refused before int() converts them


def _fail(error: type[FisherwalkError], what: str, where: str, todo: str) -> FisherwalkError:
    return error(explain(what, where, todo))


def whole_number(value: Any, name: str, where: str, *, minimum: int = 1,
                 maximum: int | None = None, todo: str | None = None,
                 error: type[FisherwalkError] = InputError) -> int:
    """``value`` as an ``int`` in ``[minimum, maximum]``.

    Accepts Python and numpy integers (and 0-d integer arrays); refuses ``bool``, floats
    (even ``3.0``: a count written as a float is usually a mistake such as ``1e6``),
    strings and anything else. ``todo`` replaces the default advice.
    """
    span = f">= {minimum}" if maximum is None else f"from {minimum} to {maximum}"
    advice = todo or f"pass {name} as a whole number {span} (a Python int, not a float)."
    kind = getattr(getattr(value, "dtype", None), "kind", None)
    number = None
    if not isinstance(value, bool | np.bool_) and kind in (None, "i", "u"):
        try:
            number = operator.index(value)
        except TypeError:
            number = None
    if number is None:
        raise _fail(error, f"{name}={value!r} is not a whole number.", where, advice)
    if number < minimum or (maximum is not None and number > maximum):
        raise _fail(error, f"{name}={number} is out of range: {name} must be {span}.",
                    where, advice)
    return int(number)


def parse_whole_number(text: str, name: str, where: str, *, minimum: int = 1,
                       maximum: int | None = None, todo: str | None = None,
                       error: type[FisherwalkError] = InputError) -> int:
    """A whole number written as decimal digits (e.g. a command-line option), checked as
    by :func:`whole_number`. ``1e6``, ``2.0``, ``10**3`` and ``1_000`` are refused."""
    stripped = text.strip() if isinstance(text, str) else None
    if stripped is None or not _WHOLE_TEXT.fullmatch(stripped) \
            or len(stripped.lstrip("+-")) > _MAX_DIGITS:
        span = f">= {minimum}" if maximum is None else f"from {minimum} to {maximum}"
        raise _fail(error, f"{name} {text!r} is not a whole number.", where,
                    todo or f"write {name} in plain digits, {span} (e.g. 1000000, not 1e6).")
    return whole_number(int(stripped), name, where, minimum=minimum, maximum=maximum,
                        todo=todo, error=error)


def _real(value: Any) -> float | None:
    """A real scalar as a float, or None (bools, strings, complex, arrays of size > 1)."""
    if isinstance(value, bool | np.bool_):
        return None
    if isinstance(value, numbers.Real):
        return float(value)
    if getattr(value, "shape", None) == () and getattr(getattr(value, "dtype", None), "kind",
                                                         "") in ("f", "i", "u"):
        return float(value)
    return None


def positive_number(value: Any, name: str, where: str, *, allow_zero: bool = False,
                    todo: str | None = None,
                    error: type[FisherwalkError] = InputError) -> float:
    """``value`` as a finite ``float`` > 0 (>= 0 with ``allow_zero``)."""
    number = _real(value)
    bound = ">= 0" if allow_zero else "> 0"
    if number is None or not math.isfinite(number) or number < 0 \
            or (number == 0 and not allow_zero):
        raise _fail(error, f"{name}={value!r} is not a finite number {bound}.", where,
                    todo or f"pass {name} as a finite number {bound}.")
    return number


def probability(value: Any, name: str, where: str, *, todo: str | None = None,
                error: type[FisherwalkError] = InputError) -> float:
    """``value`` as a ``float`` strictly between 0 and 1."""
    number = _real(value)
    if number is None or not 0.0 < number < 1.0:
        raise _fail(error, f"{name}={value!r} is not a probability strictly between 0 and 1.",
                    where, todo or f"pass {name} as a number in (0, 1), e.g. 0.25.")
    return number


def _as_float_array(value: Any, what: str, where: str,
                    error: type[FisherwalkError]) -> np.ndarray:
    try:
        kind = "U" if isinstance(value, str) else np.asarray(value).dtype.kind
    except (TypeError, ValueError):  # ragged nested lists
        kind = "O"
    if kind not in "fiu":
        raise _fail(error, f"The {what} is not an array of real numbers (dtype kind {kind!r}).",
                    where, f"pass the {what} as an array of floats.")
    return np.asarray(value, dtype=np.float64)


def finite_array(value: Any, name: str, where: str, *, shape: tuple[int, ...] | None = None,
                 error: type[FisherwalkError] = InputError) -> np.ndarray:
    """``value`` as a float64 array of the given ``shape`` (any shape when None) whose
    entries are all finite; the message gives the first offending index."""
    array = _as_float_array(value, name, where, error)
    if shape is not None and array.shape != tuple(shape):
        raise _fail(error, f"{name} has shape {array.shape}; expected {tuple(shape)}.", where,
                    f"pass {name} with shape {tuple(shape)}.")
    bad = np.argwhere(~np.isfinite(array))
    if bad.size:
        index = tuple(int(i) for i in bad[0])
        raise _fail(error, f"{name} holds {len(bad)} non-finite values, the first at index "
                           f"{index} ({array[index]!r}).", where, f"pass finite values of {name}.")
    return array


def definiteness_problem(matrix: np.ndarray, names: Sequence[str]) -> str:
    """'' if the symmetric ``matrix`` is positive definite (smallest eigenvalue above
    :data:`DEFINITENESS_RTOL` x the largest, and a Cholesky factor exists), else a phrase
    naming the parameters of the eigenvector of the smallest eigenvalue, with signs."""
    eigvals, eigvecs = np.linalg.eigh(matrix)
    top = float(eigvals[-1])
    if top > 0 and eigvals[0] > DEFINITENESS_RTOL * top:
        try:
            np.linalg.cholesky(matrix)
            return ""
        except np.linalg.LinAlgError:  # pragma: no cover - eigh and cholesky disagree
            pass
    vector = eigvecs[:, 0]
    order = np.argsort(-np.abs(vector))[:4]
    keep = [i for i in order if abs(vector[i]) >= 0.25 * abs(vector[order[0]])]
    involved = ", ".join(f"{names[i]} ({vector[i]:+.2f})" for i in keep)
    return (f"smallest eigenvalue {eigvals[0]:.3g} (largest {top:.3g}); its eigenvector "
            f"involves {involved}")


def spd_matrix(matrix: Any, names: Sequence[str], where: str, *, what: str = "matrix",
               todo: str | None = None,
               error: type[FisherwalkError] = InputError) -> np.ndarray:
    """A symmetric positive-definite (d, d) matrix in the parameter order ``names``.

    Checks, in order: real numbers, shape (d, d) with d = len(names), finite entries,
    symmetry within :data:`SYMMETRY_RTOL`, positive definiteness within
    :data:`DEFINITENESS_RTOL`. Every message names the parameters involved. ``what``
    names the matrix ("Fisher information", "proposal covariance"); ``todo`` replaces
    the advice given when the matrix is not positive definite.

    Returns
    -------
    numpy.ndarray
        The symmetrised matrix ``(M + Mᵀ) / 2``, float64.
    """
    names = tuple(names)
    d = len(names)
    host = _as_float_array(matrix, what, where, error)
    if host.shape != (d, d):
        order = ", ".join(names[:8]) + (", ..." if d > 8 else "")
        raise _fail(error, f"The {what} has shape {host.shape}; expected ({d}, {d}).", where,
                    f"pass a ({d}, {d}) matrix in the ravelled parameter order: {order}.")
    bad = np.argwhere(~np.isfinite(host))
    if bad.size:
        pairs = "; ".join(f"({names[i]}, {names[j]})" for i, j in bad[:4])
        raise _fail(error, f"The {what} has {len(bad)} non-finite entries, e.g. {pairs}.",
                    where, "compute it at a point where the model is finite, in float64.")
    largest = max(float(np.max(np.abs(host))), np.finfo(np.float64).tiny)
    asymmetry = np.abs(host - host.T)
    if asymmetry.max() > SYMMETRY_RTOL * largest:
        i, j = np.unravel_index(np.argmax(asymmetry), asymmetry.shape)
        raise _fail(error, f"The {what} is not symmetric: entries ({names[i]}, {names[j]}) = "
                           f"{host[i, j]:.6g} and ({names[j]}, {names[i]}) = {host[j, i]:.6g} "
                           f"differ by more than {SYMMETRY_RTOL:g} of the largest entry.",
                    where, "pass a symmetric matrix, e.g. (M + M.T) / 2 if the asymmetry is "
                           "rounding.")
    host = 0.5 * (host + host.T)
    problem = definiteness_problem(host, names)
    if problem:
        raise _fail(error, f"The {what} is not positive definite: {problem}.", where,
                    todo or "check how the matrix was computed; an unidentified parameter "
                            "needs a proper prior.")
    return host
