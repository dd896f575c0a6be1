"""The gradient samplers inside start, refine and walk; and the choice of sampler.

``start(..., sampler="mala" | "hmc" | "nuts")`` gives a walker whose tuning is a
:class:`~fisherwalk.run.walker.GradientTuning` (BlackJAX's step size and the metric
S Sᵀ, H⁻¹ by default) and whose model's engine is the gradient samplers' compiled loop
(:mod:`fisherwalk.run.gradient`), which runs BlackJAX's own kernels on the whitened
posterior. The walker's state is then the chains' whitened state (z, log density,
gradient): keeping it exact is what makes a resumed run bit-identical.

``sampler="auto"`` times one batched log-density evaluation and one batched gradient
evaluation at the chain starts, and predicts each sampler's time to an answer
(bulk ESS 400 per parameter) from its Gaussian-limit ESS per evaluation at this d
(:func:`fisherwalk.theory.gradient.predicted_ess_per_evaluation`); the fastest wins and
the report says why.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterator
from typing import Any, NamedTuple

import jax
import numpy as np

from ..errors import InputError, explain
from ..theory.gradient import (
    GRADIENT_SAMPLERS,
    INTEGRATION_TIME,
    optimal_gradient_step,
    predicted_ess_per_evaluation,
)
from . import gradient
from .engine import DEFAULT_CHUNK
from .gradient_checks import check_gradients
from .stepsize import GradientWarmup, warm_up
from .walker import GradientTuning, Model

__all__ = ["SAMPLER_CHOICES", "check_sampler", "gradient_tuning", "gradient_model",
           "gradient_state", "warm_gradient", "dual_averaging_target", "gradient_chunks",
           "choose_sampler", "SamplerChoice"]

SAMPLER_CHOICES = ("rwm", "mala", "hmc", "nuts", "auto")
ANSWER_ESS = 400.0  # bulk ESS per parameter that counts as an answer (Vehtari et al. 2021)
# Extra compilation a gradient sampler's program costs over the random walk's, in seconds:
# measured on this project's 2-core benchmark machine (benchmarks/RESULTS.md, --quick run:
# time to answer at d <= 10, where compilation is most of it); our measurement, not a law.
EXTRA_COMPILE_SECONDS = {"rwm": 0.0, "mala": 0.8, "hmc": 1.1, "nuts": 2.3}


def check_sampler(sampler: Any) -> str:
    if sampler not in SAMPLER_CHOICES:
        raise InputError(explain(f"sampler={sampler!r} is not a known sampler.",
                                 "start(sampler=...)",
                                 f"use one of {', '.join(map(repr, SAMPLER_CHOICES))}."))
    return sampler


def gradient_tuning(sampler: str, shape, cholesky, shape_kind: str,
                    step_size: float | None = None, aim: float | None = None) -> GradientTuning:
    """The tuning of a gradient sampler: the theory step for this d unless given; ``aim``
    the user's target acceptance (:func:`fisherwalk.run.aim.check_aim`)."""
    shape, cholesky = np.asarray(shape), np.asarray(cholesky)
    if step_size is None:
        step_size = optimal_gradient_step(sampler, shape.shape[0]).step_size
    return GradientTuning(sampler, float(step_size), shape, cholesky, shape_kind, aim)


def dual_averaging_target(tuning: GradientTuning) -> float:
    """What dual averaging aims for: the user's target acceptance, else the theory's."""
    return float(tuning.aim) if tuning.aim is not None else float(tuning.choice.acceptance)


def gradient_model(model: Model, tuning: GradientTuning, mode_flat, chains: int) -> Model:
    """The walker's model with the gradient sampler's compiled loop as its engine."""
    flat_logdensity = _flat(model)
    engine = gradient.make_gradient_engine(
        tuning.sampler, flat_logdensity, np.asarray(mode_flat), tuning.precision_cholesky,
        int(chains), target_acceptance=dual_averaging_target(tuning))
    return model._replace(engine=engine)


def _flat(model: Model) -> Callable:
    unravel, fn = model.unravel, model.logdensity_fn

    def flat_logdensity(vector):
        return fn(unravel(vector))

    return flat_logdensity


def gradient_state(model: Model, positions, names) -> gradient.ChainState:
    """Whitened states at ``positions`` (chains, d); non-finite gradients refused by name."""
    return check_gradients(model.engine, positions, names)


def _control(tuning: GradientTuning, *, adapt: bool = False, dtype=np.float64):
    return gradient.control(tuning.step_size, adapt=adapt, dtype=dtype)


def warm_gradient(model: Model, tuning: GradientTuning, rng_key, state, steps: int,
                  names) -> GradientWarmup:
    """Dual averaging of the shared step size from the tuning's step, ``steps`` steps."""
    return warm_up(model.engine, rng_key, state, tuning.step_size, steps=steps,
                   chunk=DEFAULT_CHUNK, names=names)


class ChunkView(NamedTuple):
    """One call of a gradient engine, in the fields walk() collects (draw axis first)."""

    state: Any  # the chains' whitened state after the call
    position: Any  # (draws, chains, d) original coordinates
    logdensity: Any  # (draws, chains)
    accepted: Any  # (draws, chains) mean acceptance probability (gradient kernels)
    acceptance_rate: Any  # (draws, chains)
    faults: Any  # (draws, chains) flagged transitions
    divergent: Any  # (draws, chains) divergent transitions
    gradients: Any  # (draws, chains) gradient evaluations


def gradient_chunks(model: Model, tuning: GradientTuning, rng_key, state, draws: int, *,
                    chunk: int = DEFAULT_CHUNK, thin: int = 1,
                    done: int = 0) -> Iterator[tuple[int, ChunkView]]:
    """The chunk loop of a gradient walker (the counterpart of ``engine.run_chunks``).

    Step ``s`` of the run draws its randomness from ``fold_in(rng_key, s)`` alone, so the
    chunking and a resume cannot change the draws.
    """
    dtype = np.asarray(state.logdensity).dtype
    ctrl = _control(tuning, dtype=dtype)
    for k in range(-(-done // chunk), -(-draws // chunk)):
        out = model.engine.run(rng_key, k * chunk * thin, state, ctrl, chunk, thin)
        state = out.state
        yield min(chunk, draws - k * chunk), ChunkView(
            out.state, out.position, out.logdensity, out.acceptance_rate,
            out.acceptance_rate, out.faults, out.divergent, out.gradients)


# ----------------------------------------------------------------------------- auto


class SamplerChoice(NamedTuple):
    """Why ``sampler="auto"`` picked what it picked."""

    sampler: str  # the choice
    seconds_per_answer: dict[str, float]  # predicted seconds to bulk ESS 400, each sampler
    logdensity_seconds: float  # one batched log-density evaluation (all chains)
    gradient_seconds: float  # one batched value-and-gradient evaluation (all chains)
    note: str  # the reason, in words


def _median_time(fn: Callable, arg, repeats: int = 7) -> float:
    jax.block_until_ready(fn(arg))  # compile
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        jax.block_until_ready(fn(arg))
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def choose_sampler(model: Model, positions, dim: int) -> SamplerChoice:
    """Predict each sampler's time to an answer and pick the fastest.

    Time per chain-step of the random walk is one batched log density over the chains;
    of a gradient sampler, one batched value-and-gradient per gradient evaluation. With
    the Gaussian-limit ESS per evaluation e_s at this d, the steps per chain to bulk ESS
    400 in the slowest of d parameters are 400 / (chains · e_s) (the chains pool their
    draws), so the predicted time is that times the cost of one batched evaluation, plus
    the extra compilation of the sampler's program (:data:`EXTRA_COMPILE_SECONDS`), which
    decides the choice at small d.
    """
    flat = _flat(model)
    positions = jax.device_put(np.asarray(positions))
    chains = int(positions.shape[0])
    value = jax.jit(jax.vmap(flat))
    value_grad = jax.jit(jax.vmap(jax.value_and_grad(flat)))
    t_value = _median_time(value, positions)
    t_grad = _median_time(value_grad, positions)
    seconds = {}
    for sampler in ("rwm", *GRADIENT_SAMPLERS):
        per_eval = predicted_ess_per_evaluation(sampler, dim)
        cost = t_value if sampler == "rwm" else t_grad
        seconds[sampler] = (ANSWER_ESS / (chains * per_eval) * cost
                            + EXTRA_COMPILE_SECONDS[sampler])
    best = min(seconds, key=seconds.get)
    ratio = t_grad / max(t_value, 1e-12)
    listed = ", ".join(f"{s} {v:.3g} s" for s, v in sorted(seconds.items(), key=lambda x: x[1]))
    note = (f"sampler='auto' chose {best!r}: predicted time to bulk ESS 400 at d = {dim} is "
            f"{listed} (a gradient costs {ratio:.1f} log densities here; Gaussian-limit ESS "
            "per evaluation from fisherwalk.theory.gradient, plus each program's extra "
            "compilation).")
    return SamplerChoice(best, seconds, t_value, t_grad, note)


def integration_time_words(tuning: GradientTuning) -> str:
    if tuning.sampler != "hmc":
        return ""
    lo, hi = INTEGRATION_TIME
    return (f"; integration time jittered in [{lo:.3f}, {hi:.3f}] "
            f"(about {math.ceil(lo / tuning.step_size)}-{math.ceil(hi / tuning.step_size)} "
            "leapfrog steps)")
