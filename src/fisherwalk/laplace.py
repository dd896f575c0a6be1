"""The Laplace approximation: mode, observed Fisher information, Cholesky factor, checks.

The posterior is summarised by N(mode, H⁻¹) with H = -∇² log π at the mode, the
observed Fisher information of the posterior (Tierney & Kadane 1986, "Accurate
approximations for posterior moments and marginal densities", JASA 81(393)); the
Bernstein–von Mises theorem says this picture is right for large n. The mode is found
by L-BFGS (Liu & Nocedal 1989, Math. Programming 45) with the zoom line search of
Nocedal & Wright (2006, Numerical Optimization, 2nd ed., Alg. 3.5-3.6), all inside one
jitted ``lax.while_loop``, then polished by at most two safeguarded Newton steps.
Every failure is checked eagerly afterwards and reported by parameter name
(:mod:`fisherwalk.fitchecks`); restarts look for other modes (:mod:`fisherwalk.modes`).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax
from jax.scipy.linalg import cho_solve

from . import precision, pytrees
from .errors import ModelError, explain
from .fitchecks import (
    _check_end,
    _check_key,
    _check_options,
    _check_search,
    _check_start,
    _check_structure,
    _information,
    _validated,
)
from .modes import _check_box, _collect_modes, _restart_points

__all__ = ["LaplaceFit", "laplace", "check_fisher", "fisher_from_cholesky"]

_NEWTON_STEPS = 2  # safeguarded Newton steps after L-BFGS


class LaplaceFit(NamedTuple):
    """The Laplace approximation N(mode, H⁻¹) of a posterior."""

    mode: Any  # the mode in the user's pytree structure
    mode_flat: jax.Array  # (d,) the mode ravelled (jax.flatten_util order)
    logdensity: float  # log density at the mode
    fisher: jax.Array  # (d, d) H: observed (-Hessian) or user-supplied Fisher information
    cholesky: jax.Array  # (d, d) lower-triangular L with L Lᵀ = H
    gradient_norm: float  # max |∂ log π / ∂θ_i| at the mode
    iterations: int  # L-BFGS iterations + accepted Newton steps of the reported search
    evaluations: int  # value-and-gradient evaluations, all searches (restarts included)
    converged: bool  # the convergence test passed (a fit that fails it raises FitError)
    names: tuple[str, ...]  # d parameter names, ravelled order
    fisher_source: str  # "hessian" (autodiff) or "user"
    modes: tuple[tuple[Any, float], ...]  # distinct modes (pytree, log density), best first
    warnings: tuple[str, ...]  # notes for the user (other modes, a better restart, ...)
    seconds: dict[str, float]  # wall times: compile, run, restarts_compile, restarts_run, total


class _Search(NamedTuple):
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


def fisher_from_cholesky(cholesky: jax.Array) -> jax.Array:
    """The Fisher information H = L Lᵀ from its lower Cholesky factor L."""
    cholesky = jnp.asarray(cholesky)
    return cholesky @ cholesky.T


def check_fisher(matrix: Any, names: tuple[str, ...], *, where: str = "fisher",
                 rtol: float = 1e-6) -> jax.Array:
    """Validate a Fisher information given by the user (or read from a file).

    Parameters
    ----------
    matrix
        (d, d) array-like, in the ravelled parameter order ``names``.
    names
        The d parameter names (``LaplaceFit.names``).
    where
        Where the matrix came from, for the error message.
    rtol
        Allowed asymmetry ``max |H - Hᵀ| <= rtol * max |H|`` (rounding in a user's
        computation); the matrix is then symmetrised.

    Returns
    -------
    jax.Array
        The lower Cholesky factor L (L Lᵀ = H) of the symmetrised matrix.

    Raises
    ------
    InputError
        Wrong shape, non-finite entries, asymmetry, or not positive definite (smallest
        eigenvalue <= 1e-12 x the largest); the message names the parameters involved.
    """
    return jnp.asarray(np.linalg.cholesky(_validated(matrix, names, where, rtol)))


def laplace(
    logdensity_fn: Callable[[Any], jax.Array],
    position: Any,
    *,
    fisher: Any = None,
    max_iterations: int = 500,
    gradient_tolerance: float | None = None,
    restarts: int = 0,
    rng_key: jax.Array | None = None,
    spread: float = 3.0,
    box: tuple[Any, Any] | None = None,
) -> LaplaceFit:
    """Find the posterior mode and the Fisher information there (Laplace approximation).

    Parameters
    ----------
    logdensity_fn
        The log posterior up to a constant, ``position -> scalar`` (summed over
        observations), written in JAX.
    position
        Starting point: a pytree of floating arrays.
    fisher
        Optional Fisher information to report instead of the autodiff Hessian: a (d, d)
        matrix or a callable ``fisher(mode_pytree) -> (d, d)``, e.g. the expected
        information of a GLM (McCullagh & Nelder 1989, Generalized Linear Models, 2nd
        ed.). It is validated by :func:`check_fisher`. With it, no Hessian is computed
        at all (the log density need not be twice differentiable) and the Newton polish
        is skipped.
    max_iterations
        Maximum L-BFGS iterations.
    gradient_tolerance
        ``tol`` of the convergence test (default sqrt(machine epsilon) of the dtype:
        1.5e-8 in float64, 3.5e-4 in float32). The fit has converged when
        ``max_i |g_i| <= tol * max(1, |log π|)`` or when the Newton decrement
        ``sqrt(gᵀ H⁻¹ g) <= tol``. The first is scale-aware: a log density summed over
        n observations has value and gradient of order n, and rounding in the sum limits
        the attainable gradient to about eps·|log π|, so an absolute tolerance would be
        unreachable for large n. The second is the distance to the mode in posterior
        standard deviations, invariant to the parameters' units.
    restarts
        Number of extra searches from dispersed starting points (a check for other
        modes), run together with ``jax.vmap`` (one extra compilation).
    rng_key
        JAX key (typed or uint32) for the restarts' starting points.
    spread
        Restarts start from N(mode, spread² H⁻¹) around the first mode found ...
    box
        ... or, if given, uniformly inside ``(lower, upper)`` (pytrees like
        ``position``, arrays of d values, or scalars).

    Returns
    -------
    LaplaceFit

    Raises
    ------
    InputError
        A malformed position or argument, or an invalid user Fisher information.
    ModelError
        The log density is not a scalar, is not finite at the start, has a non-finite
        gradient there, or cannot take the position's structure.
    FitError
        No convergence; a runaway mode (the log density keeps rising along a direction
        of vanishing curvature, e.g. complete separation in logistic regression, Albert
        & Anderson 1984, Biometrika 71(1)); a Fisher information that is not finite or
        not positive definite (a saddle, an unidentified parameter).

    Notes
    -----
    Newton polish: after L-BFGS, up to two steps θ ← θ + H⁻¹ g, each accepted only if
    the log density rises, or stays within rounding (8 eps |log π|) while the largest
    gradient component falls; H is recomputed after each accepted step. L-BFGS alone can
    stall short of a tight tolerance on an ill-conditioned posterior.

    ``evaluations`` counts value-and-gradient evaluations: the start, every zoom
    line-search step (read from optax's line-search state) and every Newton trial;
    the 1 + (accepted Newton steps) Hessians are not included.

    Other modes: a restart counts as another mode when it ends at a converged local
    maximum more than 3 posterior standard deviations (in the H metric of either mode)
    from every mode found so far. Equal log densities do not merge modes (a symmetric
    mixture has two modes of equal height).

    Examples
    --------
    >>> import jax, jax.numpy as jnp
    >>> jax.config.update("jax_enable_x64", True)
    >>> fit = laplace(lambda p: -0.5 * jnp.sum((p["m"] - 1.0) ** 2 / 0.25),
    ...               {"m": jnp.zeros(2)})
    >>> fit.names, [round(float(v), 6) for v in fit.mode_flat], float(fit.fisher[0, 0])
    (('m[0]', 'm[1]'), [1.0, 1.0], 4.0)
    """
    started = time.perf_counter()
    flat = pytrees.flatten_position(position, where="laplace(position=...)")
    precision.warn_if_float32()
    names, unravel, x0 = flat.names, flat.unravel, flat.vector
    dtype = x0.dtype
    tol = (float(np.sqrt(np.finfo(dtype).eps)) if gradient_tolerance is None
           else gradient_tolerance)
    _check_options(max_iterations, tol, restarts, spread)
    key = _check_key(rng_key) if restarts else None
    bounds = _check_box(box, names) if restarts and box is not None else None
    _check_structure(logdensity_fn, position)
    if fisher is not None and not callable(fisher):  # a matrix: validate before compiling
        fisher = _validated(fisher, names, "laplace(fisher=...)", 1e-6)

    def logp(x):
        return jnp.asarray(logdensity_fn(unravel(x)), dtype=dtype)

    use_hessian = fisher is None
    search = jax.jit(_make_search(logp, use_hessian))
    args = (jnp.asarray(max_iterations, jnp.int32), jnp.asarray(tol, dtype))
    try:
        main, compile_s, run_s = _timed(search, x0, *args)
    except (TypeError, NotImplementedError) as err:
        raise ModelError(explain(
            f"JAX could not differentiate the log density: {err}",
            "logdensity_fn: its gradient" + (", or the Hessian" if use_hessian else ""),
            "write it with differentiable jax.numpy operations; if only the second "
            "derivative fails (e.g. a custom_vjp), pass fisher=... (a matrix or a function "
            "of the mode) so that no Hessian is needed.")) from err
    main = jax.tree_util.tree_map(np.asarray, main)
    _check_start(main, logdensity_fn, position, names)
    _check_end(main)
    info = _information(main, fisher, unravel, names)
    _check_search(main, info, np.asarray(x0), names, tol, max_iterations, use_hessian)
    seconds = {"compile": compile_s, "run": run_s}
    notes: list[str] = []
    modes = [(main, info)]
    evaluations = int(main.evaluations)
    if restarts:
        starts = _restart_points(key, main.x, info, restarts, spread, bounds, dtype)
        batch, c_s, r_s = _timed(jax.jit(jax.vmap(search, in_axes=(0, None, None))),
                                 starts, *args)
        seconds.update(restarts_compile=c_s, restarts_run=r_s)
        batch = jax.tree_util.tree_map(np.asarray, batch)
        evaluations += int(batch.evaluations.sum())
        modes, notes = _collect_modes(modes, batch, fisher, unravel, names, tol)
    best, best_info = modes[0]
    cholesky = jnp.asarray(np.linalg.cholesky(best_info), dtype=dtype)
    seconds["total"] = time.perf_counter() - started
    return LaplaceFit(
        mode=unravel(jnp.asarray(best.x, dtype)),
        mode_flat=jnp.asarray(best.x, dtype),
        logdensity=float(best.logdensity),
        fisher=jnp.asarray(best_info, dtype),
        cholesky=cholesky,
        gradient_norm=float(np.max(np.abs(best.gradient))),
        iterations=int(best.lbfgs_iterations + best.newton_steps),
        evaluations=evaluations,
        converged=True,
        names=names,
        fisher_source="hessian" if use_hessian else "user",
        modes=tuple((unravel(jnp.asarray(m.x, dtype)), float(m.logdensity)) for m, _ in modes),
        warnings=tuple(notes),
        seconds=seconds,
    )


# ----------------------------------------------------------------------------- the search


def _make_search(logp: Callable, use_hessian: bool) -> Callable:
    """``search(x0, max_iterations, tol) -> _Search``: L-BFGS in one while loop, then
    (with ``use_hessian``) the Hessian and the Newton polish, then the runaway probes.
    Pure, one compilation, vmappable over ``x0``."""

    def objective(x):
        return -logp(x)

    solver = optax.lbfgs()
    value_and_grad = optax.value_and_grad_from_state(objective)

    def information(x):
        h = jax.hessian(logp)(x)
        return -0.5 * (h + h.T)

    def search(x0, max_iterations, tol):
        value0, grad0 = jax.value_and_grad(objective)(x0)
        state = optax.tree.set(solver.init(x0), value=value0, grad=grad0)
        zero = jnp.zeros((), jnp.int32)

        def keep_going(carry):
            _, state, it, _, stalled = carry
            value, grad = optax.tree.get(state, "value"), optax.tree.get(state, "grad")
            small = jnp.max(jnp.abs(grad)) <= tol * jnp.maximum(1.0, jnp.abs(value))
            return (it < max_iterations) & ~small & ~stalled & jnp.isfinite(value)

        def iterate(carry):
            x, state, it, evals, _ = carry
            stored = optax.tree.get(state, "value")
            evals = evals + jnp.where(jnp.isfinite(stored), 0, 1)  # recomputed if not stored
            value, grad = value_and_grad(x, state=state)
            updates, state = solver.update(grad, state, x, value=value, grad=grad,
                                           value_fn=objective)
            evals = evals + optax.tree.get(state, "num_linesearch_steps").astype(jnp.int32)
            x_new = optax.apply_updates(x, updates)
            return x_new, state, it + 1, evals, jnp.all(x_new == x)

        x, state, iterations, evals, stalled = jax.lax.while_loop(
            keep_going, iterate, (x0, state, zero, zero + 1, jnp.asarray(False)))
        f, g = -optax.tree.get(state, "value"), -optax.tree.get(state, "grad")
        fisher, steps = jnp.zeros((x.size, x.size), x.dtype), zero

        def polish(carry):
            x, f, g, _, k, _, evals = carry
            h = information(x)
            step = cho_solve((jnp.linalg.cholesky(h), True), g)
            trying = (k < _NEWTON_STEPS) & jnp.all(jnp.isfinite(step))
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
        directions, values, radius = _probe(logp, x0, x, fisher if use_hessian else None)
        return _Search(x, f, g, fisher, iterations, steps, evals, stalled, -value0, -grad0,
                       directions, values, radius)

    return search


def _probe(logp: Callable, x0: jax.Array, x: jax.Array, fisher: jax.Array | None):
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


def _timed(fn: Callable, *args) -> tuple[Any, float, float]:
    """Compile ahead of time, then run: (result, compile seconds, run seconds)."""
    t0 = time.perf_counter()
    compiled = fn.lower(*args).compile()
    t1 = time.perf_counter()
    out = jax.block_until_ready(compiled(*args))
    return out, t1 - t0, time.perf_counter() - t1
