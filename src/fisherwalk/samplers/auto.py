"""``sampler="auto"``: the registered family predicted to reach an answer first.

Times one batched log-density evaluation and one batched value-and-gradient at the chain
starts, and predicts each family's time to an answer (bulk ESS 400 per parameter) from
its Gaussian-limit ESS per evaluation at this d (each family's ``ess_per_evaluation``,
:func:`fisherwalk.theory.gradient.predicted_ess_per_evaluation`); the fastest wins and
the report says why.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import NamedTuple

import jax
import numpy as np

from ..base.programs import batch_size, batched
from ..engine.gradient import value_and_gradient
from . import registry

__all__ = ["SamplerChoice", "choose_sampler", "ANSWER_ESS"]

ANSWER_ESS = 400.0  # bulk ESS per parameter that counts as an answer (Vehtari et al. 2021)


class SamplerChoice(NamedTuple):
    """Why ``sampler="auto"`` picked what it picked."""

    sampler: str  # the choice
    seconds_per_answer: dict[str, float]  # predicted seconds to bulk ESS 400, each family
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


def choose_sampler(flat_logdensity: Callable, positions, dim: int,
                   evaluate: Callable | None = None) -> SamplerChoice:
    """Predict each registered family's time to an answer and pick the fastest.

    Time per chain-step is one batched evaluation over the chains (a log density, or a
    value and gradient, as the family's ``evaluation`` says). With the Gaussian-limit ESS
    per evaluation e_s at this d, the steps per chain to bulk ESS 400 in the slowest of d
    parameters are 400 / (chains · e_s) (the chains pool their draws), so the predicted
    time is that times the cost of one batched evaluation, plus the extra compilation of
    the family's program (``extra_compile_seconds``), which decides the choice at small d.
    ``evaluate``, the model's own batched log density (already compiled by start()), is
    timed when given rather than compiling another (benchmarks/phases.py counts them).
    """
    positions = jax.device_put(np.asarray(positions))
    chains = int(positions.shape[0])
    evaluate = batched(flat_logdensity) if evaluate is None else evaluate
    # the engines' own batched value and gradient, padded to batch_size(chains) points
    # like the model's evaluate: the times are scaled back to the chains
    scale = chains / batch_size(chains)
    cost = {"logdensity": scale * _median_time(evaluate, positions),
            "gradient": scale * _median_time(value_and_gradient(flat_logdensity), positions)}
    seconds = {}
    for name in registry.names():
        entry = registry.family(name)
        per_eval = entry.ess_per_evaluation(dim)
        seconds[name] = (ANSWER_ESS / (chains * per_eval) * cost[entry.evaluation]
                         + entry.extra_compile_seconds)
    best = min(seconds, key=seconds.get)
    ratio = cost["gradient"] / max(cost["logdensity"], 1e-12)
    listed = ", ".join(f"{s} {v:.3g} s" for s, v in sorted(seconds.items(), key=lambda x: x[1]))
    note = (f"sampler='auto' chose {best!r}: predicted time to bulk ESS 400 at d = {dim} is "
            f"{listed} (a gradient costs {ratio:.1f} log densities here; Gaussian-limit ESS "
            "per evaluation from fisherwalk.theory.gradient, plus each program's extra "
            "compilation).")
    return SamplerChoice(best, seconds, cost["logdensity"], cost["gradient"], note)
