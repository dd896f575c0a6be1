"""Chains started where the user says: ``start(..., chain_starts=...)``.

By default the chains start at draws of N(mode, H⁻¹). A user may instead give each chain
its own starting point: a pytree with the position's structure and a leading chains
axis. Each start is checked (structure, shapes, finite values, a finite log density) and
its distance from the mode is reported in posterior standard deviations of the Laplace
approximation: the Mahalanobis distance √((θ − mode)ᵀ H (θ − mode)) = |Lᵀ(θ − mode)|,
L Lᵀ = H (Mahalanobis 1936, "On the generalised distance in statistics", Proceedings of
the National Institute of Sciences of India 2). Under N(mode, H⁻¹) its square is χ²_d,
so a start beyond the χ²_d 99.9% quantile lies outside where the posterior puts its mass
in the Gaussian picture, and the note says so.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import numpy as np
from scipy import stats

from ..base.pytrees import ravel_batch
from ..errors import InputError, ModelError, explain

__all__ = ["checked_starts", "chosen_starts", "start_distances", "FAR_QUANTILE"]

FAR_QUANTILE = 0.999  # a start beyond this χ²_d quantile is called far from the bulk
_WHERE = "start(chain_starts=...)"


def _refuse(what: str, todo: str) -> InputError:
    return InputError(explain(what, _WHERE, todo))


def start_distances(positions: np.ndarray, mode: np.ndarray, cholesky: np.ndarray
                    ) -> np.ndarray:
    """Mahalanobis distance of each row of ``positions`` (chains, d) from ``mode`` under
    H = L Lᵀ: |Lᵀ(θ − mode)|, in posterior sds of N(mode, H⁻¹)."""
    white = (np.asarray(positions, float) - np.asarray(mode, float)) @ np.asarray(cholesky)
    return np.sqrt(np.sum(white**2, axis=-1))


def _flat_starts(chain_starts: Any, template: Any, chains: int) -> np.ndarray:
    leaves, treedef = jax.tree_util.tree_flatten(chain_starts)
    want_leaves, want_def = jax.tree_util.tree_flatten(template)
    if treedef != want_def:
        raise _refuse(f"chain_starts has the structure {treedef}, not the position's "
                      f"{want_def}.",
                      "give the position's structure (same keys) with a leading chains axis "
                      "on every leaf, e.g. {'mu': array of shape (chains,)}.")
    for index, (leaf, want) in enumerate(zip(leaves, want_leaves, strict=True)):
        shape, expected = np.shape(leaf), (chains, *np.shape(want))
        if shape != expected:
            raise _refuse(f"Leaf {index} of chain_starts has shape {shape}; with chains="
                          f"{chains} it must be {expected}.",
                          f"stack one starting value per chain on a leading axis (chains="
                          f"{chains}), or pass chains= the number of starts you give.")
        dtype = np.asarray(leaf).dtype
        if not (np.issubdtype(dtype, np.floating) or np.issubdtype(dtype, np.integer)):
            raise _refuse(f"Leaf {index} of chain_starts has dtype {dtype}.",
                          "give real numbers.")
    return ravel_batch(chain_starts, 1).astype(float)


def checked_starts(chain_starts: Any, template: Any, names: tuple[str, ...], dtype,
                   evaluate: Callable, chains: int) -> tuple[np.ndarray, np.ndarray]:
    """The user's ``chain_starts`` ravelled to ``(chains, d)`` in ``dtype`` and their log
    densities, checked (:func:`chosen_starts` raises the same errors): also the starts
    of a posterior with no mode (:mod:`fisherwalk.prepare.modeless`)."""
    flat = _flat_starts(chain_starts, template, chains)
    bad = np.argwhere(~np.isfinite(flat))
    if bad.size:
        c, j = (int(v) for v in bad[0])
        raise _refuse(f"chain_starts holds a non-finite value at chain {c}, parameter "
                      f"{names[j]} ({flat[c, j]}).", "give finite starting values.")
    positions = flat.astype(dtype)
    logdens = np.asarray(evaluate(positions))
    off = np.flatnonzero(~np.isfinite(logdens))
    if off.size:
        c = int(off[0])
        raise ModelError(explain(
            f"The log density is {logdens[c]} at the start of chain {c}.",
            f"{_WHERE}, chain {c}",
            "start every chain inside the posterior's support (where the log density is "
            "finite)."))
    return positions, logdens.astype(dtype)


def chosen_starts(chain_starts: Any, fit, evaluate: Callable, chains: int
                  ) -> tuple[np.ndarray, np.ndarray, str]:
    """The chains' starting positions ``(chains, d)`` and log densities from the user's
    ``chain_starts``, and a note giving each start's distance from the mode.

    Raises
    ------
    InputError
        Wrong structure, a leaf of the wrong shape (the leading axis must be ``chains``),
        not real numbers, or non-finite values (the chain and the parameter are named).
    ModelError
        The log density is not finite at a start (the chain is named).
    """
    positions, logdens = checked_starts(chain_starts, fit.mode, tuple(fit.names),
                                        np.asarray(fit.mode_flat).dtype, evaluate, chains)
    names = tuple(fit.names)
    distance = start_distances(positions, np.asarray(fit.mode_flat), np.asarray(fit.cholesky))
    dim = len(names)
    far_limit = float(np.sqrt(stats.chi2.ppf(FAR_QUANTILE, dim)))
    listed = ", ".join(f"chain {c} {d:.2f}" for c, d in enumerate(distance))
    note = (f"Chains start where chain_starts put them; distance from the mode in posterior "
            f"sds of N(mode, H⁻¹) (|Lᵀ(θ − mode)|): {listed}. Draws of N(mode, H⁻¹) lie "
            f"within {far_limit:.2f} with probability {FAR_QUANTILE}")
    far = np.flatnonzero(distance > far_limit)
    if far.size:
        note += (f"; chain(s) {', '.join(map(str, far))} start beyond it: refine() before "
                 "walk(), and expect a longer warm-up")
    return positions, logdens, note + "."
