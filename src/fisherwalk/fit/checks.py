"""The eager checks of a Laplace fit, each failure explained by parameter name.

Before the search: the options, the restarts' key and the log density's structure
(traced abstractly). After it: the start (a log density or gradient that is not finite
there), the end point (finite, no runaway mode, converged, a Fisher information that is
finite and positive definite), and a Fisher information given by the user. The
convergence test and the runaway-mode test are described in
:func:`fisherwalk.fit.laplace.laplace`.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import FitError, InputError, ModelError, explain
from .search import Search

_EIGEN_FLOOR = 1e-12  # smallest eigenvalue must exceed this fraction of the largest


# ------------------------------------------------------------------ a user's Fisher matrix


def validated_matrix(matrix: Any, names: tuple[str, ...], where: str, rtol: float) -> np.ndarray:
    """The checks of :func:`fisherwalk.fit.laplace.check_fisher`; returns the symmetrised
    matrix (float64, host)."""
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
    problem = definiteness_problem(host, names)
    if problem:
        raise InputError(explain(
            f"The Fisher information is not positive definite: {problem}.",
            where, "check the formula and the point it was computed at; an unidentified "
            "parameter needs a proper prior."))
    return host


# ---------------------------------------------------------------------- before the search


def check_options(max_iterations, tol, restarts, spread) -> None:
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


def check_key(rng_key) -> jax.Array:
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
    return validated_matrix(matrix, names, "laplace(fisher=...) at the mode", 1e-6)


def check_end(s: Search) -> None:
    if not (np.isfinite(s.x).all() and np.isfinite(s.logdensity)):
        raise FitError(explain(
            f"The mode search ended at a non-finite point or log density ({s.logdensity}).",
            "laplace(): the mode search", "the log density may be unbounded (e.g. a variance "
            "shrinking to zero): add a proper prior, or start nearer the expected mode."))


def check_search(s: Search, info: np.ndarray, x0: np.ndarray, names: tuple[str, ...],
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
            f"{where}; the direction involves {_signed(direction, names)}",
            "give these parameters a proper prior; in a logistic/binary regression check "
            "for complete or quasi-complete separation (a predictor, or a combination, "
            "that splits the outcomes perfectly); a hierarchical scale whose density is "
            "unbounded near zero needs a non-centred parameterisation."))
    if not converged(s, info, tol):
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


def definiteness_problem(matrix: np.ndarray, names: tuple[str, ...]) -> str:
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


def name_list(indices, names: tuple[str, ...], k: int = 6) -> str:
    shown = [names[i] for i in indices[:k]]
    return ", ".join(shown) + (f" and {len(indices) - k} more" if len(indices) > k else "")
