"""fisherwalk: random-walk Metropolis for JAX models, tuned from the Fisher information
before its first step."""

from .checkpoint import resume
from .errors import (
    CheckpointError,
    FisherwalkError,
    FisherwalkWarning,
    FitError,
    Float32Warning,
    InputError,
    ModelError,
    ModelFileError,
    SamplingError,
)
from .laplace import LaplaceFit, laplace
from .record import load_tuning, save_tuning
from .sampling import Trace, walk
from .scaling import ScaleChoice, optimal_scale
from .walker import Tuning, Walker, start
from .warmup import WarmupReport, refine

__version__ = "0.1.0"

__all__ = [
    "optimal_scale",
    "laplace",
    "start",
    "refine",
    "walk",
    "resume",
    "save_tuning",
    "load_tuning",
    "ScaleChoice",
    "LaplaceFit",
    "Tuning",
    "Walker",
    "WarmupReport",
    "Trace",
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
