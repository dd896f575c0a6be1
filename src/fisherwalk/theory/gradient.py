"""Step size and target acceptance of MALA, HMC and NUTS in the Gaussian limit.

The samplers run on the whitened target (θ = mode + L⁻ᵀ z with L Lᵀ = H, or equivalently
with inverse mass matrix H⁻¹), which in the large-sample limit is N(0, I_d). On N(0, I_d)
one step of MALA and one HMC trajectory are linear maps of the current state and the fresh
noise, so everything below is exact at every finite d (no Monte Carlo, no lookup table).

**Reduction.** Per coordinate the state and the noise form w_i = (x_i, z_i) ~ N(0, I_2),
the proposal is x'_i = v_1 x_i + v_2 z_i, and the log of 1/(acceptance ratio) is
ΔE = Σ_i w_iᵀ G w_i with a 2×2 symmetric G (the same for every i) of determinant ≤ 0.
Rotating every w_i into the eigenbasis of G gives ΔE = α A − β B with α, β ≥ 0 and
A, B ~ χ²_d independent, and the acceptance min(1, e^(−ΔE)) depends on (A, B) only.
Given (A, B), the rotated coordinates are uniform on spheres, so the moments of the jump
x'_i − x_i and of x'_i² − x_i² reduce to E[A^j B^k min(1, e^(−ΔE))], j + k ≤ 2. The
inner expectation over B is closed-form (regularised incomplete gamma functions: on
B ≥ αA/β the acceptance is 1, below it e^(βB) tilts χ²_d into a gamma law of scale
2/(1 − 2β), with 1 − 2β = r > 0), and the outer one over A is Gauss–Legendre on the chi
law (panels over ±9 sd of √A). Against a rule with 4× the nodes the moments agree to
4e-13 for d ≤ 10⁴, 1e-11 at d = 10⁶ and 5e-9 at d = 10⁸; one evaluation takes < 1 ms.

* **MALA** (Roberts & Tweedie 1996, "Exponential convergence of Langevin distributions
  and their discrete approximations", Bernoulli 2(4); recalled): y = (1 − h/2) x + √h ξ, so
  v = (1 − h/2, √h). The log ratio reduces to −(h/8)(|y|² − |x|²), i.e.
  G = (h/8)·[[c² − 1, c√h], [c√h, h]] with c = 1 − h/2. Scale h = l² d^(−1/3).
  BlackJAX's ``mala(logdensity_fn, step_size)`` moves by ``step_size·∇log π +
  √(2·step_size)·ξ`` (blackjax 1.7.1, mcmc/diffusions.py), so **step_size = h/2**.
* **HMC** (leapfrog, identity mass, step ε, n steps; Neal 2011, "MCMC using Hamiltonian
  dynamics", Handbook of Markov Chain Monte Carlo, ch. 5; recalled): the n-step map is P = Mⁿ with
  M = [[1 − ε²/2, ε], [−ε(1 − ε²/4), 1 − ε²/2]]; with c₀ = 1 − ε²/2,
  Mⁿ = [[T_n(c₀), εU_{n−1}(c₀)], [−ε(1 − ε²/4)U_{n−1}(c₀), T_n(c₀)]] (Chebyshev
  polynomials, valid for any ε > 0, stable for ε < 2). ΔE = ΔH, G = (PᵀP − I)/2 and,
  with γ = ε³U_{n−1}(c₀)/4 and σ = |γ|/2 + √(1 + γ²/4): α = |γ|σ/2, β = |γ|/(2σ),
  r = 1/σ². Step ε = l d^(−1/4); BlackJAX's ``step_size`` is ε.

**Criterion.** In the stationary chain the lag-1 autocorrelations of x_i and of x_i² are
exactly ρ₁ = 1 − J/2 and ρ₂ = 1 − J₂/4, with J = E[(x'_i − x_i)²] (the expected squared
jump per coordinate) and J₂ = E[(x'_i² − x_i²)²]. MALA's l* maximises J (Roberts &
Rosenthal 1998, "Optimal scaling of discrete approximations to Langevin diffusions",
JRSS B 60(1): a* → 0.574, l* → 1.650 as d → ∞). HMC's l* maximises the decorrelation per
gradient min(1 − ρ₁, 1 − ρ₂)/E[n]: J alone rewards the exact Gaussian's periodic
antithetic moves (ε = √2, n = 2 maps x to −x with no energy error, which does not move
x² at all), the minimum does not. As d → ∞ the acceptance for integration time t tends
to 2Φ(−l²|sin t|/8) and the criterion to l·E_t[sin²t · 2Φ(−l²|sin t|/8)]/E[t], the
acceptance-per-cost criterion of Beskos, Pillai, Roberts, Sanz-Serna & Stuart 2013,
"Optimal tuning of the hybrid Monte Carlo algorithm", Bernoulli 19(5A), whose optimum is
acceptance 0.651 for any fixed time (0.6513); with the time jitter below it is 0.6514.

**HMC time jitter.** A fixed time on a Gaussian risks periodic behaviour, so each step
draws t ~ U(``INTEGRATION_TIME``) = U(0.8·π/2, 1.2·π/2) around π/2 (a quarter period of
the unit Gaussian, where an accepted move makes x' independent of x) and runs
n = max(1, ⌊t/ε + u⌋) leapfrog steps, u ~ U(0, 1) (randomised rounding: E[n] = E[t]/ε
whenever t ≥ ε). Jittering the length is common practice with no single source (Neal 2011
suggests randomising ε or n over a small interval); the ±20 % width is our choice.

**NUTS** (Hoffman & Gelman 2014, "The No-U-Turn sampler", JMLR 15): the theory start of
dual averaging is the ε at which NUTS's acceptance statistic is predicted to equal 0.8,
the target BlackJAX's warm-ups use for NUTS. The prediction is a model derived here, not
published (the "circle model"): as d → ∞, |x|² ≈ |p|² ≈ d and x·p ≈ 0, so every
trajectory is a circle and BlackJAX's U-turn check of a (sub)tree depends on its length
only; the tree doubles until its span reaches π, the start sits uniformly in the old half
and the draw uniformly in the new half (equal weights), and the statistic averages the
exact finite-d acceptance of each state's number of leapfrog steps from the start.
Measured against BlackJAX 1.7.1 NUTS on N(0, I_d) (64 chains × 1000 steps): acceptance
0.797–0.800 at d = 25–200 (0.76–0.79 at d = 1–10); leapfrog steps per draw 2.98, 6.74,
6.87 and 7.00 at d = 5, 10, 25, 50–200 against 3, 7, 7, 7 predicted, but 1.9 and 2.6
against 3 at d = 1, 2. Below d ≈ 20 the model is a rough guide.

**ESS per evaluation.** ESS per step of a statistic with lag-1 autocorrelation ρ is taken
as (1 − ρ)/(1 + ρ), the AR(1) value (Geyer 1992, "Practical Markov chain Monte Carlo",
Statistical Science 7(4)); the statistic is the slower of x_i and x_i². The ρ's are exact;
the geometric decay of the autocorrelation is exact only as d → ∞ (where x_i and x_i² − 1
are eigenfunctions of the kernel) and a guide at small d. Measured against arviz's ESS
(method "mean", averaged over coordinates) of BlackJAX chains on N(0, I_d) at the theory
steps, the AR(1) values are 9 % high for MALA and HMC at d = 20 (x_i: 0.216 vs 0.198 and
0.621 vs 0.570 per step), right for the random walk (0.0162 vs 0.0160), and within 10 %
for NUTS at d = 25 and 50. The slower statistic matters for NUTS: its x_i moves
antithetically (ESS ≈ 2.6 per step on N(0, I_d)) while its x_i² has ≈ 0.35 per step; the
fields ``jump_distance`` and ``square_jump`` give ρ₁ and ρ₂ for other choices.
"""

from __future__ import annotations

import math
import operator
from functools import lru_cache
from typing import Any, NamedTuple

import numpy as np
from numpy.polynomial.legendre import leggauss
from scipy import optimize, special, stats

from ..base.checks import whole_number
from ..errors import InputError, explain
from .randomwalk import optimal_scale

__all__ = [
    "GRADIENT_SAMPLERS",
    "INTEGRATION_TIME",
    "NUTS_TARGET_ACCEPTANCE",
    "SAMPLERS",
    "GradientChoice",
    "hmc_acceptance",
    "hmc_jump",
    "hmc_steps_law",
    "mala_acceptance",
    "mala_jump",
    "optimal_gradient_step",
    "predicted_ess_per_evaluation",
    "step_acceptance",
    "stable_step_limit",
]

SAMPLERS = ("rwm", "mala", "hmc", "nuts")
GRADIENT_SAMPLERS = ("mala", "hmc", "nuts")
INTEGRATION_TIME = (0.8 * np.pi / 2, 1.2 * np.pi / 2)  # HMC jitter window of the time t
NUTS_TARGET_ACCEPTANCE = 0.8  # BlackJAX's default dual-averaging target for NUTS
_MAX_DOUBLINGS = 10  # BlackJAX's default max_num_doublings for NUTS


class GradientChoice(NamedTuple):
    """A gradient sampler's step on the whitened target, and what it implies."""

    sampler: str  # "mala", "hmc" or "nuts"
    dim: int  # d, the number of scalar parameters
    scale: float  # l: h = l²d^(-1/3) (MALA), ε = l d^(-1/4) (HMC, NUTS)
    step_size: float  # BlackJAX's step_size: h/2 for blackjax.mala, ε for hmc and nuts
    acceptance: float  # predicted mean acceptance at this step (NUTS: the target, 0.8)
    jump_distance: float  # J = E[(x'_i - x_i)²] per coordinate, whitened (NUTS: model)
    square_jump: float  # J₂ = E[(x'_i² - x_i²)²] per coordinate (NUTS: model)
    integration_steps: tuple[int, int] | None  # HMC: least and most leapfrog steps drawn
    integration_time: tuple[float, float] | None  # HMC: window of t, n = max(1, ⌊t/ε + u⌋)
    gradients_per_step: float  # mean gradient evaluations per step (NUTS: model)
    ess_per_gradient: float  # Gaussian-limit ESS per gradient, slower of x_i and x_i²


# ----------------------------------------------------------------------------- inputs


def _check_dim(dim: Any) -> int:
    return whole_number(dim, "dim", "dim (the number of scalar parameters)",
                        todo="pass the number of scalar parameters, an integer >= 1.")


def _check_sampler(sampler: Any, known: tuple[str, ...], where: str) -> str:
    if not isinstance(sampler, str) or sampler not in known:
        raise InputError(explain(f"sampler={sampler!r} is not known.", where,
                                 f"use one of {', '.join(map(repr, known))}."))
    return sampler


def _check_positive(value: Any, name: str) -> np.ndarray:
    where = name
    try:
        values = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(explain(f"{name}={value!r} is not a number or array of numbers.",
                                 where, f"pass a finite {name} > 0.")) from None
    bad = np.flatnonzero(~(np.isfinite(values) & (values > 0.0)).ravel())
    if bad.size:
        i = int(bad[0])
        raise InputError(explain(f"{name} entry {i} = {values.ravel()[i]} is not finite "
                                 "and > 0.", f"{where}, flat index {i}",
                                 f"pass a finite {name} > 0."))
    return values


def _check_steps(steps: Any) -> int:
    where = "steps (leapfrog steps per trajectory)"
    todo = "pass a whole number of leapfrog steps >= 1."
    if isinstance(steps, bool | np.bool_):
        raise InputError(explain(f"steps={steps!r} is a boolean.", where, todo))
    try:
        n = operator.index(steps)
    except TypeError:
        raise InputError(explain(f"steps={steps!r} is not an integer.", where, todo)) from None
    if n < 1:
        raise InputError(explain(f"steps={n} is below 1.", where, todo))
    return int(n)


# ---------------------------------------------------- the reduction to (A, B) ~ χ²_d²


class _Form(NamedTuple):
    """One step on N(0, I_d) in the eigenbasis of G (arrays broadcast together)."""

    alpha: np.ndarray  # ΔE = αA − βB
    beta: np.ndarray
    tilt: np.ndarray  # r = 1 − 2β > 0, computed without cancellation
    angle: np.ndarray  # eigenvector of the larger eigenvalue of G: (cos, sin)(angle)
    keep: np.ndarray  # v_1: x' = v_1 x + v_2 z per coordinate
    move: np.ndarray  # v_2


@lru_cache(maxsize=256)
def _chi_square_rule(dim: int, panels: int = 8, nodes: int = 24) -> tuple[np.ndarray, ...]:
    """Nodes A = R² and normalised weights for expectations over A ~ χ²_d, R ~ chi_d:
    Gauss–Legendre panels in R over its central 1 − 2·10⁻¹⁸ of probability. For small
    d the first panel is halved 27 times toward 0, where the chi density is not small
    and an unstable step's acceptance varies on the scale R ~ α^(−1/2)."""
    lo, hi = stats.chi.ppf(1e-18, dim), stats.chi.isf(1e-18, dim)
    x, w = leggauss(nodes)
    edges = np.linspace(lo, hi, panels + 1)
    if dim <= 20:
        inner = edges[1] * 2.0 ** -np.arange(27, 0, -1.0)
        edges = np.concatenate([[lo], inner[inner > lo], edges[1:]])
    left, right = edges[:-1, None], edges[1:, None]
    radius = (0.5 * (right - left) * x + 0.5 * (right + left)).ravel()
    log_pdf = stats.chi.logpdf(radius, dim)
    weight = (0.5 * (right - left) * w).ravel() * np.exp(log_pdf - log_pdf.max())
    weight /= weight.sum()
    square = radius * radius
    for array in (square, weight):
        array.flags.writeable = False
    return square, weight


def _moments(form: _Form, dim: int, rule, acceptance_only: bool = False) -> tuple:
    """Acceptance a, J = E[(x'_i − x_i)²] and J₂ = E[(x'_i² − x_i²)²] per coordinate
    (only (a,) when ``acceptance_only``)."""
    a_nodes, weight = rule
    d, k = float(dim), 0.5 * dim
    alpha, beta, tilt = (np.asarray(v, dtype=float)[..., None]
                         for v in (form.alpha, form.beta, form.tilt))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        edge = np.where(alpha == 0.0, 0.0,
                        np.where(beta == 0.0, np.inf, alpha * a_nodes / beta))
        log_tilted = -alpha * a_nodes - k * np.log(tilt)
        inner = []  # E[B^j min(1, e^(−ΔE)) | A] for j = 0, 1, 2
        for j, moment in enumerate((1.0, d, d * (d + 2.0))[:1 if acceptance_only else 3]):
            upper = special.gammaincc(k + j, 0.5 * edge)
            lower = np.exp(log_tilted + np.log(special.gammainc(k + j, 0.5 * tilt * edge))
                           - j * np.log(tilt))
            inner.append(moment * (upper + lower))
    if acceptance_only:
        return (inner[0] @ weight,)
    f0, f1, f2 = inner
    e_f, e_a, e_aa = f0 @ weight, (a_nodes * f0) @ weight, (a_nodes**2 * f0) @ weight
    e_b, e_ab, e_bb = f1 @ weight, (a_nodes * f1) @ weight, f2 @ weight
    cos, sin = np.cos(form.angle), np.sin(form.angle)
    v1, v2 = form.keep, form.move
    jump_plus, jump_minus = (v1 - 1.0) * cos + v2 * sin, -(v1 - 1.0) * sin + v2 * cos
    jump = (jump_plus**2 * e_a + jump_minus**2 * e_b) / d
    proj_plus, proj_minus = v1 * cos + v2 * sin, -v1 * sin + v2 * cos
    k11 = proj_plus**2 - cos**2  # x'² − x² = wᵀ(vvᵀ − e₁e₁ᵀ)w, rotated
    k22 = proj_minus**2 - sin**2
    k12 = proj_plus * proj_minus + cos * sin
    square_jump = (3.0 * (k11**2 * e_aa + k22**2 * e_bb) / (d * (d + 2.0))
                   + (4.0 * k12**2 + 2.0 * k11 * k22) * e_ab / d**2)
    return e_f, jump, square_jump


def _mala_form(h: np.ndarray) -> _Form:
    h = np.asarray(h, dtype=float)
    root = np.sqrt(h**4 / 64.0 + h) + h * h / 8.0  # eigenvalues of G·8/h: root, −h/root
    c = 1.0 - 0.5 * h
    angle = 0.5 * np.arctan2(2.0 * c * np.sqrt(h), c * c - 1.0 - h)
    return _Form(h / 8.0 * root, h / 8.0 * h / root, h / root**2, angle, c, np.sqrt(h))


def _hmc_form(eps: np.ndarray, steps: np.ndarray) -> _Form:
    eps, steps = np.broadcast_arrays(np.asarray(eps, dtype=float), np.asarray(steps))
    c0 = 1.0 - 0.5 * eps * eps
    cos_n = special.eval_chebyt(steps, c0)
    sin_n = special.eval_chebyu(steps - 1, c0)
    p12, p21 = eps * sin_n, -eps * (1.0 - 0.25 * eps * eps) * sin_n
    gamma = np.abs(0.25 * eps**3 * sin_n)
    sigma = 0.5 * gamma + np.sqrt(1.0 + 0.25 * gamma * gamma)
    angle = 0.5 * np.arctan2(2.0 * cos_n * (p12 + p21), p21 * p21 - p12 * p12)
    return _Form(0.5 * gamma * sigma, 0.5 * gamma / sigma, 1.0 / sigma**2, angle, cos_n, p12)


# ----------------------------------------------------------------------------- HMC law


def _steps_law(eps: float) -> tuple[np.ndarray, np.ndarray]:
    """Law of n = max(1, ⌊t/ε + u⌋), t ~ U(INTEGRATION_TIME), u ~ U(0, 1).

    P(⌊s + u⌋ = k | s) = max(0, 1 − |s − k|), integrated over s = t/ε in closed form.
    """
    lo, hi = INTEGRATION_TIME[0] / eps, INTEGRATION_TIME[1] / eps
    ks = np.arange(int(np.floor(lo)), int(np.floor(hi)) + 2)

    def ramp(y):  # ∫_{−∞}^{y} max(0, 1 − |s|) ds
        y = np.clip(y, -1.0, 1.0)
        return np.where(y < 0.0, 0.5 * (y + 1.0) ** 2, 1.0 - 0.5 * (1.0 - y) ** 2)

    prob = (ramp(hi - ks) - ramp(lo - ks)) / (hi - lo)
    steps = np.maximum(ks, 1)
    values = np.unique(steps)
    prob = np.array([prob[steps == v].sum() for v in values])
    keep = prob > 0.0
    return values[keep], prob[keep] / prob[keep].sum()


def _hmc_mixture(eps: float, dim: int, rule=None) -> tuple[float, float, float, float]:
    """(acceptance, J, J₂, mean steps) of jittered HMC at step ε."""
    steps, prob = _steps_law(eps)
    a, jump, square = _moments(_hmc_form(eps, steps), dim, rule or _chi_square_rule(dim))
    return float(prob @ a), float(prob @ jump), float(prob @ square), float(prob @ steps)


def _decorrelation(jump: float, square_jump: float) -> float:
    """min(1 − ρ₁, 1 − ρ₂): the slower of x_i and x_i², lag 1."""
    return min(0.5 * jump, 0.25 * square_jump)


def _ess_per_step(decorrelation: float) -> float:
    """AR(1): (1 − ρ)/(1 + ρ) with ρ = 1 − decorrelation."""
    return decorrelation / (2.0 - decorrelation)


# ------------------------------------------------------------------------- optimisers


def _maximise(value, lo: float, hi: float, points: int = 48) -> float:
    """Grid in log l, then bounded Brent around the best grid point."""
    grid = np.linspace(np.log(lo), np.log(hi), points)
    values = np.array([value(t) for t in grid])
    i = int(np.argmax(values))
    left, right = grid[max(i - 1, 0)], grid[min(i + 1, points - 1)]
    found = optimize.minimize_scalar(lambda t: -value(t), bounds=(left, right),
                                     method="bounded", options={"xatol": 1e-9})
    return float(np.exp(found.x if -found.fun >= values[i] else grid[i]))


@lru_cache(maxsize=1024)
def _mala_choice(dim: int) -> GradientChoice:
    rule = _chi_square_rule(dim)
    shrink = dim ** (-1.0 / 3.0)

    def jump_at(log_scale: float) -> float:
        h = np.exp(2.0 * log_scale) * shrink
        return float(_moments(_mala_form(h), dim, rule)[1])

    scale = _maximise(jump_at, 0.2, 5.0)
    h = scale * scale * shrink
    a, jump, square = (float(v) for v in _moments(_mala_form(h), dim, rule))
    ess = _ess_per_step(_decorrelation(jump, square))
    return GradientChoice("mala", dim, scale, 0.5 * h, a, jump, square, None, None, 1.0, ess)


@lru_cache(maxsize=1024)
def _hmc_choice(dim: int) -> GradientChoice:
    rule = _chi_square_rule(dim)
    shrink = dim ** (-0.25)

    def efficiency(log_scale: float) -> float:
        _, jump, square, steps = _hmc_mixture(np.exp(log_scale) * shrink, dim, rule)
        return _decorrelation(jump, square) / steps

    scale = _maximise(efficiency, 0.2, min(1.99 / shrink, 6.0))
    eps = scale * shrink
    a, jump, square, steps = _hmc_mixture(eps, dim, rule)
    law = _steps_law(eps)[0]
    ess = _ess_per_step(_decorrelation(jump, square)) / steps
    return GradientChoice("hmc", dim, scale, eps, a, jump, square, (int(law[0]), int(law[-1])),
                          INTEGRATION_TIME, steps, ess)


class _Tree(NamedTuple):
    """NUTS in the circle model at one step ε."""

    gradients: int  # leapfrog steps (gradient evaluations) per NUTS step
    acceptance: float  # BlackJAX's acceptance statistic: mean over the new states
    rho_mean: float  # lag-1 autocorrelation of x_i
    rho_square: float  # lag-1 autocorrelation of x_i²


def _circle_tree(eps: float, dim: int, rule) -> _Tree:
    """NUTS on N(0, I_d) with every trajectory a circle (d → ∞: |x|² ≈ |p|² ≈ d, x·p ≈ 0).

    A tree of m states spans (m − 1)ε, and BlackJAX's check ρ·v_end ≤ 0 with
    ρ = Σp − (p_left + p_right)/2 reads, on a circle, F(m)·cos((m − 1)ε/2) ≤ 0 with
    F(m) = sin(mε/2)/sin(ε/2) − cos((m − 1)ε/2) > 0: the tree turns once its span
    reaches π. Every smaller size was checked in earlier doublings, so the tree doubles
    until the merged span reaches π (at most 2^10 states). The start sits uniformly in
    the old half (random directions), the draw uniformly in the new half (equal weights
    along the trajectory), and the acceptance statistic averages the exact finite-d
    acceptance of |offset| leapfrog steps over all states but the start.
    """
    size = 2
    while (size - 1) * eps < np.pi and size < 2**_MAX_DOUBLINGS:
        size *= 2
    old = size // 2
    start = np.arange(old)[:, None]
    offsets = np.abs(np.arange(size)[None, :] - start)  # (start, state)
    distinct = np.arange(1, size)
    accept = np.concatenate([[1.0], _moments(_hmc_form(eps, distinct), dim, rule,
                                             acceptance_only=True)[0]])
    mean_accept = float(np.sum(accept[offsets]) - old) / (old * (size - 1))
    drawn = offsets[:, old:].ravel()
    cos_o = special.eval_chebyt(drawn, 1.0 - 0.5 * eps * eps)
    return _Tree(size - 1, mean_accept, float(np.mean(cos_o)), float(np.mean(cos_o**2)))


@lru_cache(maxsize=1024)
def _nuts_choice(dim: int) -> GradientChoice:
    """ε where the circle model's acceptance statistic first falls to the target."""
    rule = _chi_square_rule(dim)
    shrink = dim ** (-0.25)

    def gap(eps: float) -> float:
        return _circle_tree(eps, dim, rule).acceptance - NUTS_TARGET_ACCEPTANCE

    grid = np.minimum(np.linspace(0.5, 3.0, 26) * shrink, 1.95)
    gaps = np.array([gap(e) for e in grid])
    below = np.flatnonzero(gaps < 0.0)
    if below.size == 0:
        eps = float(grid[-1])
    elif below[0] == 0:
        eps = optimize.brentq(gap, 1e-4, grid[0], xtol=1e-12)
    else:
        eps = optimize.brentq(gap, grid[below[0] - 1], grid[below[0]], xtol=1e-12)
    tree = _circle_tree(eps, dim, rule)
    ess = _ess_per_step(min(1.0 - tree.rho_mean, 1.0 - tree.rho_square)) / tree.gradients
    return GradientChoice("nuts", dim, eps / shrink, eps, NUTS_TARGET_ACCEPTANCE,
                          2.0 * (1.0 - tree.rho_mean), 4.0 * (1.0 - tree.rho_square), None,
                          None, float(tree.gradients), ess)


# ----------------------------------------------------------------------------- public


def _as_output(values: np.ndarray, scalar: bool):
    return float(values) if scalar else np.asarray(values, dtype=float)


def mala_acceptance(scale: Any, dim: int) -> float | np.ndarray:
    """Expected MALA acceptance E[min(1, ratio)] on N(0, I_d) at h = l² d^(−1/3).

    ``scale`` is l (a float or an array; > 0). Exact at finite d (module docstring;
    Roberts & Rosenthal 1998 for the limit 2Φ(−l³/8)). Returns the same shape.
    """
    d = _check_dim(dim)
    scales = _check_positive(scale, "scale")
    h = scales**2 * d ** (-1.0 / 3.0)
    return _as_output(_moments(_mala_form(h), d, _chi_square_rule(d))[0], scales.ndim == 0)


def mala_jump(scale: Any, dim: int) -> float | np.ndarray:
    """MALA's expected squared jump per coordinate, E[|y − x|² min(1, ratio)]/d."""
    d = _check_dim(dim)
    scales = _check_positive(scale, "scale")
    h = scales**2 * d ** (-1.0 / 3.0)
    return _as_output(_moments(_mala_form(h), d, _chi_square_rule(d))[1], scales.ndim == 0)


def hmc_acceptance(step_size: Any, steps: int, dim: int) -> float | np.ndarray:
    """Expected acceptance E[min(1, e^(−ΔH))] of ``steps`` leapfrog steps of size ε.

    Identity mass on N(0, I_d) (the whitened target). Exact at finite d for any ε > 0;
    ε ≥ 2 is unstable and its acceptance is near 0. ``step_size`` may be an array.
    """
    d = _check_dim(dim)
    eps = _check_positive(step_size, "step_size")
    n = _check_steps(steps)
    return _as_output(_moments(_hmc_form(eps, n), d, _chi_square_rule(d))[0], eps.ndim == 0)


def hmc_jump(step_size: Any, steps: int, dim: int) -> float | np.ndarray:
    """HMC's expected squared jump per coordinate, E[(x'_i − x_i)²], whitened units."""
    d = _check_dim(dim)
    eps = _check_positive(step_size, "step_size")
    n = _check_steps(steps)
    return _as_output(_moments(_hmc_form(eps, n), d, _chi_square_rule(d))[1], eps.ndim == 0)


def hmc_steps_law(step_size: float) -> tuple[np.ndarray, np.ndarray]:
    """The jittered number of leapfrog steps at step ε: (values, probabilities).

    Each step draws t ~ U(``INTEGRATION_TIME``) and u ~ U(0, 1), and runs
    n = max(1, ⌊t/ε + u⌋) leapfrog steps; this is the exact law of n.
    """
    eps = _check_positive(step_size, "step_size")
    if eps.ndim != 0:
        raise InputError(explain("step_size is an array.", "hmc_steps_law(step_size)",
                                 "pass one step size (a float)."))
    return _steps_law(float(eps))


def stable_step_limit(sampler: str) -> float:
    """The largest step size at which the sampler's map is stable on N(0, I_d).

    The leapfrog integrator (HMC, NUTS) is stable on a unit Gaussian for ε < 2 (the
    linear map's eigenvalues leave the unit circle at ε = 2; Leimkuhler & Reich 2004,
    "Simulating Hamiltonian Dynamics", ch. 4); MALA's step is not bounded so (returned as
    infinity): its acceptance decays smoothly.
    """
    sampler = _check_sampler(sampler, GRADIENT_SAMPLERS, "stable_step_limit(sampler=...)")
    return math.inf if sampler == "mala" else 2.0


def step_acceptance(sampler: str, step_size: Any, dim: int) -> float | np.ndarray:
    """Predicted acceptance against BlackJAX's ``step_size`` (for the tuning picture).

    ``"mala"``: h = 2·step_size, exact; ``"hmc"``: ε = step_size with the jittered
    number of steps of :func:`hmc_steps_law`, exact; ``"nuts"``: BlackJAX's acceptance
    statistic in the circle model (module docstring), the quantity dual averaging steers.
    """
    sampler = _check_sampler(sampler, GRADIENT_SAMPLERS, "step_acceptance(sampler=...)")
    d = _check_dim(dim)
    steps = _check_positive(step_size, "step_size")
    rule = _chi_square_rule(d)
    if sampler == "mala":
        return _as_output(_moments(_mala_form(2.0 * steps), d, rule)[0], steps.ndim == 0)
    if sampler == "hmc":
        out = [_hmc_mixture(float(e), d, rule)[0] for e in steps.ravel()]
    else:
        out = [_circle_tree(float(e), d, rule).acceptance for e in steps.ravel()]
    return _as_output(np.reshape(out, steps.shape), steps.ndim == 0)


def optimal_gradient_step(sampler: str, dim: int) -> GradientChoice:
    """The theory step of a gradient sampler on the whitened target N(0, I_d).

    Parameters
    ----------
    sampler
        ``"mala"``: l* maximises the squared jump J (Roberts & Rosenthal 1998);
        ``"hmc"``: l* maximises min(1 − ρ₁, 1 − ρ₂) per gradient with the jittered time
        (Beskos et al. 2013 for the limit); ``"nuts"``: the ε at which the jittered-HMC
        acceptance is 0.8, the start of dual averaging (Hoffman & Gelman 2014).
    dim
        Number of scalar parameters d (an integer >= 1).

    Returns
    -------
    GradientChoice
        ``step_size`` is in BlackJAX's convention (h/2 for ``blackjax.mala``, ε for
        ``blackjax.hmc``/``blackjax.nuts``). ``ess_per_gradient`` is the AR(1) ESS per
        gradient of the slower of x_i and x_i² (module docstring); for NUTS it and
        ``gradients_per_step`` come from the circle model, a rough guide.
        Cached per (sampler, dim).
    """
    sampler = _check_sampler(sampler, GRADIENT_SAMPLERS, "optimal_gradient_step(sampler=...)")
    d = _check_dim(dim)
    return {"mala": _mala_choice, "hmc": _hmc_choice, "nuts": _nuts_choice}[sampler](d)


def predicted_ess_per_evaluation(sampler: str, dim: int) -> float:
    """Gaussian-limit ESS per evaluation at the theory step, for comparing samplers.

    An evaluation is one log density for ``"rwm"`` and one gradient (with its value)
    for the others, so multiply by the measured cost of each to compare. For the
    gradient samplers this is ``optimal_gradient_step(sampler, dim).ess_per_gradient``.
    For the random walk at its optimal matched scale (fisherwalk.optimal_scale), with the
    exact ρ₁ = 1 − J/(2d): ESS per step (1 − ρ₁)/(1 + ρ₁). Its x_i² is not slower: in the
    diffusion limit (Roberts, Gelman & Gilks 1997) x_i² − 1 decays twice as fast as x_i.
    """
    sampler = _check_sampler(sampler, SAMPLERS, "predicted_ess_per_evaluation(sampler=...)")
    d = _check_dim(dim)
    if sampler == "rwm":
        return _ess_per_step(0.5 * optimal_scale(d).slowest_jump)
    return optimal_gradient_step(sampler, d).ess_per_gradient
