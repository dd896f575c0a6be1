"""start() for a posterior with no mode: NUTS warmed up from draws, from the search's path.

When the mode search runs off (:class:`fisherwalk.errors.NoModeError`, diagnosed by
:mod:`fisherwalk.fit.runaway`), there is no Laplace approximation to tune from. The
chains start from the best points the search visited before the run-off, and NUTS
warms up in windows on its own engine (:mod:`fisherwalk.samplers.windows`, Stan's schedule),
which learn the metric and the step size from the draws; the walk then runs the same
compiled program. The walker that comes back is an
ordinary NUTS walker: its tuning holds the learned metric and step size, and its
report's ``laplace`` holds, in place of a mode and a Fisher information, the centre of
the warm-up draws and the precision they gave (``LaplaceFit.no_mode`` says so).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from typing import Any

import jax
import numpy as np

from ..base import pytrees
from ..base.checks import whole_number
from ..base.keys import normals, stream
from ..engine.gradient import value_and_gradient
from ..errors import FisherwalkWarning, explain, warn_user
from ..fit.laplace import LaplaceFit
from ..fit.runaway import Runaway, advice, start_points
from ..samplers import registry
from ..samplers.windows import LearnedMetric as DrawsWarmup
from ..samplers.windows import learn_on_engine, metric_factors, schedule
from ..theory.gradient import NUTS_TARGET_ACCEPTANCE
from ..tuned.tuning import Tuning
from ..tuned.walker import (
    LaplaceCheck,
    Model,
    StartReport,
    Walker,
    assemble,
    flat_logdensity,
    make_model,
)
from .draws_warmup import WINDOW_STEPS
from .starts import checked_starts

__all__ = ["modeless_start", "draws_fit"]


def draws_fit(warm: DrawsWarmup, position: Any, model: Model,
              found: Runaway, seconds: float) -> LaplaceFit:
    """The stand-in for a Laplace fit: the centre of the warm-up's second half and the
    precision of the metric it learned."""
    flat = pytrees.flatten_position(position, where="start(position=...)")
    steps = warm.draws.shape[1]
    draws = warm.draws[:, steps // 2:].reshape(-1, warm.draws.shape[-1])
    centre = np.asarray(draws.mean(axis=0), np.asarray(flat.vector).dtype)
    # the batched value and gradient the NUTS engine shares: no program of its own
    value, grad = (np.asarray(a)[0] for a in
                   value_and_gradient(flat_logdensity(model))(centre[None]))
    shape, precision_chol = metric_factors(warm.inverse_mass_matrix)
    fisher = precision_chol @ precision_chol.T
    mode = flat.unravel(jax.numpy.asarray(centre))
    text = found.message + " What to do: " + advice(found)
    return LaplaceFit(
        mode=mode, mode_flat=jax.numpy.asarray(centre), logdensity=float(value),
        fisher=jax.numpy.asarray(fisher), cholesky=jax.numpy.asarray(precision_chol),
        gradient_norm=max(float(np.max(np.abs(np.asarray(grad)))), 1e-300),
        iterations=int(found.iterations[-1]), evaluations=int(warm.gradients),
        names=flat.names, fisher_source="draws", modes=((mode, float(value)),),
        warnings=(text,), seconds={"total": seconds}, modes_flat=(centre,),
        modes_fisher=(fisher,), order=pytrees.written_order(position), no_mode=text)


def modeless_start(logdensity_fn: Callable, position: Any, key: jax.Array, chains: int,
                   found: Runaway, *, sampler: str = registry.FALLBACK,
                   target_acceptance: float | None = None,
                   steps: int | None = None, chain_starts: Any = None) -> Walker:
    """A NUTS walker warmed up from draws, for a posterior whose mode search ran off.

    Parameters
    ----------
    logdensity_fn, position, key, chains
        As given to :func:`fisherwalk.start`.
    found
        The diagnosis (:class:`fisherwalk.fit.runaway.Runaway`), with the search's path.
    sampler
        What the user asked for; any choice but the registry's FALLBACK (NUTS) is
        replaced (and said so): only a gradient sampler with an adapted metric and path
        length can enter a funnel's neck.
    target_acceptance
        Dual averaging's aim (default BlackJAX's NUTS 0.8).
    steps
        Warm-up steps per chain (default 1000, BlackJAX's and Stan's).
    chain_starts
        start()'s ``chain_starts``: when given, the window adaptation starts there instead
        of at the best points the search visited (checked as start() checks them).
    """
    began = time.perf_counter()
    target = NUTS_TARGET_ACCEPTANCE if target_acceptance is None else float(target_acceptance)
    model = make_model(logdensity_fn, position, chains)
    dim = found.start.shape[0]
    noise = normals(stream(key, 11), (chains, dim))
    starts = start_points(found, noise)
    logp = np.asarray(model.evaluate(starts.astype(np.asarray(found.start).dtype)))
    starts[~np.isfinite(logp)] = found.start
    where_from = "the best points the search visited before the run-off"
    if chain_starts is not None:
        flat = pytrees.flatten_position(position, where="start(position=...)")
        starts, _ = checked_starts(chain_starts, position, tuple(flat.names),
                                   np.asarray(found.start).dtype, model.evaluate, chains)
        where_from = "the chain_starts given"
    entry = registry.family(registry.FALLBACK)
    names = tuple(pytrees.flatten_position(position, where="start(position=...)").names)
    dtype = np.asarray(found.start).dtype
    eye = np.eye(dim, dtype=dtype)
    draft = Tuning(eye, None, eye, "identity", sampler=entry.name,
                   aim=target_acceptance if entry.takes_target_acceptance else None)
    burn, windows, final = schedule(WINDOW_STEPS if steps is None else
                                    whole_number(steps, "steps", "start(): the warm-up",
                                                 minimum=300))
    warm = learn_on_engine(entry, flat_logdensity(model), entry.initial(draft),
                           np.asarray(found.start), chains, None, starts.astype(dtype),
                           jax.random.fold_in(key, 12), names, burn=burn,
                           windows=windows, final=final, started_from="identity",
                           diagonal=True)
    fit = draws_fit(warm, position, model, found, time.perf_counter() - began)
    shape, precision_chol = metric_factors(warm.inverse_mass_matrix)
    tuning = Tuning(shape.astype(dtype), None, precision_chol.astype(dtype), "warm-up",
                    sampler=entry.name, step_size=float(warm.step_size),
                    aim=target_acceptance if entry.takes_target_acceptance else None)
    replaced = ("" if sampler == entry.name else
                f" sampler={sampler!r} was replaced by NUTS: without a mode there is no "
                "Gaussian picture to tune it from.")
    done = (f"Continuing without a mode:{replaced} NUTS warmed up by {warm.how} "
            f"({warm.steps} steps per chain from {where_from}; a "
            f"{'diagonal' if warm.diagonal else 'dense'} "
            f"metric learned from the draws, step size {warm.step_size:.3g}, acceptance "
            f"{warm.acceptance:.2f} in the last quarter toward {target:.2f}"
            + (f"; {warm.divergent} divergent transitions in the warm-up" if warm.divergent
               else "") + ").")
    warn_user(explain(found.message, f"start(): the mode search, parameter {found.name}",
                      advice(found)) + "\n" + done, FisherwalkWarning)
    check = LaplaceCheck(math.nan, math.nan, 0, 0)
    report = StartReport(fit, check, (fit.no_mode, done))
    return assemble(logdensity_fn, report, tuning, np.asarray(warm.position).astype(dtype),
                    model=model)
