"""The Laplace approximation: mode, observed Fisher information, Cholesky factor, checks.

The posterior is summarised by N(mode, H⁻¹) with H = -∇² log π at the mode, the
observed Fisher information of the posterior (Tierney & Kadane 1986, "Accurate
approximations for posterior moments and marginal densities", JASA 81(393)); the
Bernstein–von Mises theorem says this picture is right for large n. The mode is found
by L-BFGS (Liu & Nocedal 1989, Math. Programming 45) with the zoom line search of
Nocedal & Wright (2006, Numerical Optimization, 2nd ed., Alg. 3.5-3.6), all inside one
jitted ``lax.while_loop``, then polished by at most two safeguarded Newton steps.
Every failure is checked eagerly afterwards and reported by parameter name.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax
from jax.flatten_util import ravel_pytree
from jax.scipy.linalg import cho_solve, solve_triangular

from . import precision, pytrees
from .errors import FitError, InputError, ModelError, explain

__all__ = ["LaplaceFit", "laplace", "check_fisher", "fisher_from_cholesky"]

_NEWTON_STEPS = 2  # safeguarded Newton steps after L-BFGS
_EIGEN_FLOOR = 1e-12  # smallest eigenvalue must exceed this fraction of the largest
_SAME_MODE_SD = 3.0  # restarts closer than this many posterior sd are the same mode


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


def _validated(matrix: Any, names: tuple[str, ...], where: str, rtol: float) -> np.ndarray:
    """The checks of :func:`check_fisher`; returns the symmetrised matrix (float64, host)."""
    d = len(names)
    try:
        host = np.asarray(matrix, dtype=np.float64)
    except (TypeError, ValueError) as err:
        raise InputError(explain(
            f"The Fisher information is a {type(matrix).__name__}, not a numeric matrix.",
            where, f"pass a ({d}, {d}) array of floats.")) from err
    order = ", ".join(names[:8]) + (", ..." if d > 8 else "")
    if host.shape != (d, d):
        raise InputError(explain(
            f"The Fisher information has shape {host.shape}; expected ({d}, {d}).",
            where, f"pass a ({d}, {d}) matrix in the ravelled parameter order: {order}."))
    bad = np.argwhere(~np.isfinite(host))
    if bad.size:
        pairs = "; ".join(f"({names[i]}, {names[j]})" for i, j in bad[:4])
        raise InputError(explain(
            f"The Fisher information has {len(bad)} non-finite entries, e.g. {pairs}.",
            where, "compute it at a point where the model is finite, in float64."))
    scale = max(float(np.max(np.abs(host))), np.finfo(float).tiny)
    asym = np.abs(host - host.T)
    if asym.max() > rtol * scale:
        i, j = np.unravel_index(np.argmax(asym), asym.shape)
        raise InputError(explain(
            f"The Fisher information is not symmetric: entries ({names[i]}, {names[j]}) = "
            f"{host[i, j]:.6g} and ({names[j]}, {names[i]}) = {host[j, i]:.6g} differ by "
            f"more than {rtol:g} of the largest entry.",
            where, "pass a symmetric matrix, e.g. (M + M.T) / 2 if the asymmetry is rounding."))
    host = 0.5 * (host + host.T)
    problem = _definiteness_problem(host, names)
    if problem:
        raise InputError(explain(
            f"The Fisher information is not positive definite: {problem}.",
            where, "check the formula and the point it was computed at; an unidentified "
            "parameter needs a proper prior."))
    return host


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


# ----------------------------------------------------------------------------- checks


def _check_options(max_iterations, tol, restarts, spread) -> None:
    def positive(value):
        return isinstance(value, int | float | np.number) and bool(0 < value < np.inf)

    for name, value, ok in (
        ("max_iterations", max_iterations, isinstance(max_iterations, int | np.integer)
         and max_iterations >= 1),
        ("gradient_tolerance", tol, positive(tol)),
        ("restarts", restarts, isinstance(restarts, int | np.integer) and restarts >= 0),
        ("spread", spread, positive(spread)),
    ):
        if not ok:
            raise InputError(explain(f"{name}={value!r} is not allowed.", f"laplace({name}=...)",
                                     "pass a positive number (an integer for counts)."))


def _check_key(rng_key) -> jax.Array:
    dtype = getattr(rng_key, "dtype", None)
    if dtype is not None and jax.dtypes.issubdtype(dtype, jax.dtypes.prng_key) \
            and rng_key.shape == ():
        return rng_key
    if dtype == np.uint32 and np.shape(rng_key) == (2,):
        return jnp.asarray(rng_key)
    raise InputError(explain(
        f"restarts need a JAX random key; got {type(rng_key).__name__}"
        + (f" of dtype {dtype} and shape {np.shape(rng_key)}" if dtype is not None else "")
        + ".", "laplace(rng_key=...)", "pass rng_key=jax.random.key(seed)."))


def _check_structure(logdensity_fn: Callable, position: Any) -> None:
    """Trace the log density abstractly (no compilation) and check it returns a scalar."""
    where = "logdensity_fn at the starting position"
    try:
        out = jax.eval_shape(logdensity_fn, position)
    except jax.errors.JAXTypeError as err:
        raise ModelError(explain(
            f"The log density cannot be traced by JAX ({type(err).__name__}).",
            where, "write it with jax.numpy only: no float()/int()/Python `if` on parameters "
            "(use jnp.where), no NumPy calls on them.")) from err
    except (TypeError, KeyError, IndexError, AttributeError) as err:
        shapes = jax.tree_util.tree_map(lambda leaf: tuple(np.shape(leaf)), position)
        raise ModelError(explain(
            f"The log density raised {type(err).__name__}: {err}",
            f"{where}; it was called with {jax.tree_util.tree_structure(position)} "
            f"(leaf shapes {shapes})",
            "make logdensity_fn accept exactly this structure (the same keys, order and "
            "shapes as the position you pass).")) from err
    shape = getattr(out, "shape", None)
    if shape != () or not jnp.issubdtype(out.dtype, jnp.floating):
        what = (f"an array of shape {shape}" if shape is not None
                else f"a {type(out).__name__}")
        raise ModelError(explain(
            f"The log density returned {what}"
            + (f" of dtype {out.dtype}" if shape == () else "") + ", not a floating scalar.",
            where, "return a scalar log density: sum over observations "
            "(e.g. jnp.sum(loglik_terms) + log_prior)."))


def _check_start(s: _Search, logdensity_fn: Callable, position: Any,
                 names: tuple[str, ...]) -> None:
    """Say what is wrong with a log density or gradient that is not finite at the start."""
    where = "logdensity_fn at the starting position"
    number = float(s.start_logdensity)
    if np.isnan(number):
        data = _nonfinite_constants(logdensity_fn, position)
        raise ModelError(explain(
            "The log density is NaN at the starting point; this usually means NaN or inf in "
            "the data the log density closes over (check your arrays with jnp.isfinite)"
            + (f". Found: {data}." if data else ", or an operation undefined there "
               "(log of a negative number, 0/0)."),
            where, "remove or impute the non-finite data, or start where every term is "
            "defined."))
    if np.isinf(number):
        sign = "+inf" if number > 0 else "-inf"
        what = ("outside the support of the posterior (a zero density)" if number < 0 else
                "a point where the density is unbounded (e.g. a scale parameter at zero)")
        raise ModelError(explain(
            f"The log density is {sign} at the starting point: {what}.", where,
            "start inside the support (positive scales, probabilities in (0, 1)); better, "
            "transform constrained parameters to the real line (log, logit)."))
    bad = ~np.isfinite(s.start_gradient)
    if bad.any():
        raise ModelError(explain(
            f"The gradient of the log density is not finite at the starting point for "
            f"{_list(np.flatnonzero(bad), names)}.", where,
            "start where the log density is smooth (e.g. away from sqrt(0), log(0)); "
            "check the data for NaN or inf."))


def _nonfinite_constants(logdensity_fn: Callable, position: Any) -> str:
    """Arrays closed over by the log density (the constants of its jaxpr) with NaN/inf."""
    try:
        closed = jax.make_jaxpr(logdensity_fn)(position)
    except Exception:  # pragma: no cover - the log density ran eagerly already
        return ""
    found = []
    for const in closed.consts:
        array = np.asarray(const)
        if np.issubdtype(array.dtype, np.inexact) and not np.isfinite(array).all():
            found.append(f"an array of shape {array.shape} with "
                         f"{int((~np.isfinite(array)).sum())} non-finite values")
    return "; ".join(found)


def _information(search: _Search, fisher: Any, unravel: Callable,
                 names: tuple[str, ...]) -> np.ndarray:
    """The reported Fisher information at a search's end point (float64, host)."""
    if fisher is None:
        return np.asarray(search.fisher, np.float64)
    if not callable(fisher):
        return fisher  # validated already
    matrix = fisher(unravel(jnp.asarray(search.x)))
    return _validated(matrix, names, "laplace(fisher=...) at the mode", 1e-6)


def _check_end(s: _Search) -> None:
    if not (np.isfinite(s.x).all() and np.isfinite(s.logdensity)):
        raise FitError(explain(
            f"The mode search ended at a non-finite point or log density ({s.logdensity}).",
            "laplace(): the mode search", "the log density may be unbounded (e.g. a variance "
            "shrinking to zero): add a proper prior, or start nearer the expected mode."))


def _check_search(s: _Search, info: np.ndarray, x0: np.ndarray, names: tuple[str, ...],
                  tol: float, max_iterations: int, use_hessian: bool) -> None:
    """Raise FitError for a non-finite end, a runaway mode, no convergence, or a Fisher
    information that is not finite or not positive definite."""
    where = "laplace(): the mode search"
    bad = np.argwhere(~np.isfinite(info))
    if bad.size:
        pairs = ", ".join(f"({names[i]}, {names[j]})" for i, j in bad[:6])
        raise FitError(explain(
            f"The Hessian at the mode has {len(bad)} non-finite entries: {pairs}.",
            where, "the log density is not twice differentiable there (or overflows); "
            "rewrite those terms stably (logaddexp, log1p) or pass fisher=..."))
    runaway = _runaway(s, info)
    if runaway is not None:
        direction, values, bounded = runaway
        what = ("the log density keeps rising, and levels off, along a direction in which "
                "its curvature vanishes: the posterior has no mode there" if bounded else
                "the log density keeps rising along a direction of vanishing curvature, for "
                "100 times the distance travelled: the posterior is improper (unbounded), "
                "or the start is very far off")
        raise FitError(explain(
            f"Runaway mode: {what} (log density {values}; |θ| went from "
            f"{np.linalg.norm(x0):.3g} to {np.linalg.norm(s.x):.3g}).",
            f"{where}; the direction involves {_signed(direction, names)}",
            "give these parameters a proper prior; in a logistic/binary regression check "
            "for complete or quasi-complete separation (a predictor, or a combination, "
            "that splits the outcomes perfectly); a hierarchical scale whose density is "
            "unbounded near zero needs a non-centred parameterisation."))
    if not _converged(s, info, tol):
        gmax = float(np.max(np.abs(s.gradient)))
        threshold = tol * max(1.0, abs(float(s.logdensity)))
        decrement = _newton_decrement(s.gradient, info)
        order = np.argsort(-np.abs(s.gradient))[:3]
        stall = " (the line search stopped making progress)" if s.stalled else ""
        distance = (f"{decrement:.3g} posterior sd" if np.isfinite(decrement)
                    else "unknown (H not positive definite there)")
        raise FitError(explain(
            f"The mode search did not converge{stall}: largest gradient component "
            f"{gmax:.3g} > tolerance {threshold:.3g} (= {tol:.3g} x max(1, |log density|)); "
            f"Newton-step distance to the mode {distance}; after {int(s.lbfgs_iterations)} of "
            f"{max_iterations} iterations (+{int(s.newton_steps)} Newton steps).",
            f"{where}; largest gradient components: "
            + ", ".join(f"{names[i]} = {s.x[i]:.4g} (gradient {s.gradient[i]:.3g})"
                        for i in order),
            "raise max_iterations, start nearer the mode, or rescale the parameters so that "
            "their posterior standard deviations are of order 1; a parameter running off "
            "to a huge value may have an improper or unbounded posterior (check its "
            "prior; a hierarchical scale may need a non-centred parameterisation)."))
    if use_hessian:
        problem = _definiteness_problem(info, names)
        if problem:
            raise FitError(explain(
                f"The observed Fisher information (-Hessian) is not positive definite at the "
                f"end point: {problem}.", where,
                "the end point may be a saddle (start elsewhere, or use restarts), or a "
                "parameter is unidentified (only a combination enters the log density): "
                "add a proper prior or reparameterise."))


def _converged(s: _Search, info: np.ndarray, tol: float) -> bool:
    """max |g| <= tol * max(1, |log π|), or Newton decrement sqrt(gᵀ H⁻¹ g) <= tol."""
    gmax = float(np.max(np.abs(s.gradient)))
    return (gmax <= tol * max(1.0, abs(float(s.logdensity)))
            or _newton_decrement(s.gradient, info) <= tol)


def _runaway(s: _Search, info: np.ndarray) -> tuple[np.ndarray, str, bool] | None:
    """A probed direction u (see :func:`_probe`) of vanishing curvature (|uᵀ H u| r² < 1:
    the implied sd along u exceeds the probe radius r; a saddle's negative curvature is
    not vanishing) along which the log density rises beyond rounding at r, 10 r and
    100 r. Returns u, the values, and whether the rise levels off (a supremum that is
    not attained, as under separation, Albert & Anderson 1984) or not (unbounded)."""
    f = float(s.logdensity)
    slack = 1e3 * np.finfo(np.float64).eps * max(1.0, abs(f))
    r = float(s.probe_radius)
    for u, (f1, f2, f3) in zip(s.probe_directions, s.probe_values, strict=True):
        rising = f1 > f + slack and f2 >= f1 - slack and f3 >= f2 - slack
        if rising and abs(u @ info @ u) * r**2 < 1.0:
            levels_off = bool(np.isfinite(f3) and f3 - f2 <= f2 - f1 + slack)
            return u, f"{f:.6g} at the end, {f1:.6g}, {f2:.6g}, {f3:.6g} further on", levels_off
    return None


def _newton_decrement(gradient: np.ndarray, info: np.ndarray) -> float:
    """sqrt(gᵀ H⁻¹ g): the distance to the mode in posterior standard deviations."""
    try:
        half = np.linalg.solve(np.linalg.cholesky(info), gradient)
    except np.linalg.LinAlgError:
        return np.inf
    value = float(np.sqrt(half @ half))
    return value if np.isfinite(value) else np.inf


def _definiteness_problem(matrix: np.ndarray, names: tuple[str, ...]) -> str:
    """'' if the symmetric matrix is positive definite (smallest eigenvalue > 1e-12 x the
    largest), else a sentence naming the parameters of the offending eigenvector."""
    eigvals, eigvecs = np.linalg.eigh(matrix)
    top = max(float(eigvals[-1]), 0.0)
    if eigvals[0] > _EIGEN_FLOOR * top and top > 0:
        try:
            np.linalg.cholesky(matrix)
            return ""
        except np.linalg.LinAlgError:  # pragma: no cover - eigh and cholesky disagree
            pass
    return (f"smallest eigenvalue {eigvals[0]:.3g} (largest {eigvals[-1]:.3g}); its "
            f"eigenvector involves {_signed(eigvecs[:, 0], names)}")


def _signed(vector: np.ndarray, names: tuple[str, ...], k: int = 4) -> str:
    """The parameters with the largest |components| of a unit vector, with their signs."""
    order = np.argsort(-np.abs(vector))[:k]
    keep = [i for i in order if abs(vector[i]) >= 0.25 * abs(vector[order[0]])]
    return ", ".join(f"{names[i]} ({vector[i]:+.2f})" for i in keep)


def _list(indices, names: tuple[str, ...], k: int = 6) -> str:
    shown = [names[i] for i in indices[:k]]
    return ", ".join(shown) + (f" and {len(indices) - k} more" if len(indices) > k else "")


# ----------------------------------------------------------------------------- restarts


def _restart_points(key, mode: np.ndarray, info: np.ndarray, restarts: int, spread: float,
                    bounds: tuple[np.ndarray, np.ndarray] | None, dtype) -> jax.Array:
    """(restarts, d) starting points: N(mode, spread² H⁻¹), or uniform in the bounds."""
    if bounds is None:
        z = jax.random.normal(key, (restarts, mode.size), dtype)
        cholesky = jnp.asarray(np.linalg.cholesky(info), dtype)
        return mode + spread * solve_triangular(cholesky.T, z.T, lower=False).T
    lower, upper = (jnp.asarray(side, dtype) for side in bounds)
    return jax.random.uniform(key, (restarts, mode.size), dtype, lower, upper)


def _check_box(box: Any, names: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray]:
    """(lower, upper) as two (d,) vectors: pytrees like the position, d values, or scalars."""
    d = len(names)
    try:
        lower, upper = box
        sides = []
        for side in (lower, upper):
            vector = np.asarray(ravel_pytree(side)[0], np.float64)
            if vector.size not in (1, d):
                raise ValueError(f"one side has {vector.size} values, expected {d}")
            sides.append(np.broadcast_to(vector, (d,)))
    except (TypeError, ValueError) as err:
        raise InputError(explain(
            f"box must be (lower, upper), each a pytree like the position, {d} values or a "
            f"scalar ({err}).", "laplace(box=...)",
            f"give the bounds in the parameter order {_list(range(d), names)}.")) from err
    lower, upper = sides
    if not (np.isfinite(lower).all() and np.isfinite(upper).all() and (lower < upper).all()):
        bad = np.flatnonzero(~(np.isfinite(lower) & np.isfinite(upper) & (lower < upper)))
        raise InputError(explain(
            "box needs finite bounds with lower < upper.",
            f"laplace(box=...), parameters {_list(bad, names)}", "fix these bounds."))
    return lower, upper


def _collect_modes(modes: list, batch: _Search, fisher: Any, unravel: Callable,
                   names: tuple[str, ...], tol: float) -> tuple[list, list[str]]:
    """Merge converged restarts into the list of distinct modes; notes for the user."""
    main = modes[0][0]
    restarts = batch.x.shape[0]
    failed = dict.fromkeys(("non-finite", "invalid Fisher information", "runaway",
                            "saddle or flat", "not converged"), 0)
    for i in range(restarts):
        s = jax.tree_util.tree_map(lambda leaf, i=i: leaf[i], batch)
        if not (np.isfinite(s.x).all() and np.isfinite(s.logdensity)
                and np.isfinite(s.fisher).all()):
            failed["non-finite"] += 1
            continue
        try:
            info = _information(s, fisher, unravel, names)
        except InputError:
            failed["invalid Fisher information"] += 1
            continue
        if _runaway(s, info) is not None:
            failed["runaway"] += 1
            continue
        if not _converged(s, info, tol):
            failed["not converged"] += 1
            continue
        if fisher is None and _definiteness_problem(info, names):
            failed["saddle or flat"] += 1
            continue
        for k, (m, m_info) in enumerate(modes):
            delta = s.x - m.x
            if min(delta @ m_info @ delta, delta @ info @ delta) <= _SAME_MODE_SD**2:
                if k > 0 and s.logdensity > m.logdensity:
                    modes[k] = (s, info)
                break
        else:
            modes.append((s, info))
    notes = []
    # The main search stays first unless another mode is higher beyond rounding.
    rounding = 1e3 * np.finfo(np.float64).eps * max(1.0, abs(float(main.logdensity)))
    modes.sort(key=lambda pair: -float(pair[0].logdensity)
               + (rounding if pair[0] is not main else 0.0))
    if len(modes) > 1:
        heights = ", ".join(f"{float(m.logdensity):.6g}" for m, _ in modes)
        notes.append(
            f"{len(modes)} distinct modes found with {restarts} restarts (log densities "
            f"{heights}): a single Laplace approximation does not describe the posterior; "
            "chains started near one mode may never visit the others.")
    best = modes[0][0]
    if best is not main:
        notes.append(
            f"A restart reached a higher mode (log density {float(best.logdensity):.6g} > "
            f"{float(main.logdensity):.6g} from the given position); the fit uses it.")
    bad = sum(failed.values())
    if bad:
        kinds = ", ".join(f"{kind}: {n}" for kind, n in failed.items() if n)
        notes.append(f"{bad} of {restarts} restarts did not end at a local mode ({kinds}); "
                     "they are left out of `modes`.")
    return modes, notes
