"""fisherwalk: samplers for JAX models, tuned from the Fisher information before their
first step.

The public names are the ones below; everything in the sub-packages (``base``,
``theory``, ``fit``, ``results``, ``run``, ``cli``) is internal and may change.
"""

from .errors import (
    CheckpointError,
    FisherwalkError,
    FisherwalkWarning,
    FitError,
    Float32Warning,
    InputError,
    ModelError,
    ModelFileError,
    NoModeError,
    SamplingError,
)
from .fit.laplace import LaplaceFit, laplace
from .results.trace import Trace
from .run.blackjax_handoff import handoff
from .run.resume import resume
from .run.sampling import walk
from .run.start import start
from .run.tuningfile import SavedTuning, load_tuning, save_tuning
from .run.walker import Tuning, Walker
from .run.warmup import WarmupReport, refine
from .theory.randomwalk import ScaleChoice, optimal_scale

__version__ = "0.1.0"


def __getattr__(name: str):
    # ``fisherwalk.plots`` needs the optional extra 'plots' (matplotlib): imported on use.
    if name == "plots":
        from .results import plots

        return plots
    raise AttributeError(f"module 'fisherwalk' has no attribute {name!r}")


__all__ = [
    "optimal_scale",
    "laplace",
    "start",
    "refine",
    "walk",
    "resume",
    "save_tuning",
    "load_tuning",
    "handoff",
    "ScaleChoice",
    "LaplaceFit",
    "Tuning",
    "SavedTuning",
    "Walker",
    "WarmupReport",
    "Trace",
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
]
