"""fisherwalk: samplers for JAX models, tuned from the Fisher information before their
first step.

The public names are the ones below; everything in the sub-packages (``base``,
``theory``, ``fit``, ``results``, ``run``, ``cli``) is internal and may change.
"""

from .base.shards import sharded_logdensity
from .engine.loop import ChainState
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
from .models.declared import constrained_problem
from .models.numpyro_model import model_problem
from .models.space import ModelProblem
from .persistence.tuningfile import SavedTuning, load_tuning, save_tuning
from .prepare.start import start
from .prepare.warmup import WarmupReport, refine
from .results.facts import RunFacts
from .results.report import Summary
from .results.trace import Trace
from .theory.randomwalk import ScaleChoice, optimal_scale
from .tuned.walker import LaplaceCheck, StartReport, Tuning, Walker
from .workflow.blackjax_handoff import handoff
from .workflow.devices import spread_chains
from .workflow.plan import RunLength
from .workflow.reopen import reopen
from .workflow.resume import resume
from .workflow.sampling import walk

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
    "reopen",
    "save_tuning",
    "load_tuning",
    "handoff",
    "spread_chains",
    "sharded_logdensity",
    "model_problem",
    "constrained_problem",
    "ModelProblem",
    "ScaleChoice",
    "LaplaceFit",
    "Tuning",
    "SavedTuning",
    "Walker",
    "ChainState",
    "StartReport",
    "LaplaceCheck",
    "WarmupReport",
    "Trace",
    "RunLength",
    "RunFacts",
    "Summary",
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
