"""What a sampler family is: a NamedTuple of pure functions and values.

start(), refine(), walk(), resume(), spread_chains(), the tuning file and the checkpoint
never ask which sampler they hold; they call the family's functions, listed here. A
family lives in one module of :mod:`fisherwalk.samplers` and is one line of the
registry (:mod:`fisherwalk.samplers.registry`). The models followed are BlackJAX's
``SamplingAlgorithm(init, step)`` and optax's ``GradientTransformation(init, update)``:
behaviour as data, no class hierarchy.

The objects the functions receive are the run's own NamedTuples (the walker's
:class:`~fisherwalk.tuned.tuning.Tuning`, its ``Model`` and chain state); a family changes
a tuning only with ``tuning._replace(...)``, so this module and the families import
nothing above the compiled loops.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any, NamedTuple

import numpy as np

__all__ = ["Family", "Phase", "Settled", "WarmContext"]


class Phase(NamedTuple):
    """Phase 1 of a warm-up: the family's adaptation from its theory value."""

    state: Any  # the chains' state at the end (the family's own form)
    draws: np.ndarray  # (chains, steps, d) warm-up draws, original coordinates
    acceptance: float  # mean acceptance probability (second half)
    value: float  # the tuned parameter (scale or step size) the phase ended at
    divergent: int  # divergent transitions met (0 for a family without them)
    reasons: tuple[str, ...]  # the family's own checks that failed (e.g. scale vs theory)
    carry: Any = None  # the family's own, for its settle() (e.g. the random walk's log multiplier)


class Settled(NamedTuple):
    """The end of a warm-up (phase 2, and a third phase if the family needed one)."""

    tuning: Any  # the final tuning
    state: Any  # the chains at the end of the warm-up
    acceptance: float  # mean acceptance probability at the end (second half or last phase)
    target: float  # the acceptance the adaptation aimed for
    steps: int  # warm-up steps taken in all (both phases, and a third if any)
    divergent: int  # divergent transitions met after phase 1
    reasons: tuple[str, ...]  # checks that failed after phase 1
    notes: tuple[str, ...]  # plain-language account (replaces the skeleton's last note)


class WarmContext(NamedTuple):
    """What the warm-up skeleton hands a family's phases."""

    model: Any  # the walker's Model (engine included)
    tuning: Any  # the tuning the warm-up started from
    names: tuple[str, ...]  # parameter names, ravelled order
    bar: Any  # progress bar or None
    khat: str  # the PSIS k̂ check in words, for the last note


class Family(NamedTuple):
    """A sampler family: its theory, its compiled advance, its warm-up and its BlackJAX form.

    Functions take and return plain data; ``tuning`` is a
    :class:`~fisherwalk.tuned.tuning.Tuning` whose ``sampler`` is this family's ``name``.
    """

    name: str  # the registry key and the value of start(sampler=...), e.g. "rwm"
    label: str  # in words, e.g. "random-walk Metropolis"
    parameter: str  # the Tuning field the family tunes: "scale" or "step_size"
    evaluation: str  # what one step's unit of work evaluates: "logdensity" or "gradient"
    extra_compile_seconds: float  # its program's compilation beyond the random walk's
    # -- theory (Gaussian limit, by dimension)
    initial: Callable[[Any], Any]  # draft tuning (parameter None) -> tuning at the theory value
    choice: Callable[[Any], Any]  # tuning -> the theory's choice (fields acceptance, ...)
    target_acceptance: Callable[[Any], float]  # tuning -> acceptance predicted at its value
    predicted_jump: Callable[[Any], float]  # tuning -> squared jump per step, whitened units
    ess_per_step: Callable[[Any], float]  # tuning -> predicted bulk ESS per step (plan)
    ess_per_evaluation: Callable[[int], float]  # dim -> Gaussian-limit ESS per evaluation
    describe: Callable[[Any], str]  # tuning -> start()'s note on the sampler
    acceptance_band: Callable[[Any], tuple]  # tuning -> acceptances keeping 80% of the best
    #                                           jump (fisherwalk.theory.tolerance)
    # -- compiled advance
    engine: Callable[..., Any]  # (flat logdensity, tuning, mode_flat, chains, devices) -> engine
    init: Callable[..., Any]  # (engine, positions, logdensity or None, evaluate, names) -> state
    positions: Callable[[Any, Any], np.ndarray]  # (engine, state) -> (chains, d) original
    chunks: Callable[..., Iterator]  # (engine, tuning, key, state, draws, chunk, thin, done)
    stores_state: bool  # checkpoints keep the whole chain state, not only the kept draw
    # -- warm-up (the skeleton is fisherwalk.prepare.warmup.refine)
    phase: Callable[..., Phase]  # (context, key, state, steps) -> phase 1
    reshape: Callable[..., tuple]  # (context, phase 1, flat logdensity, mode_flat, chains,
    #                                 learned, shape, precision_chol) -> (tuning, engine,
    #                                 state); ``learned`` the window adaptation's result
    #                                 (run.draws_warmup.DrawsWarmup: where the chains are)
    settle: Callable[..., Settled]  # (context, key, tuning1 or None if not reshaped, state,
    #                                  phase 1, steps, reasons, reshaped) -> Settled
    covariance_of_squares: bool  # the checks' n_eff from squared coordinates (antithetic draws)
    # -- BlackJAX's form, for a user's own loop
    blackjax: Callable[..., Any]  # (logdensity_fn, tuning, engine) -> SamplingAlgorithm
    blackjax_states: Callable[..., Any]  # (positions pytree, logdensity, engine, state,
    #                                       unravel_many) -> batched BlackJAX states
    blackjax_parameters: Callable[[Any], dict]  # tuning -> keyword arguments of ``blackjax``
    blackjax_api: Any  # BlackJAX's own constructor of this sampler (e.g. blackjax.nuts)
    blackjax_takes_metric: bool = True  # whether that constructor takes the metric
    kernel: Callable | None = None  # a gradient family's one-chain step builder (run.gradient)
    warmup_steps: int = 400  # refine()'s default length for this family (steps per chain)
    # -- the evidence (issue 22)
    takes_target_acceptance: bool = False  # start(target_acceptance=) sets its dual
    #                                        averaging's aim (``tuning.aim``): HMC, NUTS
    relies_on_limit: bool = False  # its predicted speed rests wholly on the Gaussian limit
    #                               (its scale or step and acceptance come from it), so
    #                               "auto" discounts or drops it when PSIS k̂ is high
    window_start: Callable[..., tuple[float, float]] | None = None  # (tuning, phase 1) ->
    #   (step size, target acceptance) from which refine()'s metric repair starts BlackJAX's
    #   window adaptation (run.metric_repair); None: (1.0, 0.8), BlackJAX's defaults
    learns_metric: bool = False  # its engine takes the metric as data, so a metric is
    #                              learned in windows on it (fisherwalk.samplers.windows)
    #                              with no new compilation; False: BlackJAX's window
    #                              adaptation learns it (fisherwalk.prepare.draws_warmup)
