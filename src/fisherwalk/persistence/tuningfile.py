"""A walker's tuning as a plain JSON record, and back.

The record keeps what was learned before the first step, so that a later run can
reuse it or a checkpoint can rebuild its walker: the parameter names, the proposal
shape S and the factor (l/√d)·S, the scale l and the target acceptance, the spectrum
of A = Sᵀ H S, and the Laplace fit (mode and observed Fisher information H).

Loaded with :func:`load_tuning`, a record is a :class:`SavedTuning` (the
:class:`~fisherwalk.tuned.walker.Tuning`, the parameter names and the record), which
``start(..., shape=<SavedTuning>)`` accepts as the proposal shape of a refit: start()
then computes the spectrum of A = Sᵀ H_new S against the new Fisher information and
chooses the scale for that spectrum (:func:`fisherwalk.optimal_scale`).

JSON follows the package's one convention (:mod:`fisherwalk.base.jsonio`): numbers are
nested lists of floats (the shortest repr, which reads back to the same double, so
float64 arrays survive bit for bit). The tuning and the fit must be finite, both when
writing and when reading; only the PSIS k̂ of the Laplace check may be ``"Infinity"``
(too few finite draws). A record is read with its size, depth and dimension bounded
before anything is allocated, and validated as :func:`fisherwalk.start` validates its
inputs: a symmetric positive-definite Fisher information and proposal covariance,
scale > 0, target acceptance in (0, 1).
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..base import pytrees
from ..base.checks import whole_number
from ..base.jsonio import decode_number, to_plain, write_json_atomic
from ..base.pytrees import name_difference, written_order
from ..errors import InputError, explain
from ..fit.laplace import LaplaceFit
from ..tuned.walker import LaplaceCheck, StartReport, Walker, assemble
from .tuningread import (
    FORMAT,
    FORMAT_VERSION,
    SavedTuning,
    bad_record,
    check_tuning,
    load_tuning,
    read_record,
)

__all__ = [
    "SavedTuning",
    "tuning_record",
    "save_tuning",
    "load_tuning",
    "read_record",
    "check_tuning",
    "walker_from_record",
]

# ----------------------------------------------------------------------------- writing


def _package_version() -> str:
    try:
        from importlib.metadata import version

        return version("fisherwalk")
    except Exception:  # noqa: BLE001 - not installed: fall back to the source tree's
        from .. import __version__

        return str(__version__)


def _plain_array(value: Any, field: str) -> list:
    array = np.asarray(value, dtype=np.float64)
    if not np.isfinite(array).all():
        raise InputError(
            explain(
                f"The tuning field '{field}' holds a non-finite value (NaN or infinity); "
                "a record stores finite numbers only.",
                f"tuning_record(), field '{field}'",
                "save a walker whose fit and tuning are finite (re-run fisherwalk.start).",
            )
        )
    return array.tolist()


def _plain_number(value: Any, field: str) -> float:
    return float(_plain_array(value, field))


def _structure(tree: Any) -> dict | None:
    """The pytree structure of a position as plain JSON, or None when it has a node
    type JSON cannot name (a NamedTuple, a dataclass, ...)."""
    if isinstance(tree, dict):
        if not all(isinstance(key, str) for key in tree):
            return None
        items = {key: _structure(value) for key, value in tree.items()}
        return None if any(v is None for v in items.values()) else {"dict": items}
    if type(tree) in (list, tuple):
        items = [_structure(value) for value in tree]
        return None if any(v is None for v in items) else {type(tree).__name__: items}
    if tree is None:
        return {"none": None}
    if hasattr(tree, "shape") and hasattr(tree, "dtype"):
        return {"array": {"shape": list(np.shape(tree)), "dtype": str(np.dtype(tree.dtype))}}
    if isinstance(tree, float):
        return {"array": {"shape": [], "dtype": "float64"}}
    return None


def _choice_record(choice: Any) -> dict | None:
    if not hasattr(choice, "_asdict"):
        return None
    out: dict[str, Any] = {}
    for name, value in choice._asdict().items():
        if value is None or isinstance(value, str):
            out[name] = value
        elif isinstance(value, bool | int | np.integer):
            out[name] = int(value)
        else:
            out[name] = _plain_array(value, f"choice.{name}")
    return out


def _check_record(check: Any) -> dict | None:
    """The PSIS check of the Laplace approximation (walker.LaplaceCheck) as numbers; an
    infinite k̂ (too few finite draws) is written "Infinity" (:mod:`fisherwalk.base.jsonio`)."""
    if not isinstance(check, LaplaceCheck):
        return None
    return to_plain(check._asdict())


def _laplace_check(values: Any) -> LaplaceCheck | None:
    if not isinstance(values, dict) or set(values) != set(LaplaceCheck._fields):
        return None
    try:
        khat = math.inf if values["khat"] is None else decode_number(
            values["khat"], "check.khat", "tuning record")
        threshold = decode_number(values["threshold"], "check.threshold", "tuning record")
        draws = whole_number(values["draws"], "check.draws", "tuning record", minimum=0)
        outside = whole_number(values["outside_support"], "check.outside_support",
                               "tuning record", minimum=0)
    except InputError:
        return None
    return LaplaceCheck(khat, threshold, draws, outside)


def _family_fields(tuning) -> dict:
    """The family's own tuned parameter under its own name (``scale`` for the random walk,
    with its proposal factor (scale/√d)·S; ``step_size`` for a gradient family)."""
    name, value = tuning.parameter
    fields = {name: _plain_number(value, name)}
    if tuning.scale is not None:  # the random walk's factor, checked against its scale
        factor = (float(tuning.scale) / math.sqrt(tuning.dim)) * np.asarray(tuning.shape)
        fields["factor"] = _plain_array(factor, "factor")
    return fields


def tuning_record(walker: Walker) -> dict:
    """The walker's tuning and Laplace fit as a plain, JSON-ready dict.

    Parameters
    ----------
    walker
        From :func:`fisherwalk.start` or :func:`fisherwalk.refine`.

    Returns
    -------
    dict
        Keys ``format``, ``format_version``, ``package_version``, ``dim``, ``names``,
        ``dtype``, ``structure`` (the position's pytree layout, or None), ``tuning``
        (``shape_kind``, ``shape``, ``factor``, ``scale``, ``target_acceptance``,
        ``spectrum``, ``predicted_jump``, ``whitening``, ``choice``), ``laplace``
        (``mode``, ``logdensity``, ``fisher``, ``cholesky``, ...) and ``notes``.

    Raises
    ------
    InputError
        If the walker is not a Walker or holds a non-finite number.
    """
    if not isinstance(walker, Walker):
        raise InputError(explain(f"Expected a Walker, got {type(walker).__name__}.",
                                 "tuning_record(walker)",
                                 "pass the result of fisherwalk.start() or refine()."))
    tuning, fit = walker.tuning, walker.report.laplace
    return {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "package_version": _package_version(),
        "dim": int(tuning.dim),
        "names": list(walker.names),
        "dtype": str(np.asarray(tuning.shape).dtype),
        "structure": _structure(fit.mode),
        "tuning": {
            "sampler": str(tuning.sampler),
            "shape_kind": str(tuning.shape_kind),
            "criterion": str(tuning.criterion),
            "shape": _plain_array(tuning.shape, "shape"),
            **_family_fields(tuning),
            "target_acceptance": _plain_number(tuning.target_acceptance, "target_acceptance"),
            # the user's target_acceptance= for dual averaging (HMC, NUTS), only when given:
            # a record (and a checkpoint's identity) without one is as it was before
            **({} if tuning.aim is None else {"aim": _plain_number(tuning.aim, "aim")}),
            "spectrum": _plain_array(tuning.spectrum, "spectrum"),
            "predicted_jump": _plain_number(tuning.predicted_jump, "predicted_jump"),
            "whitening": _plain_array(tuning.whitening, "whitening"),
            "choice": _choice_record(tuning.choice),
        },
        "laplace": {
            "mode": _plain_array(fit.mode_flat, "mode"),
            "logdensity": _plain_number(fit.logdensity, "logdensity"),
            "fisher": _plain_array(fit.fisher, "fisher"),
            "cholesky": _plain_array(fit.cholesky, "cholesky"),
            "gradient_norm": _plain_number(fit.gradient_norm, "gradient_norm"),
            "fisher_source": str(getattr(fit, "fisher_source", "hessian")),
        },
        "check": _check_record(getattr(walker.report, "check", None)),
        "notes": [str(note) for note in walker.report.notes],
    }


def save_tuning(walker: Walker, path: str | os.PathLike) -> Path:
    """Write :func:`tuning_record` of a walker to a JSON file (atomically).

    Returns the path written. NaN and infinity are refused (:class:`InputError`).
    """
    record = tuning_record(walker)
    return write_json_atomic(path, record, indent=1, where=f"save_tuning({os.fspath(path)!r})")


# ----------------------------------------------------------------------------- rebuilding


def _template(structure: Any, dtype: np.dtype, room: list[int]) -> Any:
    """The position pytree ``structure`` describes, of zeros. ``room`` ([values left]) is
    the record's parameter count: the leaves' declared sizes are counted against it
    before each leaf is allocated, so a structure edited to declare a huge leaf is
    refused (ValueError) without allocating it."""
    (kind, body), = structure.items()
    if kind == "dict":
        return {key: _template(value, dtype, room) for key, value in body.items()}
    if kind in ("list", "tuple"):
        items = [_template(value, dtype, room) for value in body]
        return items if kind == "list" else tuple(items)
    if kind == "none":
        return None
    if kind == "array":
        shape = tuple(body["shape"])
        if not all(isinstance(n, int) and not isinstance(n, bool) and n >= 0 for n in shape):
            raise ValueError("shape")
        room[0] -= math.prod(shape)
        if room[0] < 0 or len(shape) > 32:
            raise ValueError("the leaves declare more values than the record's parameters")
        return jnp.zeros(shape, dtype=np.dtype(body["dtype"]))
    raise ValueError(kind)


def _unravel_for(record: dict, position: Any) -> Callable:
    where = "walker_from_record()"
    names = tuple(record["names"])
    if position is None:
        structure = record.get("structure")
        if structure is None:
            raise InputError(explain(
                "The record does not describe the position's structure (it used a node type "
                "JSON cannot name, such as a NamedTuple).", where,
                "pass position=<a position of the model> so the structure can be rebuilt."))
        try:
            position = _template(structure, np.dtype(record["dtype"]), [len(names)])
        except (AttributeError, KeyError, TypeError, ValueError) as err:
            raise bad_record("Field 'structure' is malformed (or declares more values than the "
                       f"record's {len(names)} parameters).", where) from err
    flat = pytrees.flatten_position(jax.tree.map(jnp.zeros_like, position), where=where)
    if flat.names != names:
        raise InputError(explain(
            "The position's structure does not give the record's parameters: "
            f"{name_difference(names, flat.names)}.", where,
            "pass a position of the model the record was written for."))
    return flat.unravel


def walker_from_record(
    record: dict,
    logdensity_fn: Callable,
    positions: Any,
    logdensity: Any = None,
    *,
    position: Any = None,
) -> Walker:
    """Rebuild a :class:`~fisherwalk.tuned.walker.Walker` from a record and a log density.

    The log density cannot be stored; the tuning (factor, scale, target acceptance,
    spectrum, whitening) and the Laplace fit are taken from the record unchanged, the
    BlackJAX algorithm and the compiled engine are built anew.

    Parameters
    ----------
    record
        A tuning record (dict or JSON path), see :func:`tuning_record`.
    logdensity_fn
        The model's log density, ``position -> scalar``.
    positions
        (chains, d) ravelled chain positions to start from.
    logdensity
        (chains,) log densities there; computed when None.
    position
        A position of the model, needed only when the record could not describe the
        pytree structure (``record["structure"]`` is None).

    Raises
    ------
    InputError
        Malformed record, positions of the wrong shape or not finite, or a position
        structure that does not give the record's parameter names.
    """
    saved = load_tuning(record)
    record, tuning, names = saved.record, saved.tuning, saved.names
    dim = tuning.dim
    unravel = _unravel_for(record, position)
    dtype = np.dtype(record["dtype"])
    where = "walker_from_record(positions=...)"
    flat = np.asarray(positions)
    if flat.ndim != 2 or flat.shape[1] != dim or flat.shape[0] < 1:
        raise InputError(explain(f"positions has shape {flat.shape}; expected (chains, {dim}).",
                                 where, "pass one ravelled position per chain."))
    if not np.isfinite(flat).all():
        raise InputError(explain("positions holds non-finite values.", where,
                                 "pass finite chain positions."))
    flat = flat.astype(dtype, copy=False)
    fit_values = record["laplace"]
    mode_flat = np.asarray(fit_values["mode"], dtype=dtype)
    mode = unravel(jnp.asarray(mode_flat))
    fit = LaplaceFit(
        mode=mode,
        mode_flat=jnp.asarray(mode_flat),
        logdensity=float(fit_values["logdensity"]),
        fisher=np.asarray(fit_values["fisher"], dtype=dtype),
        cholesky=np.asarray(fit_values["cholesky"], dtype=dtype),
        gradient_norm=float(fit_values["gradient_norm"]),
        iterations=0,
        evaluations=0,
        names=names,
        fisher_source=str(fit_values.get("fisher_source", "hessian")),
        modes=((mode, float(fit_values["logdensity"])),),
        warnings=(),
        seconds={},
        order=() if position is None else written_order(position),  # the user's order
    )
    notes = tuple(str(n) for n in record.get("notes", ())) + (
        "Walker rebuilt from a saved record: the tuning and the Laplace fit were not "
        "recomputed.",)
    report = StartReport(fit, _laplace_check(record.get("check")), notes)
    if logdensity is not None:
        logdensity = np.asarray(logdensity).astype(dtype, copy=False)
    walker = assemble(logdensity_fn, report, tuning, flat, logdensity)
    values = np.asarray(walker.state.logdensity)
    if values.shape != (flat.shape[0],) or not np.isfinite(values).all():
        raise InputError(explain(
            f"The log densities at the positions have shape {values.shape} or are not "
            "finite.", "walker_from_record(logdensity=...)",
            "pass positions inside the model's support (one finite value per chain)."))
    return walker
