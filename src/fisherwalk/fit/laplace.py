"""The Laplace approximation: mode, observed Fisher information, Cholesky factor, checks.

The posterior is summarised by N(mode, H⁻¹) with H = -∇² log π at the mode, the
observed Fisher information of the posterior (Tierney & Kadane 1986, "Accurate
approximations for posterior moments and marginal densities", JASA 81(393)); the
Bernstein–von Mises theorem says this picture is right for large n. The mode is found
by L-BFGS (Liu & Nocedal 1989, Math. Programming 45) with a backtracking (Armijo) line
search (Nocedal & Wright 2006, Numerical Optimization, 2nd ed., Alg. 3.1 and 7.4;
:mod:`fisherwalk.fit.lbfgs`), all inside one jitted ``lax.while_loop``, then polished
by at most two safeguarded Newton steps.
Every failure is checked eagerly afterwards and reported by parameter name
(:mod:`fisherwalk.fit.checks`); restarts look for other modes (:mod:`fisherwalk.fit.modes`);
the compiled search itself is :mod:`fisherwalk.fit.search`.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from ..base import precision, programs, pytrees
from ..base.keys import as_key
from ..errors import ModelError, NoModeError, explain
from .checks import (
    check_end,
    check_options,
    check_search,
    check_start,
    check_structure,
    information,
    validated_matrix,
)
from .modes import SCOUT_SPREAD, check_box, collect_modes, restart_points, scout_points
from .runaway import advice, find_no_mode
from .search import compile_ahead, make_search, timed, whole

__all__ = ["LaplaceFit", "laplace", "check_fisher", "fisher_from_cholesky"]


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
    names: tuple[str, ...]  # d parameter names, ravelled order
    fisher_source: str  # "hessian" (autodiff) or "user"
    modes: tuple[tuple[Any, float], ...]  # distinct modes (pytree, log density), best first
    warnings: tuple[str, ...]  # notes for the user (other modes, a better restart, ...)
    seconds: dict[str, float]  # wall times: compile, run, restarts_compile, restarts_run,
    #                            scouts, total
    modes_flat: tuple[np.ndarray, ...] = ()  # the distinct modes ravelled, as in ``modes``
    modes_fisher: tuple[np.ndarray, ...] = ()  # the Fisher information at each of them
    order: tuple[int, ...] = ()  # ravelled indices in the order the user wrote them (() = as is)
    no_mode: str = ""  # set when the posterior has no mode: the diagnosis (then ``mode`` is
    #                    the centre of warm-up draws and ``fisher`` the precision they gave)


def fisher_from_cholesky(cholesky: jax.Array) -> jax.Array:
    """The Fisher information H = L Lᵀ from its lower Cholesky factor L."""
    cholesky = jnp.asarray(cholesky)
    return cholesky @ cholesky.T


def check_fisher(matrix: Any, names: tuple[str, ...], *, where: str = "fisher") -> jax.Array:
    """Validate a Fisher information given by the user (or read from a file).

    Parameters
    ----------
    matrix
        (d, d) array-like, in the ravelled parameter order ``names``.
    names
        The d parameter names (``LaplaceFit.names``).
    where
        Where the matrix came from, for the error message.

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
    return jnp.asarray(np.linalg.cholesky(validated_matrix(matrix, names, where)))


def _check_mode_exists(main, compiled, x0, args, user_fisher, names,
                       settled: bool = True) -> None:
    """Raise NoModeError when the search ran off along one parameter while the log
    density kept rising (:func:`fisherwalk.fit.runaway.find_no_mode`). ``settled``: the
    search's second program (the Hessian) has run; before it, the gradient alone says
    whether the search converged."""
    info = None
    if settled and user_fisher is None and np.isfinite(main.fisher).all():
        info = np.asarray(main.fisher, np.float64)
    found = find_no_mode(main, info, compiled, x0, args[1], names)
    if found is not None:
        raise NoModeError(explain(found.message, f"laplace(): the mode search, parameter "
                                  f"{found.name}", advice(found)), found)


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
    scouts: int = 0,
    scout_spread: float = SCOUT_SPREAD,
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
        ``position``, arrays of d values, or scalars). Use a box when you know where the
        posterior's mass can lie (e.g. the prior's range): restarts then search all of
        it, not only the neighbourhood of the first mode.
    scouts
        Cheap searches for other modes, run one after another with the already compiled
        search (no extra compilation), from over-dispersed points in antithetic pairs
        mode ± c·S z, z ~ N(0, I), S Sᵀ = H⁻¹, c = ``scout_spread`` (far beyond the
        first mode's own spread of ~3 sd). Scouts that fail are dropped silently.
        :func:`fisherwalk.start` runs 8 by default. Needs ``rng_key``.
    scout_spread
        c above (default 15).

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
    NoModeError
        (a FitError) The search drove one parameter off while the log density kept
        rising: the posterior has no mode (a funnel); :func:`fisherwalk.start` catches it
        and warms a gradient sampler up from draws (:mod:`fisherwalk.fit.runaway`).
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

    ``evaluations`` counts value-and-gradient evaluations: the start, every
    line-search trial and every Newton trial; the 1 + (accepted Newton steps) Hessians
    are not included.

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
    check_options(max_iterations, tol, restarts, spread)
    check_options(max_iterations, tol, scouts, scout_spread)
    key = as_key(rng_key, where="laplace(rng_key=...)") if restarts or scouts else None
    bounds = check_box(box, names) if restarts and box is not None else None
    check_structure(logdensity_fn, position)
    if fisher is not None and not callable(fisher):  # a matrix: validate before compiling
        fisher = validated_matrix(fisher, names, "laplace(fisher=...)")

    def logp(x):
        return jnp.asarray(logdensity_fn(unravel(x)), dtype=dtype)

    use_hessian = fisher is None
    args = (jnp.asarray(max_iterations, jnp.int32), jnp.asarray(tol, dtype))

    key_static = (jax.tree_util.tree_structure(position), x0.shape, str(dtype), use_hessian)
    descend, settle = make_search(logp, use_hessian)

    def compiled_program(what: str, build: Callable):
        try:  # once per model (programs.remembered): a second fit compiles nothing
            return programs.remembered(logdensity_fn, what, key_static, build)
        except (TypeError, NotImplementedError) as err:
            raise ModelError(explain(
                f"JAX could not differentiate the log density: {err}",
                "logdensity_fn: its gradient" + (", or the Hessian" if use_hessian else ""),
                "write it with differentiable jax.numpy operations; if only the second "
                "derivative fails (e.g. a custom_vjp), pass fisher=... (a matrix or a "
                "function of the mode) so that no Hessian is needed.")) from err

    began = time.perf_counter()
    first_program = compiled_program("laplace descent", lambda: compile_ahead(
        jax.jit(descend), x0, *args)[0])
    compile_s = time.perf_counter() - began
    began = time.perf_counter()
    first = jax.tree_util.tree_map(np.asarray, jax.block_until_ready(first_program(x0, *args)))
    run_s = time.perf_counter() - began
    check_start(first, logdensity_fn, position, names)
    # a run-off is diagnosed from L-BFGS's path alone, before the Hessian is compiled
    _check_mode_exists(first, first_program, x0, args, fisher, names, settled=False)
    began = time.perf_counter()
    second_program = compiled_program("laplace settle", lambda: compile_ahead(
        jax.jit(settle), x0, first)[0])
    compile_s += time.perf_counter() - began
    began = time.perf_counter()
    main = jax.tree_util.tree_map(np.asarray, jax.block_until_ready(
        second_program(x0, first)))
    run_s += time.perf_counter() - began
    _check_mode_exists(main, first_program, x0, args, fisher, names)

    def compiled(point, *args):
        return second_program(point, first_program(point, *args))

    check_end(main)
    info = information(main, fisher, unravel, names)
    check_search(main, info, np.asarray(x0), names, tol, max_iterations, use_hessian,
                 gradient_at=lambda x: np.asarray(jax.grad(logp)(jnp.asarray(x))))
    seconds = {"compile": compile_s, "run": run_s}
    notes: list[str] = []
    modes = [(main, info)]
    evaluations = int(main.evaluations)
    batches = []
    if restarts:
        starts = restart_points(key, main.x, info, restarts, spread, bounds, dtype)
        batch, c_s, r_s = timed(jax.jit(jax.vmap(whole(descend, settle),
                                                 in_axes=(0, None, None))),
                                 starts, *args)
        seconds.update(restarts_compile=c_s, restarts_run=r_s)
        batches.append(jax.tree_util.tree_map(np.asarray, batch))
    if scouts:
        began = time.perf_counter()
        points = scout_points(key, main.x, info, scouts, scout_spread, dtype)
        found = [jax.tree_util.tree_map(np.asarray, compiled(jnp.asarray(p), *args))
                 for p in points]
        batches.append(jax.tree_util.tree_map(lambda *leaves: np.stack(leaves), *found))
        seconds["scouts"] = time.perf_counter() - began
    if batches:
        batch = jax.tree_util.tree_map(lambda *leaves: np.concatenate(leaves), *batches)
        evaluations += int(batch.evaluations.sum())
        modes, notes = collect_modes(modes, batch, fisher, unravel, names, tol,
                                     report_failures=restarts > 0)
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
        names=names,
        fisher_source="hessian" if use_hessian else "user",
        modes=tuple((unravel(jnp.asarray(m.x, dtype)), float(m.logdensity)) for m, _ in modes),
        warnings=tuple(notes),
        seconds=seconds,
        modes_flat=tuple(np.asarray(m.x, dtype) for m, _ in modes),
        modes_fisher=tuple(np.asarray(m_info, dtype) for _, m_info in modes),
        order=pytrees.written_order(position),
    )
