"""The exception family of fisherwalk.

Every error the package raises on purpose derives from :class:`FisherwalkError`.
Each message says three things: what went wrong, where (which parameter, which
chain, which step, which file) and what to do about it.
"""

from __future__ import annotations

import os
import sys
import warnings

__all__ = [
    "FisherwalkError",
    "InputError",
    "ModelError",
    "FitError",
    "NoModeError",
    "SamplingError",
    "CheckpointError",
    "ModelFileError",
    "FisherwalkWarning",
    "Float32Warning",
    "warn_user",
]


def warn_user(message: str, category: type[Warning]) -> None:
    """Issue a warning attributed to the first caller outside the fisherwalk package
    (the user's line), however deep inside the package it is raised."""
    package = os.path.dirname(os.path.abspath(__file__))
    frame, level = sys._getframe(1), 2  # stacklevel 2: the caller of warn_user
    while frame is not None and os.path.abspath(frame.f_code.co_filename).startswith(package):
        frame, level = frame.f_back, level + 1
    warnings.warn(message, category, stacklevel=level)


def explain(what: str, where: str, todo: str) -> str:
    """Format an error message: what went wrong, where, and what to do."""
    return f"{what}\n  where: {where}\n  what to do: {todo}"


class FisherwalkError(Exception):
    """Base class of every error fisherwalk raises on purpose."""


class InputError(FisherwalkError, ValueError):
    """An argument of the public API is malformed (shape, dtype, range, key)."""


class ModelError(FisherwalkError):
    """The user's log density misbehaves (non-scalar, non-finite, wrong structure)."""


class FitError(FisherwalkError):
    """The Laplace fit failed: no convergence, a runaway mode, or a Hessian that is not
    positive definite."""


class NoModeError(FitError):
    """The mode search ran off along one parameter while the log density kept rising:
    the posterior has no mode (a funnel). ``runaway`` holds the diagnosis and the points
    the search visited (:class:`fisherwalk.fit.runaway.Runaway`); :func:`fisherwalk.start`
    catches it and warms a gradient sampler up from draws instead."""

    def __init__(self, message: str, runaway=None):
        super().__init__(message)
        self.runaway = runaway


class SamplingError(FisherwalkError):
    """Warm-up or sampling met a state it cannot continue from."""


class CheckpointError(FisherwalkError):
    """A checkpoint is damaged, or was written for another model or run."""


class ModelFileError(FisherwalkError):
    """A model file given to the command line cannot be used."""


class FisherwalkWarning(UserWarning):
    """Base class of fisherwalk's warnings."""


class Float32Warning(FisherwalkWarning):
    """JAX computes in float32; the Laplace fit needs float64."""
