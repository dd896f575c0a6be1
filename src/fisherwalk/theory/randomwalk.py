"""Optimal scale and target acceptance of random-walk Metropolis in the Gaussian limit.

The proposal is θ' = θ + (l/√d)·S z with z ~ N(0, I_d). Against the Gaussian limit
N(θ̂, H⁻¹) of the posterior, write A = Sᵀ H S with eigenvalues λ_1..λ_d (the
``spectrum``; all ones for the matched proposal S Sᵀ = H⁻¹) and Q = zᵀ A z = Σ λ_i z_i².
Given z, the acceptance probability averaged over the stationary position is
2Φ(−l√Q/(2√d)) (the computation behind Roberts, Gelman & Gilks 1997, "Weak
convergence and optimal scaling of random walk Metropolis algorithms", Ann. Appl.
Probab. 7(1), done at finite d), so

    a(l)   = E[2Φ(−l√Q/(2√d))]                              expected acceptance
    J_i(l) = (l²/d) E[λ_i z_i² 2Φ(−l√Q/(2√d))]               squared jump of direction i
    J(l)   = Σ_i J_i(l)                                       total ESJD, whitened units

J_i is measured in direction i's own posterior standard deviations: in the whitened
target x = H^{1/2}(θ − θ̂) the step, in the eigenbasis of A, has coordinates
(l/√d)·√λ_i z_i. For the matched proposal J_i = J/d for every i.

Both cases are evaluated by deterministic quadrature (no Monte Carlo, no lookup table):

* matched (``spectrum=None``): Q = R², R ~ chi_d, so a and J are one-dimensional
  integrals over the chi law, done in u = R/√d with composite Gauss–Legendre panels
  that cover the chi density down to e⁻⁴⁶ of its peak (the density has sd ≈ 1/√(2d)
  around 1 for large d). Verified against d = 1 and d = 2 closed forms, scipy's chi
  law and the second representation below to ~1e-13 for d up to 10⁶.
* any spectrum: Craig's formula 2Φ(−x) = (2/π)∫₀^{π/2} exp(−x²/(2 sin²θ)) dθ
  (J. W. Craig 1991, "A new, simple and exact result for calculating the probability
  of error for two-dimensional signal constellations", IEEE MILCOM; recalled) turns
  the expectations over the weighted chi-square Q into one smooth integral over θ,
  because E[exp(−tQ)] = Π_j (1 + 2tλ_j)^(−1/2). With s = sin²θ and c² = l²/(4d),

      a(l)   = (2/π) ∫ P(θ) dθ,                    P(θ) = Π_j (s/(s + c²λ_j))^(1/2)
      J_i(l) = (l²/d)(2/π) ∫ λ_i s/(s + c²λ_i) · P(θ) dθ

  (the factor s/(s + c²λ_i) comes from E[z² e^(−t λ z²)] = (1 + 2tλ)^(−3/2)). Equal
  eigenvalues are grouped, so a spectrum c·(1, ..., 1) is exact and cheap (it is the
  matched problem with l rescaled by 1/√c). The cost is O(number of distinct
  eigenvalues × ~300 nodes) per scale.

Because λ s/(s + c²λ) increases with λ and P(θ) > 0 is common to all directions,
J_i increases with λ_i: the slowest direction is always the one with the smallest
eigenvalue (the widest posterior direction relative to the proposal).

Optimal acceptance: ≈ 0.44 for d = 1 (Gelman, Roberts & Gilks 1996, "Efficient
Metropolis jumping rules", Bayesian Statistics 5), falling to 0.234 with l → 2.38 as
d → ∞ (Roberts, Gelman & Gilks 1997); inhomogeneous targets under an isotropic
proposal keep the 0.234 rule for large d (Roberts & Rosenthal 2001, "Optimal scaling
for various Metropolis–Hastings algorithms", Statist. Sci. 16(4)).
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any, NamedTuple

import numpy as np
from numpy.polynomial.legendre import leggauss
from scipy import optimize, special

from ..base.checks import whole_number
from ..errors import InputError, explain
from .spectrum import (
    criterion_value,
    group_spectrum,
    rule_for,
    spectrum_optimum,
    spectrum_terms,
)

__all__ = [
    "CRITERIA",
    "ScaleChoice",
    "ScaleCurve",
    "acceptance_curve",
    "expected_acceptance",
    "expected_jump",
    "is_matched",
    "optimal_scale",
]

CRITERIA = ("slowest", "total")
MATCHED_RTOL = 1e-6  # a spectrum within this of all ones is the matched proposal
_SQRT2 = float(np.sqrt(2.0))


class ScaleChoice(NamedTuple):
    """The scale that maximises the expected jump, and what it implies."""

    dim: int  # d, the number of scalar parameters
    scale: float  # l; the proposal step is (l/√d)·S z
    acceptance: float  # expected acceptance rate at l: the target acceptance
    jump_distance: float  # total ESJD per step in whitened units, J(l) = Σ_i J_i(l)
    slowest_jump: float  # min_i J_i(l), in that direction's own posterior sd units
    criterion: str  # "slowest" (maximise min_i J_i) or "total" (maximise J)
    efficiency: float  # criterion at l over the matched proposal's, same d and criterion
    error: float  # numerical error estimate of acceptance and criterion (quadrature)
    direction_speed: np.ndarray | None  # J_i / (J*_matched/d), input order; None if matched


class ScaleCurve(NamedTuple):
    """Predicted acceptance and jumps over an array of scales (same shape as the scales)."""

    acceptance: np.ndarray  # a(l)
    jump_distance: np.ndarray  # J(l), total ESJD in whitened units
    slowest_jump: np.ndarray  # min_i J_i(l)


# ----------------------------------------------------------------------------- inputs


def _check_dim(dim: Any) -> int:
    return whole_number(dim, "dim", "dim (the number of scalar parameters)",
                        todo="pass the number of scalar parameters, an integer >= 1.")


def _check_spectrum(spectrum: Any, dim: int) -> np.ndarray | None:
    if spectrum is None:
        return None
    where = "spectrum (eigenvalues of A = Sᵀ H S)"
    try:
        values = np.asarray(spectrum, dtype=float)
    except (TypeError, ValueError):
        raise InputError(explain("the spectrum is not an array of numbers.", where,
                                 f"pass {dim} positive eigenvalues.")) from None
    if values.ndim != 1 or values.shape[0] != dim:
        raise InputError(explain(
            f"the spectrum has shape {values.shape}, expected ({dim},) for dim={dim}.", where,
            "pass one eigenvalue of A per parameter (a flat vector of length dim)."))
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        i = int(bad[0])
        raise InputError(explain(f"spectrum[{i}] = {values[i]} is not finite.",
                                 f"{where}, index {i}",
                                 "check the Fisher information and the proposal shape for "
                                 "NaN or infinite entries."))
    bad = np.flatnonzero(values <= 0.0)
    if bad.size:
        i = int(bad[0])
        raise InputError(explain(f"spectrum[{i}] = {values[i]} is not positive.",
                                 f"{where}, index {i}",
                                 "A = Sᵀ H S must be positive definite: check that the Fisher "
                                 "information is positive definite and the shape has full rank."))
    return values


def _check_scales(scale: Any) -> np.ndarray:
    where = "scale l"
    try:
        scales = np.asarray(scale, dtype=float)
    except (TypeError, ValueError):
        raise InputError(explain(f"scale={scale!r} is not a number or array of numbers.", where,
                                 "pass l >= 0 (a float or an array).")) from None
    bad = np.flatnonzero(~(np.isfinite(scales) & (scales >= 0.0)).ravel())
    if bad.size:
        i = int(bad[0])
        raise InputError(explain(f"scale entry {i} = {scales.ravel()[i]} is not a finite l >= 0.",
                                 f"{where}, flat index {i}", "pass finite, non-negative scales."))
    return scales


def _check_criterion(criterion: Any) -> str:
    if criterion not in CRITERIA:
        raise InputError(explain(f"criterion={criterion!r} is not known.",
                                 "optimal_scale(criterion=...)",
                                 f"use one of {', '.join(map(repr, CRITERIA))}."))
    return criterion


# ------------------------------------------------------------- matched: the chi law


def _accept_factor(x: np.ndarray) -> np.ndarray:
    """2Φ(−x/2)."""
    return special.erfc(x / (2.0 * _SQRT2))


@lru_cache(maxsize=512)
def _chi_rule(dim: int, panels: int = 8, nodes: int = 24) -> tuple[np.ndarray, np.ndarray]:
    """Nodes u and normalised weights for expectations over u = R/√d, R ~ chi_d."""
    d = dim
    mode = 0.0 if d == 1 else float(np.sqrt((d - 1) / d))

    def log_rel(u):  # log density relative to its peak
        if d == 1:
            return -0.5 * u * u
        gap = (u - mode) / mode  # log1p keeps the digits near the peak for large d
        near = np.log1p(np.clip(gap, -0.5, 0.5))
        log_ratio = np.where(np.abs(gap) < 0.5, near, np.log(np.maximum(u, 1e-300) / mode))
        return (d - 1) * log_ratio - 0.5 * d * (u - mode) * (u + mode)

    floor = -46.0  # e^-46 ≈ 1e-20 of the peak
    hi = optimize.brentq(lambda u: log_rel(u) - floor, mode + 1e-12, mode + 20.0, xtol=1e-12)
    lo = 0.0
    if d > 1 and log_rel(1e-300) < floor:  # solve on log u: the edge may be ~1e-20
        lo = float(np.exp(optimize.brentq(lambda t: log_rel(np.exp(t)) - floor,
                                          np.log(1e-300), np.log(mode), xtol=1e-12)))
    x, w = leggauss(nodes)
    edges = np.linspace(lo, hi, panels + 1)
    left, right = edges[:-1, None], edges[1:, None]
    u = (0.5 * (right - left) * x + 0.5 * (right + left)).ravel()
    weight = (0.5 * (right - left) * w).ravel() * np.exp(log_rel(u))
    weight /= weight.sum()
    u.flags.writeable = False
    weight.flags.writeable = False
    return u, weight


def _matched_terms(scales: np.ndarray, rule) -> tuple[np.ndarray, np.ndarray]:
    """a(l) and J(l) for the matched proposal, vectorised over scales."""
    u, w = rule
    lu = scales[..., None] * u
    factor = _accept_factor(lu)
    acceptance = factor @ w
    jump = scales**2 * (factor @ (w * u * u))
    return acceptance, jump


def _matched_slope(scale: float, rule) -> float:
    """dJ/dl = E[u²(2l·2Φ(−lu/2) − l²u φ(lu/2))]."""
    u, w = rule
    lu = scale * u
    density = np.exp(-0.125 * lu * lu) / np.sqrt(2.0 * np.pi)
    return float(np.sum(w * u * u * (2.0 * scale * _accept_factor(lu) - scale * lu * density)))


@lru_cache(maxsize=1024)
def _matched_optimum(dim: int) -> tuple[float, float, float, float]:
    """(l*, a*, J*, error) for the matched proposal in dimension ``dim``.

    The maximum of J is flat, so a search on J's values would resolve l only to
    ~√eps; the root of the analytic dJ/dl (bracketed in [1.5, 3.5], which contains
    l*(d) ∈ (2.381, 2.427) for every d) gives l to ~1e-14.
    """
    rule = _chi_rule(dim)
    scale = optimize.brentq(_matched_slope, 1.5, 3.5, args=(rule,), xtol=1e-14)
    acceptance, jump = _matched_terms(np.asarray(scale), rule)
    fine_a, fine_j = _matched_terms(np.asarray(scale), _chi_rule(dim, 16, 32))
    error = max(abs(fine_a - acceptance), abs(fine_j - jump))
    return float(scale), float(acceptance), float(jump), float(error)


# ----------------------------------------------------------------------------- public


def is_matched(spectrum: Any) -> bool:
    """Whether a spectrum of A = Sᵀ H S is all ones within :data:`MATCHED_RTOL`: the
    proposal matches the precision, and the exact chi-law computation applies."""
    return bool(np.allclose(np.asarray(spectrum, dtype=float), 1.0, rtol=MATCHED_RTOL, atol=0.0))


def optimal_scale(dim: int, spectrum: Any = None, *, criterion: str = "slowest") -> ScaleChoice:
    """The scale l maximising the expected jump, and the acceptance rate to aim for.

    Parameters
    ----------
    dim
        Number of scalar parameters d (an integer >= 1).
    spectrum
        Eigenvalues of A = Sᵀ H S (length d, finite, > 0), or None for the matched
        proposal S Sᵀ = H⁻¹ (A = I). The order is kept in ``direction_speed``.
    criterion
        ``"slowest"`` maximises min_i J_i (the slowest direction governs the minimum
        ESS; it is the direction of the smallest eigenvalue), ``"total"`` maximises
        J = Σ_i J_i. The two coincide for the matched proposal.

    Returns
    -------
    ScaleChoice
        ``efficiency`` is the criterion at l* over the matched proposal's criterion at
        its own optimum, for the same d (slowest: J_min / (J*_matched/d); total:
        J / J*_matched). ``direction_speed`` is J_i / (J*_matched/d) in input order
        (None when ``spectrum`` is None). ``error`` estimates the quadrature error of
        the acceptance and of the criterion (re-evaluation with a finer rule); the
        optimiser locates l* to ~1e-14 (matched) or ~1e-8 relative (spectrum).

    Notes
    -----
    Matched: l*(d) falls from 2.4264 (d = 1, acceptance 0.4389; Gelman, Roberts &
    Gilks 1996 quote 0.44) to 2.3812 (acceptance 0.2338) as d → ∞ (Roberts, Gelman &
    Gilks 1997), both monotonically, with l*(d) ≈ 2.381202 + 0.1245/d and
    a*(d) ≈ 0.233810 + 0.2582/d for large d. For a spectrum with many directions the
    total criterion again aims at 0.234 (Roberts & Rosenthal 2001), while direction
    i moves at about λ_i/mean(λ) of its matched speed; the slowest criterion aims
    lower. The matched result is cached per d (a few ms the first time).
    """
    d = _check_dim(dim)
    values = _check_spectrum(spectrum, d)
    criterion = _check_criterion(criterion)
    m_scale, m_accept, m_jump, m_error = _matched_optimum(d)
    if values is None:
        return ScaleChoice(d, m_scale, m_accept, m_jump, m_jump / d, criterion, 1.0, m_error,
                           None)
    groups = group_spectrum(values)
    scale = spectrum_optimum(d, groups, criterion)
    rule = rule_for(scale, d, groups)
    acceptance, per_group = spectrum_terms(scale, d, groups, rule)
    fine_acceptance, fine_group = spectrum_terms(scale, d, groups,
                                                  rule_for(scale, d, groups, refine=True))
    value = criterion_value(per_group, groups, criterion)
    error = max(abs(fine_acceptance - acceptance),
                abs(criterion_value(fine_group, groups, criterion) - value), m_error)
    reference = m_jump if criterion == "total" else m_jump / d
    return ScaleChoice(
        dim=d,
        scale=scale,
        acceptance=acceptance,
        jump_distance=float(per_group @ groups.counts),
        slowest_jump=float(per_group.min()),
        criterion=criterion,
        efficiency=value / reference,
        error=float(error),
        direction_speed=per_group[groups.inverse] / (m_jump / d),
    )


def acceptance_curve(scales: Any, dim: int, spectrum: Any = None) -> ScaleCurve:
    """Predicted acceptance, total ESJD and slowest-direction ESJD at each scale.

    Vectorised over ``scales`` (any shape; e.g. ~200 scales for a plot). Same
    formulas and quadratures as :func:`optimal_scale`; matched when ``spectrum`` is
    None. Cost per scale: ~200 nodes (matched) or ~300 nodes × distinct eigenvalues.
    """
    d = _check_dim(dim)
    values = _check_spectrum(spectrum, d)
    grid = _check_scales(scales)
    if values is None:
        acceptance, jump = _matched_terms(grid, _chi_rule(d))
        return ScaleCurve(acceptance, jump, jump / d)
    groups = group_spectrum(values)
    positive = grid[grid > 0]
    rule = rule_for(float(positive.min()) if positive.size else 0.0, d, groups)
    acceptance = np.empty(grid.shape)
    jump = np.empty(grid.shape)
    slowest = np.empty(grid.shape)
    for index, scale in np.ndenumerate(grid):
        acceptance[index], per_group = spectrum_terms(float(scale), d, groups, rule)
        jump[index] = per_group @ groups.counts
        slowest[index] = per_group.min()
    return ScaleCurve(acceptance, jump, slowest)


def _as_output(values: np.ndarray, scalar: bool):
    return float(values) if scalar else values


def expected_acceptance(scale: Any, dim: int, spectrum: Any = None) -> float | np.ndarray:
    """Expected acceptance a(l) = E[2Φ(−l√Q/(2√d))] at a scale or an array of scales.

    Returns a float for a scalar ``scale``, else an array of the same shape.
    See the module docstring for the formula (Roberts, Gelman & Gilks 1997).
    """
    grid = _check_scales(scale)
    return _as_output(acceptance_curve(grid, dim, spectrum).acceptance, grid.ndim == 0)


def expected_jump(scale: Any, dim: int, spectrum: Any = None, *,
                  per_direction: bool = False) -> float | np.ndarray:
    """Expected squared jump distance per step at a scale or an array of scales.

    Returns the total J(l) in whitened units (a float for a scalar ``scale``, else an
    array of the same shape). With ``per_direction=True`` returns J_i(l), each in
    direction i's own posterior sd units, with shape ``np.shape(scale) + (d,)``,
    directions in the order of ``spectrum`` (all equal to J/d when matched).
    """
    d = _check_dim(dim)
    values = _check_spectrum(spectrum, d)
    grid = _check_scales(scale)
    if not per_direction:
        return _as_output(acceptance_curve(grid, d, values).jump_distance, grid.ndim == 0)
    if values is None:
        jump = _matched_terms(grid, _chi_rule(d))[1]
        return np.repeat((jump / d)[..., None], d, axis=-1)
    groups = group_spectrum(values)
    positive = grid[grid > 0]
    rule = rule_for(float(positive.min()) if positive.size else 0.0, d, groups)
    out = np.empty(grid.shape + (d,))
    for index, scale_value in np.ndenumerate(grid):
        out[index] = spectrum_terms(float(scale_value), d, groups, rule)[1][groups.inverse]
    return out
