"""Warm-up of a gradient sampler: one shared step size by dual averaging, from the theory value.

The chains start from N(mode, H⁻¹) and run BlackJAX's kernel on the whitened posterior
(:mod:`fisherwalk.engine.gradient`) with the step size that the Gaussian limit gives for
this dimension. Dual averaging (Nesterov 2009, "Primal-dual subgradient methods for
convex problems", Math. Program. 120; Hoffman & Gelman 2014, "The No-U-Turn sampler",
JMLR 15, section 3.2.1; BlackJAX's ``dual_averaging_adaptation``) moves the log step size
toward the target acceptance, driven by the acceptance probability pooled over chains,
so that every chain keeps the same step size (vmapped NUTS trees run in lockstep: equal
step sizes waste the least). The step size for sampling is dual averaging's averaged
iterate.

Two departures from Hoffman & Gelman's defaults, both because the start is already
close (the Gaussian picture is exact for a Gaussian posterior): the iterates shrink
toward the theory step size rather than ten times it, and gamma is 0.2 rather than 0.05,
so the iterates explore less. Measured on N(0, I_d), 200 steps, 4 chains, 8 seeds: the
realised acceptance at the averaged step size overshoots the target by 0.021 (MALA,
d = 5), 0.025 (NUTS, d = 5) and 0.009 (NUTS, d = 25) with gamma 0.05, and by 0.006, 0.010
and 0.003 with gamma 0.2; started 4x too large or too small (d = 10), both end within
0.021 of the target (our choice and our measurement; no published source).

The warm-up runs the same compiled program as sampling (whole chunks of kept draws,
``thin = 1``), and afterwards checks the faults it met: a transition flagged non-finite
is replayed eagerly (:func:`fisherwalk.engine.gradient_checks.replay_step`); a point where
the log density or its gradient is not finite raises :class:`fisherwalk.errors.ModelError`
naming the parameters.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import jax
import numpy as np

from ..errors import InputError, explain
from ..results.diagnostics import ess_mean
from .gradient import ChainState, GradientEngine, StepControl, control
from .gradient_checks import first_fault, nonfinite_error, replay_step
from .loop import chunk_loop

WARMUP_STEPS = 200  # steps per chain: dual averaging settles within ~100 from the theory value
WARMUP_CHUNK = 100  # kept draws per compiled call: sampling's chunk, so one program serves both
REPLAYS = 3  # flagged transitions replayed to find the faulty parameter (slow: eager)


class GradientWarmup(NamedTuple):
    """What a gradient sampler's warm-up did (chain axis first, step axis second)."""

    step_size: float  # for sampling: dual averaging's averaged iterate
    start_step_size: float  # the theory value the warm-up started from
    target_acceptance: float  # what dual averaging aimed for
    acceptance: float  # mean pooled acceptance probability over the second half
    acceptance_mcse: float  # its Monte Carlo standard error (ESS of the per-step values)
    state: ChainState  # the chains at the end (whitened)
    control: StepControl  # for sampling: adaptation off, ``step_size`` set
    position: np.ndarray  # (chains, steps, d) warm-up draws, original coordinates
    logdensity: np.ndarray  # (chains, steps)
    acceptance_rate: np.ndarray  # (chains, steps)
    divergent: np.ndarray  # (chains, steps) int
    gradients: np.ndarray  # (chains, steps) int: gradient evaluations
    faults: np.ndarray  # (chains, steps) int: flagged transitions (none confirmed: see notes)
    step_size_path: np.ndarray  # (steps,) the step size each step used


def pooled_mcse(rates: np.ndarray) -> float:
    """Monte Carlo standard error of the mean of per-step acceptance probabilities.

    ``rates`` is (chains, steps); the error is sd / sqrt(ESS), with ESS the multi-chain
    effective sample size of the mean (Vehtari, Gelman, Simpson, Carpenter & Bürkner
    2021, Bayesian Analysis 16(2)).
    """
    rates = np.asarray(rates, dtype=float)
    ess = max(float(ess_mean(rates)), 1.0)
    return float(rates.std() / math.sqrt(ess))


def warm_up(engine: GradientEngine, rng_key: jax.Array, state: ChainState, step_size: float,
            *, steps: int = WARMUP_STEPS, chunk: int = WARMUP_CHUNK,
            names=None) -> GradientWarmup:
    """Adapt one shared step size by dual averaging; check the faults met on the way.

    Parameters
    ----------
    engine
        From :func:`fisherwalk.engine.gradient.make_gradient_engine`.
    rng_key
        A typed JAX key, used for this warm-up only (global steps 0 .. steps - 1).
    state
        The chains' whitened states (:func:`fisherwalk.engine.gradient_checks.check_gradients`).
    step_size
        Where dual averaging starts: the Gaussian-limit step size for this dimension.
    steps
        Warm-up steps per chain, rounded up to whole chunks.
    chunk
        Steps per compiled call; keep sampling's chunk so both share one program.
    names
        Parameter names in ravelled order, for error messages.

    Raises
    ------
    fisherwalk.errors.ModelError
        When a warm-up transition met a point where the log density is NaN or +inf or
        its gradient is not finite (replayed to name the parameters).
    """
    if isinstance(steps, bool) or not isinstance(steps, int | np.integer) or steps < 1:
        raise InputError(explain(f"steps={steps!r} is not a positive whole number.",
                                 "warm_up(steps=...)", "pass steps as an int, e.g. 200."))
    calls = math.ceil(steps / chunk)
    dtype = engine.mode.dtype
    ctrl = control(step_size, adapt=True, dtype=dtype)
    start_position = engine.mode + np.asarray(state.position) @ engine.whitening.T
    pieces = []
    def call(first, carry, n, _thin):  # one compiled call, continuing dual averaging
        out = engine.run(rng_key, first, carry[0], carry[1], n)
        return out, (out.state, out.control)

    for _, out in chunk_loop(call, (state, ctrl), calls * chunk, chunk=chunk):
        state, ctrl = out.state, out.control
        pieces.append(jax.device_get((out.position, out.logdensity, out.acceptance_rate,
                                      out.divergent, out.gradients, out.faults, out.step_size)))
    position, logdensity, rates, divergent, gradients, faults, path = (
        np.concatenate(parts) for parts in zip(*pieces, strict=True))
    position, logdensity, rates, divergent, gradients, faults = (
        np.swapaxes(a, 0, 1) for a in (position, logdensity, rates, divergent, gradients,
                                       faults))
    _check_faults(engine, rng_key, faults, start_position, position, path, ctrl, names)
    final = float(np.exp(ctrl.dual.log_step_size_avg))
    sampling = ctrl._replace(step_size=np.asarray(final, dtype=dtype),
                             adapt=np.asarray(False))
    half = rates[:, rates.shape[1] // 2:]
    return GradientWarmup(final, float(step_size), engine.target_acceptance,
                          float(half.mean()), pooled_mcse(half), state, sampling, position,
                          logdensity, rates, divergent, gradients, faults, path)


def _check_faults(engine, rng_key, faults, start_position, position, path, ctrl, names):
    """Replay the first flagged transitions; raise on a confirmed non-finite point."""
    d = engine.mode.shape[0]
    names = tuple(names) if names is not None else tuple(f"theta[{i}]" for i in range(d))
    flagged = np.argwhere(faults.T > 0)  # (step, chain) pairs, in step order
    for step, chain in flagged[:REPLAYS]:
        before = start_position[chain] if step == 0 else position[chain, step - 1]
        points = replay_step(engine, rng_key, int(step), int(chain), before, ctrl,
                             float(path[step]))
        point = first_fault(points)
        if point is not None:
            count = int((faults > 0).sum())
            raise nonfinite_error(engine, names, point,
                                  f"warm-up step {int(step)} of chain {int(chain)} ({count} "
                                  f"flagged transition{'s' if count > 1 else ''} in the "
                                  "warm-up)")
