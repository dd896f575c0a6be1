"""Chain starts drawn from the Laplace approximation, its PSIS check, and modes to spread over.

start() draws :data:`LAPLACE_DRAWS` points from N(mode, H⁻¹): the chains start at the first
with a finite log density, and all of them give the Pareto-smoothed importance-sampling
check of the approximation (PSIS k̂); a high k̂ resamples the starts
(:mod:`fisherwalk.prepare.resample`). With several modes found, chains are spread over them.
"""

from __future__ import annotations

import numpy as np

from ..base.keys import normals, stream
from ..engine import proposal
from ..fit.laplace import LaplaceFit
from ..fit.modes import laplace_masses
from ..results.diagnostics import khat_threshold, pareto_khat
from ..tuned.walker import LaplaceCheck
from .resample import resample_starts

__all__ = ["LAPLACE_DRAWS", "laplace_sample", "padded", "spread_over_modes"]

LAPLACE_DRAWS = 500  # draws of N(mode, H⁻¹): chains start at some; all feed PSIS k̂


def padded(evaluate, rows: int):
    """``evaluate`` on fewer points, padded to the ``rows`` it was compiled for (no new
    compilation for a handful of probes)."""

    def padded(points):
        points = np.asarray(points)
        m = points.shape[0]
        full = np.concatenate([points, np.repeat(points[:1], max(rows - m, 0), axis=0)])
        return np.asarray(evaluate(full))[:m]

    return padded


def laplace_sample(evaluate, fit: LaplaceFit, key, chains: int):
    """Draw from N(mode, H⁻¹); chains start at the first draws with a finite log density.

    The same draws give the Pareto-smoothed importance-sampling check of the Laplace
    approximation (Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed
    importance sampling", JMLR 25(72)): log weights log π(θ) − log q(θ).
    """
    mode = np.asarray(fit.mode_flat)
    fisher_shape = proposal.shape_from_cholesky(fit.cholesky).astype(mode.dtype)
    size = max(LAPLACE_DRAWS, chains)
    z = normals(stream(key, 3), (size, mode.shape[0]), mode.dtype)
    draws = mode + z @ fisher_shape.T
    logp = np.asarray(evaluate(draws))
    finite = np.isfinite(logp)
    logq = -0.5 * np.sum(z**2, axis=1)
    khat = float(pareto_khat((logp - logq)[finite])) if finite.sum() > 10 else float("inf")
    check = LaplaceCheck(khat, float(khat_threshold(size)), size, int((~finite).sum()))
    notes: list[str] = []
    good = np.flatnonzero(finite)[:chains]
    positions = np.repeat(mode[None], chains, axis=0)
    logdens = np.full(chains, fit.logdensity, dtype=positions.dtype)
    positions[: len(good)] = draws[good]
    logdens[: len(good)] = logp[good]
    if check.outside_support:
        notes.append(
            f"{check.outside_support} of {size} draws from the Laplace approximation fell "
            "where the log density is not finite (outside the support?); chains start at "
            "finite ones."
        )
    if len(good) < chains:
        notes.append(
            f"Chains {', '.join(map(str, range(len(good), chains)))} start at the mode: too "
            "few Laplace draws had a finite log density."
        )
    if khat > check.threshold:
        notes.append(
            f"PSIS k̂ = {khat:.2f} exceeds {check.threshold:.2f}: the Laplace approximation "
            "misses the posterior's tails (refine() will check the shape and may re-estimate it)."
        )
        if finite.sum() >= 2 * chains:  # better starts from the same draws (prepare/resample.py)
            sd = np.sqrt(np.sum(fisher_shape**2, axis=1))
            moved = resample_starts(draws[finite], (logp - logq)[finite], positions,
                                    stream(key, 4), sd, fit.names)
            positions = moved.positions.astype(positions.dtype)
            logdens = logp[finite][moved.indices].astype(logdens.dtype)
            notes.append(moved.note)
    return positions, logdens, check, notes


def spread_over_modes(evaluate, fit: LaplaceFit, positions, logdens):
    """Move chains to the other modes, round robin in order of Laplace mass.

    Chain c keeps its standard-normal draw z: it starts at m_k + S_k z (S_k S_kᵀ = H_k⁻¹)
    for its mode k; chains of the first mode do not move (so a one-mode run is unchanged).
    """
    mass = laplace_masses([h for _, h in fit.modes], fit.modes_fisher)
    order = np.argsort(-mass, kind="stable")
    chains = positions.shape[0]
    main = np.asarray(fit.mode_flat, np.float64)
    main_shape = proposal.shape_from_cholesky(np.linalg.cholesky(
        np.asarray(fit.modes_fisher[0], np.float64)))
    z = np.linalg.solve(main_shape, (positions - main).T).T
    assigned = [int(order[c % len(order)]) for c in range(chains)]
    moved = positions.copy()
    for c, k in enumerate(assigned):
        if k == 0:
            continue
        shape_k = proposal.shape_from_cholesky(np.linalg.cholesky(
            np.asarray(fit.modes_fisher[k], np.float64)))
        moved[c] = np.asarray(fit.modes_flat[k], np.float64) + shape_k @ z[c]
    logp = np.asarray(evaluate(moved))
    for c, k in enumerate(assigned):  # a draw outside the support: start at the mode
        if k != 0 and not np.isfinite(logp[c]):
            moved[c] = fit.modes_flat[k]
    logp = np.where(np.isfinite(logp), logp, np.asarray(evaluate(moved)))
    note = ("Chains start spread across the modes so that R-hat can see them: "
            + ", ".join(f"chain {c} at mode {k + 1}" for c, k in enumerate(assigned)) + ".")
    return moved.astype(positions.dtype), logp.astype(logdens.dtype), note
