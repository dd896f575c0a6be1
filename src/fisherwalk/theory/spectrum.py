"""Random-walk Metropolis on any spectrum of A = Sᵀ H S: Craig's formula, by quadrature.

Craig's formula 2Φ(−x) = (2/π)∫₀^{π/2} exp(−x²/(2 sin²θ)) dθ (J. W. Craig 1991, "A new,
simple and exact result for calculating the probability of error for two-dimensional
signal constellations", IEEE MILCOM; recalled) turns the expectations over the weighted
chi-square Q = Σ λ_j z_j² into one smooth integral over θ (the formulas are in
:mod:`fisherwalk.theory.randomwalk`, which calls these). Equal eigenvalues are grouped.
"""

from __future__ import annotations

from functools import lru_cache
from typing import NamedTuple

import numpy as np
from numpy.polynomial.legendre import leggauss
from scipy import optimize

from ..errors import FisherwalkError, explain

__all__ = ["Groups",
           "group_spectrum",
           "craig_rule",
           "rule_for",
           "spectrum_terms",
           "criterion_value",
           "criterion_at",
           "spectrum_optimum"]


class Groups(NamedTuple):
    values: np.ndarray  # distinct eigenvalues, ascending
    counts: np.ndarray  # multiplicity of each
    inverse: np.ndarray  # input index -> group index


def group_spectrum(spectrum: np.ndarray) -> Groups:
    values, inverse, counts = np.unique(spectrum, return_inverse=True, return_counts=True)
    return Groups(values, counts.astype(float), inverse)


@lru_cache(maxsize=256)
def craig_rule(halvings: int, nodes: int = 16) -> tuple[np.ndarray, np.ndarray]:
    """Nodes s = sin²θ and weights (2/π)·dθ on [0, π/2]: Gauss–Legendre panels whose
    edges halve toward 0, so features at θ ≈ c√λ_j of every size are resolved."""
    edges = np.concatenate([[0.0], 0.5 * np.pi * 2.0 ** -np.arange(halvings, -1, -1.0)])
    x, w = leggauss(nodes)
    left, right = edges[:-1, None], edges[1:, None]
    theta = (0.5 * (right - left) * x + 0.5 * (right + left)).ravel()
    weight = (0.5 * (right - left) * w).ravel() * (2.0 / np.pi)
    s = np.sin(theta) ** 2
    s.flags.writeable = False
    weight.flags.writeable = False
    return s, weight


def rule_for(min_scale: float, dim: int, groups: Groups, refine: bool = False):
    """A Craig rule fine enough for every scale >= min_scale."""
    c_min = min_scale / (2.0 * np.sqrt(dim)) * np.sqrt(groups.values[0])
    theta_min = 0.02 * min(c_min, 1.0) if c_min > 0 else 1.0
    halvings = int(np.clip(np.ceil(np.log2(0.5 * np.pi / theta_min)), 3, 90))
    return craig_rule(halvings + 2, 24) if refine else craig_rule(halvings)


def spectrum_terms(scale: float, dim: int, groups: Groups, rule):
    """a(l), and J_g(l) per direction of each eigenvalue group, at one scale."""
    s, w = rule
    c2 = scale * scale / (4.0 * dim)
    ratio = c2 * groups.values[None, :] / s[:, None]  # (nodes, groups)
    weighted = w * np.exp(-0.5 * (np.log1p(ratio) @ groups.counts))
    acceptance = float(np.sum(weighted))
    per_group = (scale * scale / dim) * (weighted @ (groups.values / (1.0 + ratio)))
    return acceptance, per_group


def criterion_value(per_group: np.ndarray, groups: Groups, criterion: str) -> float:
    if criterion == "total":
        return float(per_group @ groups.counts)
    return float(per_group.min())


def criterion_at(scale: float, dim: int, groups: Groups, rule, criterion: str) -> float:
    """The criterion alone (the slowest direction is group 0, the smallest eigenvalue)."""
    s, w = rule
    c2 = scale * scale / (4.0 * dim)
    ratio = c2 * groups.values[None, :] / s[:, None]
    weighted = w * np.exp(-0.5 * (np.log1p(ratio) @ groups.counts))
    if criterion == "total":
        inner = (1.0 / (1.0 + ratio)) @ (groups.values * groups.counts)
    else:
        inner = groups.values[0] / (1.0 + ratio[:, 0])
    return float(scale * scale / dim * (weighted @ inner))


def spectrum_optimum(dim: int, groups: Groups, criterion: str) -> float:
    """l* for a spectrum: walk uphill in log l from 2.4/√mean(λ) in steps of 0.25 until
    the criterion falls, then bounded Brent inside the last three points.

    The criterion was unimodal in l on every spectrum checked on a dense grid (92
    spectra: log-uniform over ten decades, two clusters, one outlier; d from 2 to
    1000; both criteria); the walk assumes it.
    """
    mean = float(groups.values @ groups.counts) / dim
    step = 0.25
    rule_min = [0.1 / np.sqrt(mean)]
    rule = [rule_for(rule_min[0], dim, groups)]

    def value(log_scale: float) -> float:
        scale = float(np.exp(log_scale))
        if scale < rule_min[0]:
            rule_min[0] = 0.5 * scale
            rule[0] = rule_for(rule_min[0], dim, groups)
        return criterion_at(scale, dim, groups, rule[0], criterion)

    start = float(np.log(2.4 / np.sqrt(mean)))
    here, ahead = value(start), value(start + step)
    direction = 1.0 if ahead >= here else -1.0
    previous, best, best_value = ((start, start + step, ahead) if direction > 0
                                  else (start + step, start, here))
    for _ in range(400):  # 400 steps of 0.25 span 43 decades of l
        trial = best + direction * step
        trial_value = value(trial)
        if trial_value < best_value:
            break
        previous, best, best_value = best, trial, trial_value
    else:
        raise FisherwalkError(explain(  # pragma: no cover - not seen on any spectrum tried
            "no maximum of the expected jump was found along the scale axis.",
            "optimal_scale(spectrum=...)", "report the spectrum to the developers."))
    lo, hi = sorted((previous, trial))
    rule_min[0] = float(np.exp(lo))
    rule[0] = rule_for(rule_min[0], dim, groups)
    result = optimize.minimize_scalar(lambda x: -value(x), bounds=(lo, hi), method="bounded",
                                      options={"xatol": 1e-10})
    return float(np.exp(result.x))
