"""The exception family of fisherwalk.

Every error the package raises on purpose derives from :class:`FisherwalkError`.
Each message says three things: what went wrong, where (which parameter, which
chain, which step, which file) and what to do about it.
"""

from __future__ import annotations

__all__ = [
    "FisherwalkError",
    "InputError",
    "ModelError",
    "FitError",
    "SamplingError",
    "CheckpointError",
    "ModelFileError",
    "FisherwalkWarning",
    "Float32Warning",
]


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
