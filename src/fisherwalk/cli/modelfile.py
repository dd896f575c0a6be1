"""Model files for the ``fisherwalk run`` command: import one and check what it defines.

A model file is a Python file defining ``logdensity(position)`` and
``initial_position``, and optionally ``fisher`` and ``names``. :func:`load_model`
imports it (running its code) and checks these eagerly, raising
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

from ..errors import ModelFileError, explain

__all__ = ["ModelSpec", "load_model"]


class ModelSpec(NamedTuple):
    """What a model file provides."""

    path: Path
    logdensity: Any  # position -> scalar
    initial_position: Any  # pytree of floats
    fisher: Any  # None, a (d, d) matrix, or mode -> (d, d)
    labels: tuple[str, ...] | None  # readable names, one per scalar parameter
    dim: int


def _file_problem(path: Path, what: str, todo: str) -> ModelFileError:
    return ModelFileError(explain(what, f"model file {path}", todo))


def _advice(err: Exception) -> str:
    """What to do when logdensity(initial_position) fails, by the kind of failure."""
    if isinstance(err, NameError | AttributeError | ImportError):
        return ("fix the model file: a name used inside logdensity is not defined or not "
                "imported there (check the spelling and the file's imports).")
    if isinstance(err, KeyError | IndexError | TypeError | ValueError):
        return ("make logdensity accept initial_position's structure (the same keys, "
                "shapes and order).")
    return "fix the model file so that logdensity(initial_position) returns a number."


def load_model(path) -> ModelSpec:
    """Import a model file and check what it defines.

    The file must define ``logdensity(position)`` (a JAX function returning a scalar)
    and ``initial_position`` (a pytree of floating arrays); it may define
    ``fisher(mode)`` (or a matrix) and ``names`` (one label per scalar parameter).
    Importing the file runs its code.

    Raises
    ------
    ModelFileError
        The file is missing, fails to import, lacks a name, or its log density does
        not return a finite-shaped scalar at ``initial_position``.
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
        if isinstance(err, KeyboardInterrupt | SystemExit):
            raise
        raise _file_problem(path, f"Importing it raised {_describe(err, path)}",
                            "fix the file so that `python MODEL_FILE` runs without error."
                            ) from None
    missing = [n for n in ("logdensity", "initial_position") if not hasattr(module, n)]
    if missing:
        raise _file_problem(path, f"It does not define {' or '.join(missing)}.",
                            "define logdensity(position) -> scalar and initial_position "
                            "(e.g. {'beta': jnp.zeros(3)}) at the top level of the file.")
    logdensity = module.logdensity
    if not callable(logdensity):
        raise _file_problem(path, f"logdensity is a {type(logdensity).__name__}, not a function.",
                            "define logdensity as a function of the position.")
    position = module.initial_position
    try:
        value = logdensity(position)
        shape = np.shape(value)
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
    fisher = getattr(module, "fisher", None)
    labels = getattr(module, "names", None)
    if labels is not None:
        labels = tuple(str(label) for label in labels)
        if len(labels) != dim:
            raise _file_problem(path, f"names has {len(labels)} entries but the position has "
                                f"{dim} scalar parameters.",
                                "give one name per scalar parameter, in ravelled order "
                                "(dict keys sorted, arrays row-major), or leave names out.")
    return ModelSpec(path, logdensity, position, fisher, labels, dim)


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
