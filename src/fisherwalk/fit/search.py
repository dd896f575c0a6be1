"""The mode search: L-BFGS, then the Hessian and a Newton polish, in two compiled programs.

L-BFGS (Liu & Nocedal 1989, "On the limited memory BFGS method for large scale
optimization", Math. Programming 45) with a backtracking line search
(:mod:`fisherwalk.fit.lbfgs`), all inside one jitted ``lax.while_loop`` (the first
program); then, in the second, at most two safeguarded Newton steps (L-BFGS can stall
short of a tight gradient tolerance on an ill-conditioned posterior; the Hessian is
computed anyway) and probes along rays that detect a runaway mode. :class:`Search` is
what a search returns; :mod:`fisherwalk.fit.checks` reads it.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
from jax.scipy.linalg import cho_solve

from .lbfgs import minimise

NEWTON_STEPS = 2  # safeguarded Newton steps after L-BFGS


class Search(NamedTuple):
    """One mode search (batched along a leading axis for restarts)."""

    x: jax.Array  # (d,) end point
    logdensity: jax.Array  # () log density there
    gradient: jax.Array  # (d,) gradient of the log density there
    fisher: jax.Array  # (d, d) -Hessian there (zeros when a user Fisher is used)
    lbfgs_iterations: jax.Array  # ()
    newton_steps: jax.Array  # () accepted Newton steps
    evaluations: jax.Array  # () value-and-gradient evaluations
    stalled: jax.Array  # () the line search stopped moving
    start_logdensity: jax.Array  # () log density at the start
    start_gradient: jax.Array  # (d,) gradient at the start
    probe_directions: jax.Array  # (k, d) unit directions probed for a runaway mode
    probe_values: jax.Array  # (k, 3) log density at x + (1, 10, 100) * radius * direction
    probe_radius: jax.Array  # () max(distance travelled, |x|, 1)



def make_search(logp: Callable, use_hessian: bool) -> tuple[Callable, Callable]:
    """``(descend, settle)``, the search's two programs, pure and vmappable over ``x0``.

    ``descend(x0, max_iterations, tol) -> Search``: L-BFGS in one while loop (no Hessian:
    ``fisher`` zeros, no Newton step; probes along the way travelled only).
    ``settle(x0, descended) -> Search``: (with ``use_hessian``) the Hessian and the
    Newton polish, then the runaway probes.
    Two programs so that a search that runs off (a posterior with no mode,
    :mod:`fisherwalk.fit.runaway`) is diagnosed from the first alone, before the
    Hessian's program (a third to two fifths of the compile time) is compiled;
    :func:`whole` chains them into one function for a batch of restarts.
    """

    def information(x):
        h = jax.hessian(logp)(x)
        return -0.5 * (h + h.T)

    def descend(x0, max_iterations, tol):
        zero = jnp.zeros((), jnp.int32)
        start_value, start_grad = jax.value_and_grad(logp)(x0)
        end = minimise(lambda x: -logp(x), x0, -start_value, -start_grad, max_iterations,
                       tol)
        d = x0.size
        directions, values, radius = probe(logp, x0, end.x, None)  # the way travelled
        return Search(end.x, -end.value, -end.grad, jnp.zeros((d, d), x0.dtype),
                      end.iterations, zero, end.evaluations, end.stalled, start_value,
                      start_grad, directions, values, radius)

    def settle(x0, found):
        x, f, g, fisher, steps, evals = (found.x, found.logdensity, found.gradient,
                                         found.fisher, found.newton_steps, found.evaluations)

        def polish(carry):
            x, f, g, _, k, _, evals = carry
            h = information(x)
            step = cho_solve((jnp.linalg.cholesky(h), True), g)
            trying = (k < NEWTON_STEPS) & jnp.all(jnp.isfinite(step))
            x_new = jnp.where(trying, x + step, x)
            f_new, g_new = jax.lax.cond(trying, jax.value_and_grad(logp),
                                        lambda x: (f, g), x_new)
            slack = 8 * jnp.finfo(x.dtype).eps * jnp.maximum(1.0, jnp.abs(f))
            better = (f_new > f + slack) | (
                (f_new >= f - slack) & (jnp.max(jnp.abs(g_new)) < jnp.max(jnp.abs(g))))
            accept = trying & better & jnp.isfinite(f_new) & jnp.all(jnp.isfinite(g_new))
            x, f, g = (jnp.where(accept, new, old)
                       for new, old in ((x_new, x), (f_new, f), (g_new, g)))
            return x, f, g, h, k + accept, accept, evals + trying

        if use_hessian:
            x, f, g, fisher, steps, _, evals = jax.lax.while_loop(
                lambda carry: carry[5], polish, (x, f, g, fisher, steps, jnp.asarray(True),
                                                 evals))
        directions, values, radius = probe(logp, x0, x, fisher if use_hessian else None)
        return found._replace(x=x, logdensity=f, gradient=g, fisher=fisher,
                              newton_steps=steps, evaluations=evals,
                              probe_directions=directions, probe_values=values,
                              probe_radius=radius)

    return descend, settle


def whole(descend: Callable, settle: Callable) -> Callable:
    """``search(x0, max_iterations, tol) -> Search``: the two programs as one function."""

    def search(x0, max_iterations, tol):
        return settle(x0, descend(x0, max_iterations, tol))

    return search


def probe(logp: Callable, x0: jax.Array, x: jax.Array, fisher: jax.Array | None):
    """Log density along rays from the end point x, to detect a runaway mode: along the
    direction travelled and (given a Hessian) both ways along its weakest eigenvector, at
    distances (1, 10, 100) x radius, radius = max(|x - x0|, |x|, 1). Traced."""
    travel = x - x0
    length = jnp.linalg.norm(travel)
    directions = [jnp.where(length > 0, travel / jnp.where(length > 0, length, 1.0), 0.0)]
    if fisher is not None:
        weakest = jnp.linalg.eigh(fisher)[1][:, 0]
        directions += [weakest, -weakest]
    directions = jnp.stack(directions)
    radius = jnp.maximum(jnp.maximum(length, jnp.linalg.norm(x)), 1.0)
    distances = jnp.asarray([1.0, 10.0, 100.0], x.dtype) * radius
    values = jax.vmap(jax.vmap(logp))(x + distances[None, :, None] * directions[:, None, :])
    return directions, jnp.where(jnp.isnan(values), -jnp.inf, values), radius


def compile_ahead(fn: Callable, *args) -> tuple[Callable, float]:
    """Compile a jitted function for these arguments: (compiled, compile seconds)."""
    t0 = time.perf_counter()
    compiled = fn.lower(*args).compile()
    return compiled, time.perf_counter() - t0


def timed(fn: Callable, *args) -> tuple[Any, float, float]:
    """Compile ahead of time, then run: (result, compile seconds, run seconds)."""
    t0 = time.perf_counter()
    compiled = fn.lower(*args).compile()
    t1 = time.perf_counter()
    out = jax.block_until_ready(compiled(*args))
    return out, t1 - t0, time.perf_counter() - t1
