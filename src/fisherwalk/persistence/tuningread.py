"""Reading a tuning record (:mod:`fisherwalk.persistence.tuningfile` writes it): bounded in
size, every field checked by name, returned as a :class:`SavedTuning`.
"""

from __future__ import annotations

import math
import os
from typing import NamedTuple

import numpy as np

from ..base.checks import positive_number, probability, spd_matrix, whole_number
from ..base.jsonio import decode_array, decode_number, read_json
from ..base.pytrees import name_difference
from ..errors import InputError, explain
from ..samplers import registry
from ..tuned.walker import Tuning

__all__ = ["SavedTuning", "load_tuning", "read_record", "check_tuning", "bad_record",
           "FORMAT", "FORMAT_VERSION", "MAX_DIM", "MAX_RECORD_BYTES"]

FORMAT = "fisherwalk-tuning"
FORMAT_VERSION = 1
MAX_DIM = 5000  # parameters in a record: five (d, d) matrices of JSON text, ~2.5 GB at 5000
MAX_RECORD_BYTES = 2**31  # bytes of a record file, checked before it is read


class SavedTuning(NamedTuple):
    """A tuning read from a record, with the parameter names it was made for, so that a
    model with other parameters can be refused by name (:func:`check_tuning`)."""

    tuning: Tuning  # the proposal (shape, scale, whitening, shape kind, criterion)
    names: tuple[str, ...] | None  # the parameters it was made for, ravelled order
    record: dict | None  # the record it came from


def bad_record(what: str, where: str) -> InputError:
    return InputError(explain(what, where, "use a record written by fisherwalk.save_tuning "
                                           "(or tuning_record), unedited."))


def read_record(source: str | os.PathLike | dict) -> dict:
    """Read and validate a tuning record from a JSON file or a dict.

    Raises
    ------
    InputError
        Naming the file or field when the record is unreadable, from another format,
        inconsistent, or holds NaN or infinity.
    """
    where = "load_tuning(<dict>)"
    if isinstance(source, dict):
        record = source
    else:
        where = f"file {os.fspath(source)}"
        record = read_json(source, max_bytes=MAX_RECORD_BYTES, where=where)
    if not isinstance(record, dict) or record.get("format") != FORMAT:
        raise bad_record(f"This is not a fisherwalk tuning record (format {FORMAT!r} expected).",
                   where)
    if record.get("format_version") != FORMAT_VERSION:
        raise bad_record(f"Record format version {record.get('format_version')!r}; this fisherwalk "
                   f"reads version {FORMAT_VERSION}.", where)
    dim, names = record.get("dim"), record.get("names")
    dim = whole_number(dim, "dim", f"{where}, field 'dim'", maximum=MAX_DIM,
                       todo="use a record written by fisherwalk.save_tuning, unedited.")
    if (not isinstance(names, list) or len(names) != dim
            or not all(isinstance(n, str) for n in names)):
        raise bad_record(f"Field 'names' must list {dim} parameter names.", where)
    if record.get("dtype") not in ("float32", "float64"):
        raise bad_record(f"Field 'dtype' is {record.get('dtype')!r:.40}, not float32 or float64.",
                   where)
    tuning, fit = record.get("tuning"), record.get("laplace")
    if not isinstance(tuning, dict) or not isinstance(fit, dict):
        raise bad_record("Fields 'tuning' and 'laplace' must be objects.", where)
    sampler = tuning.get("sampler", registry.DEFAULT)
    if not isinstance(sampler, str) or sampler not in registry.names():
        raise bad_record(f"Field 'tuning.sampler' is {sampler!r:.40}, not a registered sampler "
                   f"family ({', '.join(registry.names())}).", where)
    parameter = registry.family(sampler).parameter
    # Records before the sampler families kept a gradient sampler's step size in 'scale'.
    value_field = parameter if parameter in tuning else "scale"
    optional = [("tuning", "factor", (dim, dim))] if "factor" in tuning else []
    if "factor" in tuning and value_field != "scale":
        optional.append(("tuning", "scale", ()))
    arrays = {}
    for part, field, shape in [*optional, ("tuning", "shape", (dim, dim)),
                               ("tuning", value_field, ()),
                               ("tuning", "whitening", (dim, dim)),
                               ("laplace", "fisher", (dim, dim)),
                               ("laplace", "cholesky", (dim, dim)),
                               ("tuning", "spectrum", (dim,)), ("laplace", "mode", (dim,)),
                               ("tuning", "target_acceptance", ()),
                               ("tuning", "predicted_jump", ()), ("laplace", "logdensity", ()),
                               ("laplace", "gradient_norm", ())]:
        arrays[field] = decode_array(record[part].get(field), f"{part}.{field}", where,
                                     max_size=dim * dim, shape=shape, finite=True)
    if not isinstance(tuning.get("shape_kind"), str):
        raise bad_record("Field 'tuning.shape_kind' must be a string.", where)
    positive_number(float(arrays[value_field]), f"tuning.{value_field}", where, todo=_TODO)
    _check_values(arrays, tuple(names), where)
    if tuning.get("aim") is not None:  # the user's target_acceptance= (HMC, NUTS)
        if not registry.family(sampler).takes_target_acceptance:
            raise bad_record(f"Field 'tuning.aim' is set, but the family {sampler!r} takes no "
                       "target acceptance.", where)
        probability(decode_number(tuning["aim"], "tuning.aim", where), "tuning.aim", where,
                    todo=_TODO)
    if "factor" in arrays:
        expected = float(arrays["scale"]) / math.sqrt(dim) * arrays["shape"]
        rtol = 1e3 * float(np.finfo(np.dtype(record["dtype"])).eps)  # rounding of the dtype
        if not np.allclose(arrays["factor"], expected, rtol=rtol, atol=1e-300):
            raise bad_record("Fields 'tuning.factor', 'tuning.scale' and 'tuning.shape' disagree: "
                       "the factor must be (scale / sqrt(dim)) * shape.", where)
    elif parameter == "scale":
        raise bad_record("Field 'tuning.factor' is missing.", where)
    return record


_TODO = "use a record written by fisherwalk.save_tuning, unedited."


def _check_values(arrays: dict, names: tuple[str, ...], where: str) -> None:
    """The checks start() makes on its inputs, applied to a record's numbers."""
    probability(float(arrays["target_acceptance"]), "tuning.target_acceptance", where,
                todo=_TODO)
    positive_number(float(arrays["gradient_norm"]), "laplace.gradient_norm", where,
                    allow_zero=True, todo=_TODO)
    fisher = spd_matrix(arrays["fisher"], names, f"{where}, field 'laplace.fisher'",
                        what="Fisher information", todo=_TODO)
    largest = float(np.max(np.abs(fisher)))
    for field in ("laplace.cholesky", "tuning.whitening"):
        factor = arrays[field.split(".")[1]]
        if np.any(np.triu(factor, 1)) or not np.all(np.diag(factor) > 0):
            raise bad_record(f"Field '{field}' is not lower triangular with a positive diagonal.",
                       where)
    if not np.allclose(arrays["cholesky"] @ arrays["cholesky"].T, fisher, rtol=0,
                       atol=1e-6 * largest):
        raise bad_record("Field 'laplace.cholesky' is not the Cholesky factor of 'laplace.fisher'.",
                   where)
    spd_matrix(arrays["shape"] @ arrays["shape"].T, names, f"{where}, field 'tuning.shape'",
               what="proposal covariance (shape times its transpose)", todo=_TODO)


def load_tuning(source: str | os.PathLike | dict) -> SavedTuning:
    """Read a tuning record (a JSON file or the dict of :func:`tuning_record`).

    Returns
    -------
    SavedTuning
        The :class:`~fisherwalk.tuned.walker.Tuning` (arrays in the record's dtype), the
        ``names`` and the ``record``. Pass it as ``start(..., shape=saved)`` to
        reuse its proposal shape on a refit; start() re-chooses the scale for the new
        spectrum of A = Sᵀ H S.

    Raises
    ------
    InputError
        The record is unreadable, inconsistent, or holds NaN or infinity.
    """
    record = read_record(source)
    t = record["tuning"]
    dtype = np.dtype(record["dtype"])

    def matrix(values):
        return np.asarray(values, dtype=dtype)

    sampler = str(t.get("sampler", registry.DEFAULT))
    parameter = registry.family(sampler).parameter
    value = float(t[parameter] if parameter in t else t["scale"])  # (older records: 'scale')
    aim = t.get("aim")  # the user's target_acceptance= (absent in older records; checked)
    if aim is not None:
        aim = float(decode_number(aim, "tuning.aim", "tuning record"))
    tuning = Tuning(matrix(t["shape"]), None, matrix(t["whitening"]), str(t["shape_kind"]),
                    str(t.get("criterion", "slowest")), sampler,
                    aim=aim)._replace(**{parameter: value})
    return SavedTuning(tuning, tuple(record["names"]), record)


def check_tuning(saved: SavedTuning, names: tuple[str, ...], *,
                 where: str = "start(shape=<saved tuning>)") -> None:
    """Refuse a saved tuning made for other parameters (:class:`InputError`).

    Compares the dimension, and the parameter names when the tuning carries them.
    """
    names = tuple(names)
    d = len(names)
    tuning = saved.tuning
    if tuple(np.shape(tuning.shape)) != (d, d):
        raise InputError(
            explain(
                f"The saved tuning is for {tuning.dim} parameters; this model has {d} "
                f"({', '.join(names[:6])}{', ...' if d > 6 else ''}).",
                where,
                "pass a tuning saved from a model with the same parameters, or use "
                "shape='fisher'.",
            )
        )
    saved = saved.names
    if saved is not None and tuple(saved) != names:
        raise InputError(
            explain(
                "The saved tuning was made for other parameters: "
                f"{name_difference(tuple(saved), names)}.",
                where,
                "pass a tuning saved from a model with the same parameters (same names, same "
                "order), or use shape='fisher'.",
            )
        )
