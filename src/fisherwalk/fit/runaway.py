"""A mode search that runs off: which parameter, and whether the posterior has no mode.

A centred hierarchical model, y_j ~ N(θ_j, s_j²), θ_j ~ N(μ, τ²), has a density that grows
without bound as τ → 0 with every θ_j = μ (Gelman et al. 2013, Bayesian Data Analysis,
3rd ed., section 5.4): the mode search then drives log τ to −∞ while the group effects
settle on μ. The posterior is proper and can be sampled; only the Laplace step is
undefined. The search's own report then names the parameter with the largest gradient,
which is a group effect (its curvature 1/τ² explodes), not the scale that runs away.

This module re-runs the already compiled search with doubling iteration budgets (no new
compilation) to see the path it takes, and names the coordinate that drifts most over the
second half of the path while the log density keeps rising along it: the runaway scale.
The rules (a rise of at least :data:`RISE` nats, one coordinate drifting at least
:data:`DRIFT` units with the log density rising at least :data:`SLOPE` nats per unit of
it, the end gradient still pulling it out) are our choice (common practice, no published
source); a search that levels off (separation, an improper direction) is left to
:func:`fisherwalk.fit.checks.runaway`, which keeps raising FitError for it.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import NamedTuple

import jax.numpy as jnp
import numpy as np

from ..base.checks import definiteness_problem
from .checks import converged, rises_along_a_probe, runaway
from .search import Search

__all__ = ["Runaway", "find_no_mode", "search_path", "start_points", "RISE", "DRIFT",
           "SLOPE", "NEAR_START"]

RISE = 1.0  # nats the log density must still rise over the second half of the path
DRIFT = 1.0  # units the runaway coordinate must move over the second half of the path
SLOPE = 0.5  # nats per unit of that move: the density rises along it, not levels off
NEAR_START = 2.0  # start points: the runaway coordinate within this of its start value
#                   (a log scale within a factor e² ≈ 7.4 of where it started)


class Runaway(NamedTuple):
    """A mode search that ran off along one parameter while the log density rose."""

    index: int  # the runaway coordinate (ravelled order)
    name: str  # its name
    sign: float  # +1: it runs to +∞; -1: to -∞
    start: np.ndarray  # (d,) the search's start
    path: np.ndarray  # (k, d) the search's end points after 1, 2, 4, ... iterations
    path_logdensity: np.ndarray  # (k,)
    iterations: np.ndarray  # (k,) the iteration budgets
    slope: float  # nats of log density gained per unit of the runaway coordinate
    message: str  # the diagnosis, in words


def search_path(compiled: Callable, x0, tol, iterations: int):
    """End points of the compiled search after 1, 2, 4, ... and ``iterations`` iterations
    (the search is deterministic, so these are points of its one path)."""
    budgets = sorted({*(2**k for k in range(int(np.log2(max(iterations, 1))) + 1)),
                      max(int(iterations), 1)})
    points, values = [], []
    for b in budgets:
        s = compiled(x0, jnp.asarray(b, jnp.int32), tol)
        points.append(np.asarray(s.x, np.float64))
        values.append(float(s.logdensity))
    return np.stack(points), np.asarray(values), np.asarray(budgets)


def _settled(s: Search, info: np.ndarray | None, tol: float) -> bool:
    """A converged end with a positive-definite information, or a direction the existing
    runaway check explains (improper, separation): not ours to diagnose."""
    if not (np.isfinite(s.x).all() and np.isfinite(s.logdensity)):
        return False
    if info is None:  # no Hessian (yet, or a user's Fisher information): the gradient
        #               test, and a rise along the probes is left to the runaway check
        return (rises_along_a_probe(s) or bool(
            np.max(np.abs(s.gradient)) <= tol * max(1.0, abs(float(s.logdensity)))))
    if not np.isfinite(info).all():
        return False
    if converged(s, info, tol) and not definiteness_problem(info, ("",) * len(s.x)):
        return True
    return runaway(s, info) is not None


def find_no_mode(s: Search, info: np.ndarray | None, compiled: Callable, x0, tol,
                 names: tuple[str, ...]) -> Runaway | None:
    """The runaway parameter of a search that did not converge, or None.

    ``s`` is the search's result, ``info`` the Fisher information at its end (None when it
    could not be computed), ``compiled(x0, max_iterations, tol)`` the compiled search.
    Returns None when the search converged, when the existing checks explain the failure
    (:func:`fisherwalk.fit.checks.runaway`), or when no single coordinate runs off while
    the log density keeps rising (a slow search: the usual FitError then applies).
    """
    if _settled(s, info, float(tol)):
        return None
    path, values, budgets = search_path(compiled, x0, tol, int(s.lbfgs_iterations))
    x0 = np.asarray(x0, np.float64)
    keep = np.isfinite(values) & np.isfinite(path).all(axis=1)
    path, values, budgets = path[keep], values[keep], budgets[keep]
    if len(values) < 3:
        return None
    last, mid = len(values) - 1, (len(values) - 1) // 2
    rise = values[last] - values[mid]
    delta = path[last] - path[mid]
    i = int(np.argmax(np.abs(delta)))
    drift = float(delta[i])
    if rise < RISE or abs(drift) < DRIFT or rise / abs(drift) < SLOPE:
        return None
    if abs(path[last, i] - x0[i]) <= abs(path[mid, i] - x0[i]):
        return None  # not moving away from the start
    gradient = np.asarray(s.gradient, np.float64)
    if np.isfinite(gradient[i]) and np.isfinite(s.logdensity) and gradient[i] * drift < 0:
        return None  # the end gradient pulls it back: a slow search, not a run-off
    sign = 1.0 if drift > 0 else -1.0
    name = names[i]
    toward = "+∞" if sign > 0 else "−∞"
    end_finite = bool(np.isfinite(s.x).all() and np.isfinite(s.logdensity))
    flat_end = end_finite and bool(
        np.max(np.abs(gradient)) <= float(tol) * max(1.0, abs(float(s.logdensity))))
    head = ("The posterior has no usable mode: the search stopped where its curvature "
            "spans too many orders of magnitude for a Laplace approximation (the neck of "
            "a funnel, whose mass lies elsewhere)" if flat_end else
            "The posterior has no mode")
    message = (
        f"{head}: the mode search drove {name} toward {toward} (from "
        f"{x0[i]:.3g} at the start to {path[last, i]:.3g} after {int(budgets[last])} "
        f"iterations) while the log density kept rising ({values[mid]:.4g} -> "
        f"{values[last]:.4g}, about {rise / abs(drift):.2f} per unit of {name}), as in a "
        "centred hierarchical model whose group scale goes to zero (a funnel; Gelman et "
        "al. 2013, Bayesian Data Analysis, 3rd ed., section 5.4). The other parameters "
        "moved at most "
        f"{float(np.max(np.abs(np.delete(delta, i)))) if len(delta) > 1 else 0.0:.3g} over "
        "the same stretch.")
    return Runaway(i, name, sign, x0, path, values, budgets, float(rise / abs(drift)),
                   message)


def advice(found: Runaway) -> str:
    """What to do, non-centring first (Papaspiliopoulos, Roberts & Sköld 2007, "A general
    framework for the parametrization of hierarchical models", Statistical Science 22(1)),
    and the neck's known bias (Betancourt & Girolami 2015, "Hamiltonian Monte Carlo for
    hierarchical models", in Current Trends in Bayesian Methodology with Applications)."""
    return (f"write the model in its non-centred form first (for group effects under the "
            f"scale {found.name}: θ_j = μ + τ z_j with z_j ~ N(0, 1), which removes the "
            "funnel when the data per group are weak); or keep the centred form (it mixes "
            "better when the data per group are strong) and read the divergence count, "
            f"knowing that even with few or no divergent transitions the draws can "
            f"under-visit the funnel's neck, so that the low tail of {found.name} (and its "
            "sd) comes out too light; a proper prior that keeps the scale away from zero "
            "also helps.")


def start_points(found: Runaway, noise: np.ndarray, jitter: float = 0.25) -> np.ndarray:
    """Chain starts from the best points the search visited before the run-off.

    Candidates are the start and the path points whose runaway coordinate is within
    :data:`NEAR_START` of its start value; chain c starts at the c-th best of them
    (round robin, highest log density first) plus ``jitter`` times ``noise`` (chains,
    d) standard normals, so that the chains are over-dispersed for R-hat (common
    practice, no published source).
    """
    chains = noise.shape[0]
    i = found.index
    near = np.abs(found.path[:, i] - found.start[i]) <= NEAR_START
    candidates = np.concatenate([found.start[None], found.path[near]])
    values = np.concatenate([[-np.inf], found.path_logdensity[near]])
    order = np.argsort(-values, kind="stable")
    picked = candidates[[order[c % len(order)] for c in range(chains)]]
    return picked + jitter * noise
