"""Restarts of the mode search: dispersed starting points and the distinct modes found.

Restarts start from N(mode, spread² H⁻¹) around the first mode found, or uniformly in
a box; each converged restart either joins a mode already found (closer than 3 posterior
standard deviations in the H metric of either) or is another mode. The notes returned
tell the user about other modes, a higher mode, and restarts that failed.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from jax.flatten_util import ravel_pytree
from jax.scipy.linalg import solve_triangular

from ..base.checks import definiteness_problem
from ..base.keys import normals, stream
from ..errors import InputError, explain
from .checks import converged, information, name_list, runaway
from .search import Search

_SAME_MODE_SD = 3.0  # restarts closer than this many posterior sd are the same mode
SCOUT_SPREAD = 15.0  # scouts start c = 15 posterior sd from the first mode (c >> 3)
SCOUTS = 8  # start()'s default number of scouts (4 antithetic pairs)


def scout_points(key, mode: np.ndarray, info: np.ndarray, scouts: int, spread: float,
                 dtype) -> np.ndarray:
    """(scouts, d) over-dispersed starting points in antithetic pairs mode ± c S z.

    S Sᵀ = H⁻¹ and z ~ N(0, I) from the run's host generator (no JAX compilation). A pair
    puts points on both sides of the mode in every direction, so a second mode on
    either side is reached from one of them whenever |c z_i| exceeds its distance.
    """
    d = mode.size
    pairs = -(-scouts // 2)
    z = normals(stream(key, 7), (pairs, d), np.float64)
    cholesky = np.linalg.cholesky(np.asarray(info, np.float64))
    steps = spread * np.linalg.solve(cholesky.T, z.T).T  # (pairs, d) ~ N(0, c² H⁻¹)
    points = np.empty((2 * pairs, d))
    points[0::2] = mode + steps
    points[1::2] = mode - steps
    return points[:scouts].astype(dtype)


def laplace_masses(logdensity, fishers) -> np.ndarray:
    """Relative Laplace masses of modes: exp(log π(m) + ½ log det H⁻¹) normalised
    (the Laplace approximation of each mode's integral, Tierney & Kadane 1986, JASA 81;
    the (2π)^{d/2} is common to all and cancels)."""
    logs = np.array([float(f) - 0.5 * np.linalg.slogdet(np.asarray(h, np.float64))[1]
                     for f, h in zip(logdensity, fishers, strict=True)])
    logs -= logs.max()
    mass = np.exp(logs)
    return mass / mass.sum()


def label_switching(points, logdensity, names, rtol: float = 1e-6) -> list[tuple[int, int, str]]:
    """Pairs of modes with the same log density whose values are a permutation of each
    other's: (i, j, "x[0] <-> x[1], ...") for each pair."""
    out = []
    points = [np.asarray(p, np.float64) for p in points]
    for i in range(len(points)):
        for j in range(i + 1, len(points)):
            a, b = points[i], points[j]
            same = abs(logdensity[i] - logdensity[j]) <= rtol * max(1.0, abs(logdensity[i]))
            scale = rtol * max(1.0, float(np.abs(a).max()))
            if not same or np.allclose(a, b, atol=1e3 * scale, rtol=0):
                continue
            if not np.allclose(np.sort(a), np.sort(b), atol=1e3 * scale, rtol=0):
                continue
            moved = [k for k in range(a.size) if abs(a[k] - b[k]) > 1e3 * scale]
            pairs = []
            for k in moved:  # where does b take a[k] from?
                partner = next((m for m in moved if m != k and abs(b[m] - a[k]) <= 1e3 * scale),
                               None)
                if partner is not None and k < partner:
                    pairs.append(f"{names[k]} <-> {names[partner]}")
            out.append((i, j, ", ".join(pairs) or "values permuted"))
    return out


def describe_modes(points, logdensity, fishers, names, *, limit: int = 6) -> str:
    """A plain account of the distinct modes: where, how high, how much Laplace mass,
    and which pairs are label switches."""
    mass = laplace_masses(logdensity, fishers)
    parts = []
    for k, (point, height) in enumerate(zip(points, logdensity, strict=True)):
        if k == limit:
            parts.append(f"... and {len(points) - limit} more")
            break
        values = ", ".join(f"{names[i]} {float(point[i]):.3g}"
                           for i in range(min(len(names), 4)))
        if len(names) > 4:
            values += ", ..."
        parts.append(f"mode {k + 1} at ({values}): log density {float(height):.6g}, "
                     f"Laplace mass {mass[k]:.3f}")
    text = (f"{len(points)} distinct modes found, so a single Laplace approximation does not "
            "describe the posterior: " + "; ".join(parts) + ".")
    switches = label_switching(points, logdensity, names)
    if switches:
        text += " " + "; ".join(
            f"modes {i + 1} and {j + 1} are a label-switching pair (same log density, "
            f"parameters permuted: {how})" for i, j, how in switches[:limit]) + "."
    return text


def restart_points(key, mode: np.ndarray, info: np.ndarray, restarts: int, spread: float,
                    bounds: tuple[np.ndarray, np.ndarray] | None, dtype) -> jax.Array:
    """(restarts, d) starting points: N(mode, spread² H⁻¹), or uniform in the bounds."""
    if bounds is None:
        z = jax.random.normal(key, (restarts, mode.size), dtype)
        cholesky = jnp.asarray(np.linalg.cholesky(info), dtype)
        return mode + spread * solve_triangular(cholesky.T, z.T, lower=False).T
    lower, upper = (jnp.asarray(side, dtype) for side in bounds)
    return jax.random.uniform(key, (restarts, mode.size), dtype, lower, upper)


def check_box(box: Any, names: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray]:
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
            f"give the bounds in the parameter order {name_list(range(d), names)}.")) from err
    lower, upper = sides
    if not (np.isfinite(lower).all() and np.isfinite(upper).all() and (lower < upper).all()):
        bad = np.flatnonzero(~(np.isfinite(lower) & np.isfinite(upper) & (lower < upper)))
        raise InputError(explain(
            "box needs finite bounds with lower < upper.",
            f"laplace(box=...), parameters {name_list(bad, names)}", "fix these bounds."))
    return lower, upper


def collect_modes(modes: list, batch: Search, fisher: Any, unravel: Callable,
                   names: tuple[str, ...], tol: float, *,
                   report_failures: bool = True) -> tuple[list, list[str]]:
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
            info = information(s, fisher, unravel, names)
        except InputError:
            failed["invalid Fisher information"] += 1
            continue
        if runaway(s, info) is not None:
            failed["runaway"] += 1
            continue
        if not converged(s, info, tol):
            failed["not converged"] += 1
            continue
        if fisher is None and definiteness_problem(info, names):
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
            f"{len(modes)} distinct modes found with {restarts} searches from other starting "
            f"points (log densities {heights}): a single Laplace approximation does not "
            "describe the posterior; a random walk rarely crosses between modes.")
    best = modes[0][0]
    if best is not main:
        notes.append(
            f"A restart reached a higher mode (log density {float(best.logdensity):.6g} > "
            f"{float(main.logdensity):.6g} from the given position); the fit uses it.")
    bad = sum(failed.values())
    if bad and report_failures:
        kinds = ", ".join(f"{kind}: {n}" for kind, n in failed.items() if n)
        notes.append(f"{bad} of {restarts} restarts did not end at a local mode ({kinds}); "
                     "they are left out of `modes`.")
    return modes, notes
