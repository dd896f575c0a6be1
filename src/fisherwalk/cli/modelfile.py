"""Model files for the ``fisherwalk run`` command: import one and check what it defines.

A model file is a Python file defining ``logdensity(position)`` and
``initial_position``, and optionally ``fisher``, ``names``, ``pointwise(position)``
(the log likelihood per observation), ``derived(position)`` (quantities to summarise)
and ``predict(position, key)`` (predictions with their own randomness, summarised and
exported as the posterior predictive).
A model of a data file (``--data table.csv``) instead defines ``make(data)``, which
receives the table as a mapping column name -> float array and returns
``(logdensity, initial_position)``, or a dict or object with those names (and any of the
optional ones); it may declare the columns it needs, ``columns = ("y", "x")``, so that
only these are read and a missing one is named before ``make`` runs.

Instead of ``logdensity`` and ``initial_position``, a file (or what ``make(data)``
returns) may define a NumPyro ``model`` with ``model_args`` (a tuple) and
``model_kwargs`` (a dict): :func:`fisherwalk.model_problem` turns it into the log density
on the unconstrained space, the model's own starting point and its sites, and the run
reports the sites' values under their names.
:func:`load_model` imports the file (running its code) and checks these eagerly, raising
:class:`~fisherwalk.errors.ModelFileError` with the file and, for a failure inside the
user's code, the line.
"""

from __future__ import annotations

import hashlib
import importlib.util
import traceback
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

from ..errors import FisherwalkError, ModelFileError, explain
from ..models.numpyro_model import model_problem
from .datafile import Table, read_table

__all__ = ["ModelSpec", "load_model"]


class ModelSpec(NamedTuple):
    """What a model file provides."""

    path: Path
    logdensity: Any  # position -> scalar
    initial_position: Any  # pytree of floats
    fisher: Any  # None, a (d, d) matrix, or mode -> (d, d)
    labels: tuple[str, ...] | None  # readable names, one per scalar parameter
    dim: int
    pointwise: Any = None  # None or position -> (n_obs,) log likelihood per observation
    derived: Any = None  # None or position -> pytree of derived quantities
    data: Table | None = None  # the data file given to make(data)
    predict: Any = None  # None or (position, key) -> pytree of predictions


def _file_problem(path: Path, what: str, todo: str) -> ModelFileError:
    return ModelFileError(explain(what, f"model file {path}", todo))


_OPTIONAL = ("fisher", "names", "pointwise", "derived", "predict")
_NUMPYRO = ("model", "model_args", "model_kwargs")  # a NumPyro model instead of logdensity


def _advice(err: Exception) -> str:
    """What to do when logdensity(initial_position) fails, by the kind of failure."""
    if isinstance(err, NameError | AttributeError | ImportError):
        return ("fix the model file: a name used inside logdensity is not defined or not "
                "imported there (check the spelling and the file's imports).")
    if isinstance(err, KeyError | IndexError | TypeError | ValueError):
        return ("make logdensity accept initial_position's structure (the same keys, "
                "shapes and order).")
    return "fix the model file so that logdensity(initial_position) returns a number."


def load_model(path, data=None) -> ModelSpec:
    """Import a model file and check what it defines.

    The file must define ``logdensity(position)`` (a JAX function returning a scalar)
    and ``initial_position`` (a pytree of floating arrays), or, when ``data`` (the path
    of a CSV file) is given, ``make(data)`` returning them; it may define
    ``fisher(mode)`` (or a matrix), ``names`` (one label per scalar parameter),
    ``pointwise(position)``, ``derived(position)`` and ``columns``. Importing the file
    runs its code.

    Raises
    ------
    ModelFileError
        The file is missing, fails to import, lacks a name, has ``make`` without data
        or data without ``make``, or its log density does not return a finite-shaped
        scalar at ``initial_position``.
    InputError
        The data file lacks a declared column or holds a cell that is not a number
        (:func:`fisherwalk.cli.datafile.read_table`).
    """
    import jax

    path = Path(path)
    if not path.is_file():
        raise _file_problem(path, "The model file does not exist (or is not a file).",
                            "check the path; the file must be a Python file defining "
                            "logdensity and initial_position.")
    module_name = f"_fisherwalk_model_{hashlib.sha1(str(path.resolve()).encode()).hexdigest()[:12]}"
    spec = importlib.util.spec_from_file_location(module_name, path)
    if spec is None or spec.loader is None:
        raise _file_problem(path, "Python cannot load this file as a module.",
                            "give a file whose name ends in .py.")
    module = importlib.util.module_from_spec(spec)
    try:
        spec.loader.exec_module(module)
    except BaseException as err:  # noqa: BLE001 - any failure of the user's code is reported
        if isinstance(err, KeyboardInterrupt):
            raise
        if isinstance(err, SystemExit):  # sys.exit(0) in the file must not pass for success
            raise _file_problem(path, f"Importing it called sys.exit({err.code!r:.40}) (or "
                                "raised SystemExit): the command would end with nothing "
                                "written.", "remove the exit from the model file (guard "
                                "script code with `if __name__ == \"__main__\":`).") from None
        raise _file_problem(path, f"Importing it raised {_describe(err, path)}",
                            "fix the file so that `python MODEL_FILE` runs without error."
                            ) from None
    table = None
    parts = {name: getattr(module, name) for name in ("logdensity", "initial_position",
                                                         *_OPTIONAL, *_NUMPYRO)
             if hasattr(module, name)}
    if data is not None:
        table = read_table(data, _declared_columns(module, path))
        parts = {**parts, **_made(module, table, path)}
    elif hasattr(module, "make"):
        raise _file_problem(path, "It defines make(data), so it needs a data file.",
                            "pass the table: fisherwalk run MODEL_FILE --data table.csv.")
    if "model" in parts and "logdensity" not in parts:
        parts = {**parts, **_from_numpyro(parts, path)}
    missing = [n for n in ("logdensity", "initial_position") if n not in parts]
    if missing:
        raise _file_problem(path, f"It does not define {' or '.join(missing)}.",
                            "define logdensity(position) -> scalar and initial_position "
                            "(e.g. {'beta': jnp.zeros(3)}) at the top level of the file.")
    logdensity = parts["logdensity"]
    if not callable(logdensity):
        raise _file_problem(path, f"logdensity is a {type(logdensity).__name__}, not a function.",
                            "define logdensity as a function of the position.")
    position = parts["initial_position"]
    try:
        value = logdensity(position)
        shape = np.shape(value)
    except SystemExit as err:
        raise _file_problem(path, f"logdensity(initial_position) called "
                            f"sys.exit({err.code!r:.40}).",
                            "remove the exit from logdensity.") from None
    except Exception as err:  # noqa: BLE001
        raise _file_problem(path, f"logdensity(initial_position) raised {_describe(err, path)}",
                            _advice(err)) from None
    if shape != ():
        raise _file_problem(path, f"logdensity(initial_position) returns an array of shape "
                            f"{shape}, not a scalar.",
                            "sum the log likelihood over observations (e.g. jnp.sum(...)) so "
                            "that it returns one number.")
    leaves = jax.tree_util.tree_leaves(position)
    dim = int(sum(np.size(leaf) for leaf in leaves))
    fisher = parts.get("fisher")
    labels = parts.get("names")
    if labels is not None:
        labels = tuple(str(label) for label in labels)
        if len(labels) != dim:
            raise _file_problem(path, f"names has {len(labels)} entries but the position has "
                                f"{dim} scalar parameters.",
                                "give one name per scalar parameter, in ravelled order "
                                "(dict keys sorted, arrays row-major), or leave names out.")
    for name in ("pointwise", "derived", "predict"):
        if parts.get(name) is not None and not callable(parts[name]):
            raise _file_problem(path, f"{name} is a {type(parts[name]).__name__}, not a "
                                "function.", f"define {name}(position) as a function.")
    return ModelSpec(path, logdensity, position, fisher, labels, dim,
                     parts.get("pointwise"), parts.get("derived"), table,
                     parts.get("predict"))


def _from_numpyro(parts: dict, path: Path) -> dict:
    """logdensity, initial_position (and the observed sites' pointwise log likelihood)
    of a NumPyro ``model`` with ``model_args`` and ``model_kwargs``."""
    args, kwargs = parts.get("model_args", ()), parts.get("model_kwargs", {})
    if not isinstance(args, tuple) or not isinstance(kwargs, dict):
        raise _file_problem(path, f"model_args is a {type(args).__name__} and model_kwargs a "
                            f"{type(kwargs).__name__}.",
                            "define model_args as a tuple and model_kwargs as a dict, "
                            "e.g. model_args = (x,) and model_kwargs = {'y': y}.")
    try:
        problem = model_problem(parts["model"], args, kwargs)
    except FisherwalkError as err:
        raise _file_problem(path, f"Its NumPyro model cannot be used: {err}",
                            "fix the model as the message says.") from None
    made = {"logdensity": problem.logdensity_fn, "initial_position": problem.position}
    if problem.space.pointwise is not None and parts.get("pointwise") is None:
        made["pointwise"] = problem.space.pointwise
    return made


def _declared_columns(module, path: Path) -> tuple[str, ...] | None:
    """The model file's ``columns`` (names of the data columns it needs), or None."""
    if not hasattr(module, "make"):
        raise _file_problem(path, "A data file was given but the model file defines no "
                            "make(data).",
                            "define make(data) -> (logdensity, initial_position), with data a "
                            "mapping column name -> array; or leave out --data.")
    columns = getattr(module, "columns", None)
    if columns is None:
        return None
    if isinstance(columns, str) or not all(isinstance(c, str) for c in columns):
        raise _file_problem(path, f"columns is {columns!r}, not a sequence of column names.",
                            "write e.g. columns = (\"count\", \"exposure\").")
    return tuple(columns)


def _made(module, table: Table, path: Path) -> dict:
    """What make(data) returns, as a dict of the model's parts."""
    make = module.make
    if not callable(make):
        raise _file_problem(path, f"make is a {type(make).__name__}, not a function.",
                            "define make(data) as a function.")
    try:
        made = make(dict(table.columns))
    except SystemExit as err:
        raise _file_problem(path, f"make(data) called sys.exit({err.code!r:.40}).",
                            "remove the exit from make(data).") from None
    except Exception as err:  # noqa: BLE001 - any failure of the user's code is reported
        raise _file_problem(path, f"make(data) raised {_describe(err, path)}",
                            "data maps each column name of the table to a float array; "
                            "fix make so that it accepts it.") from None
    if isinstance(made, tuple) and len(made) == 2:
        return {"logdensity": made[0], "initial_position": made[1]}
    if isinstance(made, dict):
        return {k: v for k, v in made.items() if k in ("logdensity", "initial_position",
                                                        *_OPTIONAL, *_NUMPYRO)}
    found = {k: getattr(made, k) for k in ("logdensity", "initial_position", *_OPTIONAL,
                                           *_NUMPYRO) if hasattr(made, k)}
    if found:
        return found
    raise _file_problem(path, f"make(data) returned a {type(made).__name__}.",
                        "return (logdensity, initial_position), or a dict with those keys "
                        "(and optionally fisher, names, pointwise, derived).")


def _describe(err: BaseException, path: Path) -> str:
    """'TypeError: message (line 12)': the exception and the line of the model file."""
    line = ""
    for frame in reversed(traceback.extract_tb(err.__traceback__)):
        if Path(frame.filename).resolve() == path.resolve():
            line = f" (line {frame.lineno}: {frame.line.strip() if frame.line else ''})"
            break
    if isinstance(err, SyntaxError) and err.lineno:
        line = f" (line {err.lineno})"
    return f"{type(err).__name__}: {err}{line}"
