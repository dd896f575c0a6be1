"""Label switching, probed at the mode: is the posterior symmetric under swapping labels?

An exchangeable mixture's posterior is invariant under permuting the components' labels
(Stephens 2000, "Dealing with label switching in mixture models", JRSS B 62(4); Jasra,
Holmes & Stephens 2005, "Markov chain Monte Carlo methods and the label switching
problem in Bayesian mixture modeling", Statistical Science 20(1)): every mode has K! − 1
mirror images, far apart, and chains started near one of them describe one labelling.
fisherwalk's scouts (15 posterior sd from the mode) do not reach a mirror 40 sd away, so
the symmetry is probed directly and cheaply: the log density at the mode with labels
swapped, in one batched evaluation.

Swaps tried (at most :data:`MAX_PROBES`): entries 0 and 1 along the first axis of each
leaf with a first axis of length >= 2; the same swap in every leaf sharing that first
length at once (a mixture's means, scales and weights permute together); two leaves of
equal shape exchanged. A swap counts when it moves the point more than :data:`FAR`
posterior sd (in the Laplace metric, so a swap of two equal values does not count) and
leaves the log density equal within rounding (:data:`ROUNDING` x eps x max(1, |log π|));
the thresholds are our choice (common practice, no published source).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import numpy as np

from ..base.pytrees import path_parts

__all__ = ["Symmetry", "probe_symmetry", "label_swaps", "symmetry_warning", "MAX_PROBES",
           "FAR", "ROUNDING"]

MAX_PROBES = 64
FAR = 3.0  # posterior sd the swapped point must be from the mode
ROUNDING = 1e3  # log densities equal within this many machine epsilons (relative)


class Symmetry(NamedTuple):
    """A label swap that leaves the log density unchanged at the mode."""

    description: str  # which labels were swapped
    permutation: np.ndarray  # (d,) flat index permutation
    distance: float  # how far the swapped point is from the mode, in posterior sd
    difference: float  # |log π(swapped) − log π(mode)|


def _leaves(mode: Any) -> list[tuple[str, tuple[int, ...], int]]:
    """(name, shape, flat offset) of each leaf, in ravel order."""
    out, offset = [], 0
    for path, leaf in jax.tree_util.tree_flatten_with_path(mode)[0]:
        shape = tuple(np.shape(leaf))
        name = ""
        for part in path_parts(path):
            name += part if part.startswith("[") or not name else "." + part
        name = name or "x"
        out.append((name, shape, offset))
        offset += int(np.prod(shape, dtype=int))
    return out


def _swap_first_axis(perm: np.ndarray, shape, offset) -> None:
    size = int(np.prod(shape, dtype=int))
    idx = np.arange(size).reshape(shape)
    swapped = idx.copy()
    swapped[0], swapped[1] = idx[1], idx[0]
    perm[offset:offset + size] = offset + swapped.reshape(-1)


def label_swaps(mode: Any) -> list[tuple[str, np.ndarray]]:
    """The candidate swaps (description, flat permutation), see the module docstring."""
    leaves = _leaves(mode)
    d = sum(int(np.prod(s, dtype=int)) for _, s, _ in leaves)
    swaps: list[tuple[str, np.ndarray]] = []
    by_length: dict[int, list[tuple[str, tuple[int, ...], int]]] = {}
    for name, shape, offset in leaves:
        if len(shape) >= 1 and shape[0] >= 2:
            perm = np.arange(d)
            _swap_first_axis(perm, shape, offset)
            swaps.append((f"{name}[0] <-> {name}[1]", perm))
            by_length.setdefault(shape[0], []).append((name, shape, offset))
    for length, group in by_length.items():
        if len(group) > 1:
            perm = np.arange(d)
            for _, shape, offset in group:
                _swap_first_axis(perm, shape, offset)
            names = ", ".join(n for n, _, _ in group)
            swaps.append((f"labels 0 <-> 1 of {names} together (first axis {length})", perm))
    for a in range(len(leaves)):
        for b in range(a + 1, len(leaves)):
            (na, sa, oa), (nb, sb, ob) = leaves[a], leaves[b]
            if sa == sb:
                size = int(np.prod(sa, dtype=int))
                perm = np.arange(d)
                perm[oa:oa + size] = np.arange(ob, ob + size)
                perm[ob:ob + size] = np.arange(oa, oa + size)
                swaps.append((f"{na} <-> {nb}", perm))
    return swaps[:MAX_PROBES]


def probe_symmetry(evaluate: Callable, mode: Any, mode_flat, logdensity: float,
                   cholesky) -> list[Symmetry]:
    """Swaps of labels under which the log density at the mode is unchanged.

    ``evaluate`` is the batched log density on ravelled points ((m, d) -> (m,)),
    ``cholesky`` the lower L with L Lᵀ = H (the Laplace precision) for the distance.
    """
    swaps = label_swaps(mode)
    if not swaps:
        return []
    x = np.asarray(mode_flat)
    points = np.stack([x[perm] for _, perm in swaps])
    values = np.asarray(evaluate(points), np.float64)
    chol = np.asarray(cholesky, np.float64)
    slack = ROUNDING * np.finfo(x.dtype).eps * max(1.0, abs(float(logdensity)))
    found = []
    for (description, perm), point, value in zip(swaps, points, values, strict=True):
        distance = float(np.linalg.norm(chol.T @ (point - x)))
        difference = abs(float(value) - float(logdensity))
        if distance > FAR and np.isfinite(value) and difference <= slack:
            found.append(Symmetry(description, perm, distance, difference))
    return found


def symmetry_warning(found: list[Symmetry]) -> str:
    """The warning: the posterior is symmetric, the draws describe one labelling."""
    listed = "; ".join(f"{s.description} ({s.distance:.0f} posterior sd away)"
                       for s in found[:3])
    return ("Label switching: the log density at the mode is unchanged (within rounding) "
            f"when labels are swapped: {listed}. The posterior is symmetric under these "
            "swaps, so it has mirror-image modes the chains do not visit, and the draws "
            "describe one labelling. Summaries of label-free quantities are fine; for "
            "per-label ones, order the labels (e.g. an ordered transform of the means) "
            "or relabel the draws (Stephens 2000, JRSS B 62(4)).")
