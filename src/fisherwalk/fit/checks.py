"""The eager checks of a Laplace fit, each failure explained by parameter name.

Before the search: the options, the restarts' key and the log density's structure
(traced abstractly). After it: the start (a log density or gradient that is not finite
there), the end point (finite, no runaway mode, converged, a Fisher information that is
finite and positive definite), and a Fisher information given by the user. The
convergence test and the runaway-mode test are described in
:func:`fisherwalk.fit.laplace.laplace`.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..base.checks import definiteness_problem, positive_number, spd_matrix, whole_number
from ..errors import FitError, ModelError, explain
from .search import Search


def validated_matrix(matrix: Any, names: tuple[str, ...], where: str) -> np.ndarray:
    """A user's Fisher information, checked by :func:`fisherwalk.base.checks.spd_matrix`
    (one tolerance for every matrix the package accepts); returns the symmetrised matrix
    (float64, host)."""
    return spd_matrix(matrix, names, where, what="Fisher information",
                      todo="check the formula and the point it was computed at; an "
                           "unidentified parameter needs a proper prior.")


# ---------------------------------------------------------------------- before the search


def check_options(max_iterations, tol, restarts, spread) -> None:
    whole_number(max_iterations, "max_iterations", "laplace(max_iterations=...)")
    positive_number(tol, "gradient_tolerance", "laplace(gradient_tolerance=...)")
    whole_number(restarts, "restarts", "laplace(restarts=...)", minimum=0)
    positive_number(spread, "spread", "laplace(spread=...)")


def check_structure(logdensity_fn: Callable, position: Any) -> None:
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
    callback = _callback_in(jax.make_jaxpr(logdensity_fn)(position).jaxpr)
    if callback:
        raise ModelError(explain(
            f"The log density calls back to Python ({callback}, e.g. jax.pure_callback): "
            "JAX cannot differentiate through a callback, and the Laplace fit needs the "
            "gradient and the Hessian.", where,
            "write the log density in jax.numpy, or give the callback its derivative with "
            "jax.custom_jvp (then pass fisher=... if the Hessian is not available)."))
    shape = getattr(out, "shape", None)
    if shape != () or not jnp.issubdtype(out.dtype, jnp.floating):
        what = (f"an array of shape {shape}" if shape is not None
                else f"a {type(out).__name__}")
        raise ModelError(explain(
            f"The log density returned {what}"
            + (f" of dtype {out.dtype}" if shape == () else "") + ", not a floating scalar.",
            where, "return a scalar log density: sum over observations "
            "(e.g. jnp.sum(loglik_terms) + log_prior)."))


# ----------------------------------------------------------------------- after the search


def _callback_in(jaxpr) -> str:
    """The name of a host callback primitive reachable in a jaxpr outside a custom
    derivative rule ('' if none)."""
    for eqn in jaxpr.eqns:
        name = eqn.primitive.name
        if "callback" in name:
            return name
        if name.startswith(("custom_jvp_call", "custom_vjp_call")):
            continue
        for value in eqn.params.values():
            for sub in value if isinstance(value, tuple | list) else (value,):
                inner = getattr(sub, "jaxpr", sub)
                if hasattr(inner, "eqns"):
                    found = _callback_in(inner)
                    if found:
                        return found
    return ""


def check_start(s: Search, logdensity_fn: Callable, position: Any,
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
            f"{name_list(np.flatnonzero(bad), names)}.", where,
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


def information(search: Search, fisher: Any, unravel: Callable,
                 names: tuple[str, ...]) -> np.ndarray:
    """The reported Fisher information at a search's end point (float64, host)."""
    if fisher is None:
        return np.asarray(search.fisher, np.float64)
    if not callable(fisher):
        return fisher  # validated already
    matrix = fisher(unravel(jnp.asarray(search.x)))
    return validated_matrix(matrix, names, "laplace(fisher=...) at the mode")


def check_end(s: Search) -> None:
    if not (np.isfinite(s.x).all() and np.isfinite(s.logdensity)):
        raise FitError(explain(
            f"The mode search ended at a non-finite point or log density ({s.logdensity}).",
            "laplace(): the mode search", "the log density may be unbounded (e.g. a variance "
            "shrinking to zero): add a proper prior, or start nearer the expected mode."))


def _nan_gradient_near(s: Search, gradient_at) -> tuple[np.ndarray, int] | None:
    """A point a short way from the search's end, uphill, where the gradient is not
    finite (and which coordinate), or None: a band of NaN gradient the search could not
    cross. Probed at 1e-3 .. 1 times max(1, |x|) along the gradient."""
    if gradient_at is None:
        return None
    x, g = np.asarray(s.x, dtype=float), np.asarray(s.gradient, dtype=float)
    norm = float(np.linalg.norm(g))
    if not np.isfinite(norm) or norm == 0.0:
        return None
    scale = max(1.0, float(np.linalg.norm(x)))
    for t in (1e-3, 3e-3, 1e-2, 3e-2, 0.1, 0.3, 1.0):
        point = x + t * scale * g / norm
        with contextlib.suppress(Exception):
            grad = np.asarray(gradient_at(point))
            bad = np.flatnonzero(~np.isfinite(grad))
            if bad.size:
                return point, int(bad[0])
    return None


def _ill_conditioned(info: np.ndarray) -> float | None:
    """The ratio largest/smallest eigenvalue of a Fisher information whose eigenvalues are
    all positive but too spread for float64 (the definiteness check's failure then says
    'not positive definite' of a matrix that is, at this point, only ill-conditioned)."""
    with contextlib.suppress(np.linalg.LinAlgError, ValueError):
        eig, vectors = np.linalg.eigh(info)
        v = vectors[:, 0]
        along = float(np.sum(v**2 * np.diag(info)))  # the curvature of v's own parameters
        # an unidentified combination is a cancellation (eig[0] far below ``along``);
        # a funnel's smallest curvature is a parameter's own, dwarfed by the others'
        if eig[0] > 0 and eig[0] >= 0.5 * along:
            return float(eig[-1] / eig[0])
    return None


def check_search(s: Search, info: np.ndarray, x0: np.ndarray, names: tuple[str, ...],
                  tol: float, max_iterations: int, use_hessian: bool,
                  gradient_at=None) -> None:
    """Raise FitError for a non-finite end, a runaway mode, no convergence, or a Fisher
    information that is not finite or not positive definite. ``gradient_at(x)`` (the
    log density's gradient) lets a search stopped by a band of NaN gradient say so."""
    where = "laplace(): the mode search"
    bad = np.argwhere(~np.isfinite(info))
    if bad.size:
        pairs = ", ".join(f"({names[i]}, {names[j]})" for i, j in bad[:6])
        raise FitError(explain(
            f"The Hessian at the mode has {len(bad)} non-finite entries: {pairs}.",
            where, "the log density is not twice differentiable there (or overflows); "
            "rewrite those terms stably (logaddexp, log1p) or pass fisher=..."))
    escape = runaway(s, info)
    if escape is not None:
        direction, values, bounded = escape
        what = ("the log density keeps rising, and levels off, along a direction in which "
                "its curvature vanishes: the posterior has no mode there" if bounded else
                "the log density keeps rising along a direction of vanishing curvature, for "
                "100 times the distance travelled: the posterior is improper (unbounded), "
                "or the start is very far off")
        raise FitError(explain(
            f"Runaway mode: {what} (log density {values}; |θ| went from "
            f"{np.linalg.norm(x0):.3g} to {np.linalg.norm(s.x):.3g}).",
            f"{where}; the direction involves {signed_names(direction, names)}",
            "give these parameters a proper prior; in a logistic/binary regression check "
            "for complete or quasi-complete separation (a predictor, or a combination, "
            "that splits the outcomes perfectly); a hierarchical scale whose density is "
            "unbounded near zero needs a non-centred parameterisation."))
    if not converged(s, info, tol):
        band = _nan_gradient_near(s, gradient_at) if s.stalled else None
        if band is not None:
            point, j = band
            raise FitError(explain(
                f"The mode search stopped at the edge of a region where the gradient of the "
                f"log density is NaN (not finite), though the log density is finite: at "
                f"{names[j]} = {point[j]:.4g} the gradient component of {names[j]} is NaN, a "
                "short way uphill from where the search stopped.",
                f"{where}; the NaN gradient near "
                + ", ".join(f"{names[i]} = {point[i]:.4g}" for i in range(min(len(names), 6))),
                "make the log density differentiable there: a sqrt, log or power of a term "
                "that reaches zero (e.g. jnp.sqrt(jnp.maximum(t, 0))) has an infinite or NaN "
                "derivative; use a smooth form, or guard the term with jnp.where so that "
                "both branches are differentiable."))
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
        problem = definiteness_problem(info, names)
        ratio = _ill_conditioned(info) if problem else None
        if problem and ratio is not None:
            raise FitError(explain(
                f"The curvature of the log density at the end point spans a factor "
                f"{ratio:.3g} between directions, more than float64 resolves: {problem}. "
                "No single Gaussian describes the posterior there; the search ran toward a "
                "region where its scale changes by orders of magnitude (a funnel: a "
                "hierarchical scale and the effects it scales) and the end point is not a "
                "mode a Laplace approximation can use.", where,
                "reparameterise (a non-centred form: effects = scale x standard-normal "
                "variables), or give the scale a prior that keeps it away from the funnel's "
                "neck; the Laplace-tuned samplers need a posterior that is roughly Gaussian "
                "at its mode."))
        if problem:
            raise FitError(explain(
                f"The observed Fisher information (-Hessian) is not positive definite at the "
                f"end point: {problem}.", where,
                "the end point may be a saddle (start elsewhere, or use restarts), or a "
                "parameter is unidentified (only a combination enters the log density): "
                "add a proper prior or reparameterise."))


def converged(s: Search, info: np.ndarray, tol: float) -> bool:
    """max |g| <= tol * max(1, |log π|), or Newton decrement sqrt(gᵀ H⁻¹ g) <= tol."""
    gmax = float(np.max(np.abs(s.gradient)))
    return (gmax <= tol * max(1.0, abs(float(s.logdensity)))
            or _newton_decrement(s.gradient, info) <= tol)


def runaway(s: Search, info: np.ndarray) -> tuple[np.ndarray, str, bool] | None:
    """A probed direction u (see :func:`fisherwalk.fit.search.probe`) of vanishing
    curvature (|uᵀ H u| r² < 1: the implied sd along u exceeds the probe radius r; a
    saddle's negative curvature is not vanishing) along which the log density rises
    beyond rounding at r, 10 r and 100 r. Returns u, the values, and whether the rise
    levels off (a supremum that is not attained, as under separation, Albert & Anderson
    1984) or not (unbounded)."""
    f = float(s.logdensity)
    slack = _slack(f)
    r = float(s.probe_radius)
    for u, values in zip(s.probe_directions, s.probe_values, strict=True):
        if _rises(f, values, slack) and abs(u @ info @ u) * r**2 < 1.0:
            f1, f2, f3 = values
            levels_off = bool(np.isfinite(f3) and f3 - f2 <= f2 - f1 + slack)
            return u, f"{f:.6g} at the end, {f1:.6g}, {f2:.6g}, {f3:.6g} further on", levels_off
    return None


def rises_along_a_probe(s: Search) -> bool:
    """The log density rises beyond rounding at r, 10 r and 100 r along some probed
    direction: a candidate for :func:`runaway` (which also needs the curvature there)."""
    f = float(s.logdensity)
    return any(_rises(f, values, _slack(f)) for values in s.probe_values)


def _slack(f: float) -> float:
    """Rounding at a log density of f, for the probes' comparisons."""
    return 1e3 * np.finfo(np.float64).eps * max(1.0, abs(f))


def _rises(f: float, values, slack: float) -> bool:
    f1, f2, f3 = values
    return bool(f1 > f + slack and f2 >= f1 - slack and f3 >= f2 - slack)


def _newton_decrement(gradient: np.ndarray, info: np.ndarray) -> float:
    """sqrt(gᵀ H⁻¹ g): the distance to the mode in posterior standard deviations."""
    try:
        half = np.linalg.solve(np.linalg.cholesky(info), gradient)
    except np.linalg.LinAlgError:
        return np.inf
    value = float(np.sqrt(half @ half))
    return value if np.isfinite(value) else np.inf


def signed_names(vector: np.ndarray, names: tuple[str, ...], k: int = 4) -> str:
    """The parameters with the largest |components| of a unit vector, with their signs."""
    order = np.argsort(-np.abs(vector))[:k]
    keep = [i for i in order if abs(vector[i]) >= 0.25 * abs(vector[order[0]])]
    return ", ".join(f"{names[i]} ({vector[i]:+.2f})" for i in keep)


def name_list(indices, names: tuple[str, ...], k: int = 6) -> str:
    shown = [names[i] for i in indices[:k]]
    return ", ".join(shown) + (f" and {len(indices) - k} more" if len(indices) > k else "")
