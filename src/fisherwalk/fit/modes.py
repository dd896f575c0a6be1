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
from ..errors import InputError, explain
from .checks import converged, information, name_list, runaway
from .search import Search

_SAME_MODE_SD = 3.0  # restarts closer than this many posterior sd are the same mode


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
