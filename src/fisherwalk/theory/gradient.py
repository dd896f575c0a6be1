"""Step size and target acceptance of MALA, HMC and NUTS in the Gaussian limit.

The samplers run on the whitened target (θ = mode + L⁻ᵀ z with L Lᵀ = H, or equivalently
with inverse mass matrix H⁻¹), which in the large-sample limit is N(0, I_d). On N(0, I_d)
one step of MALA and one HMC trajectory are linear maps of the current state and the fresh
noise, so everything below is exact at every finite d (no Monte Carlo, no lookup table).

**Reduction** (:mod:`fisherwalk.theory.quadrature`): one step on N(0, I_d) is a quadratic
form in chi-square variables, whose moments are computed exactly.

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
from scipy import optimize

from ..base.checks import whole_number
from ..errors import InputError, explain
from .quadrature import (
    INTEGRATION_TIME,
    chi_square_rule,
    circle_tree,
    decorrelation,
    ess_per_step,
    hmc_form,
    hmc_mixture,
    mala_form,
    moments,
    steps_law,
)
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
NUTS_TARGET_ACCEPTANCE = 0.8  # BlackJAX's default dual-averaging target for NUTS


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
    rule = chi_square_rule(dim)
    shrink = dim ** (-1.0 / 3.0)

    def jump_at(log_scale: float) -> float:
        h = np.exp(2.0 * log_scale) * shrink
        return float(moments(mala_form(h), dim, rule)[1])

    scale = _maximise(jump_at, 0.2, 5.0)
    h = scale * scale * shrink
    a, jump, square = (float(v) for v in moments(mala_form(h), dim, rule))
    ess = ess_per_step(decorrelation(jump, square))
    return GradientChoice("mala", dim, scale, 0.5 * h, a, jump, square, None, None, 1.0, ess)


@lru_cache(maxsize=1024)
def _hmc_choice(dim: int) -> GradientChoice:
    rule = chi_square_rule(dim)
    shrink = dim ** (-0.25)

    def efficiency(log_scale: float) -> float:
        _, jump, square, steps = hmc_mixture(np.exp(log_scale) * shrink, dim, rule)
        return decorrelation(jump, square) / steps

    scale = _maximise(efficiency, 0.2, min(1.99 / shrink, 6.0))
    eps = scale * shrink
    a, jump, square, steps = hmc_mixture(eps, dim, rule)
    law = steps_law(eps)[0]
    ess = ess_per_step(decorrelation(jump, square)) / steps
    return GradientChoice("hmc", dim, scale, eps, a, jump, square, (int(law[0]), int(law[-1])),
                          INTEGRATION_TIME, steps, ess)


@lru_cache(maxsize=1024)
def _nuts_choice(dim: int) -> GradientChoice:
    """ε where the circle model's acceptance statistic first falls to the target."""
    rule = chi_square_rule(dim)
    shrink = dim ** (-0.25)

    def gap(eps: float) -> float:
        return circle_tree(eps, dim, rule).acceptance - NUTS_TARGET_ACCEPTANCE

    grid = np.minimum(np.linspace(0.5, 3.0, 26) * shrink, 1.95)
    gaps = np.array([gap(e) for e in grid])
    below = np.flatnonzero(gaps < 0.0)
    if below.size == 0:
        eps = float(grid[-1])
    elif below[0] == 0:
        eps = optimize.brentq(gap, 1e-4, grid[0], xtol=1e-12)
    else:
        eps = optimize.brentq(gap, grid[below[0] - 1], grid[below[0]], xtol=1e-12)
    tree = circle_tree(eps, dim, rule)
    ess = ess_per_step(min(1.0 - tree.rho_mean, 1.0 - tree.rho_square)) / tree.gradients
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
    return _as_output(moments(mala_form(h), d, chi_square_rule(d))[0], scales.ndim == 0)


def mala_jump(scale: Any, dim: int) -> float | np.ndarray:
    """MALA's expected squared jump per coordinate, E[|y − x|² min(1, ratio)]/d."""
    d = _check_dim(dim)
    scales = _check_positive(scale, "scale")
    h = scales**2 * d ** (-1.0 / 3.0)
    return _as_output(moments(mala_form(h), d, chi_square_rule(d))[1], scales.ndim == 0)


def hmc_acceptance(step_size: Any, steps: int, dim: int) -> float | np.ndarray:
    """Expected acceptance E[min(1, e^(−ΔH))] of ``steps`` leapfrog steps of size ε.

    Identity mass on N(0, I_d) (the whitened target). Exact at finite d for any ε > 0;
    ε ≥ 2 is unstable and its acceptance is near 0. ``step_size`` may be an array.
    """
    d = _check_dim(dim)
    eps = _check_positive(step_size, "step_size")
    n = _check_steps(steps)
    return _as_output(moments(hmc_form(eps, n), d, chi_square_rule(d))[0], eps.ndim == 0)


def hmc_jump(step_size: Any, steps: int, dim: int) -> float | np.ndarray:
    """HMC's expected squared jump per coordinate, E[(x'_i − x_i)²], whitened units."""
    d = _check_dim(dim)
    eps = _check_positive(step_size, "step_size")
    n = _check_steps(steps)
    return _as_output(moments(hmc_form(eps, n), d, chi_square_rule(d))[1], eps.ndim == 0)


def hmc_steps_law(step_size: float) -> tuple[np.ndarray, np.ndarray]:
    """The jittered number of leapfrog steps at step ε: (values, probabilities).

    Each step draws t ~ U(``INTEGRATION_TIME``) and u ~ U(0, 1), and runs
    n = max(1, ⌊t/ε + u⌋) leapfrog steps; this is the exact law of n.
    """
    eps = _check_positive(step_size, "step_size")
    if eps.ndim != 0:
        raise InputError(explain("step_size is an array.", "hmc_steps_law(step_size)",
                                 "pass one step size (a float)."))
    return steps_law(float(eps))


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
    rule = chi_square_rule(d)
    if sampler == "mala":
        return _as_output(moments(mala_form(2.0 * steps), d, rule)[0], steps.ndim == 0)
    if sampler == "hmc":
        out = [hmc_mixture(float(e), d, rule)[0] for e in steps.ravel()]
    else:
        out = [circle_tree(float(e), d, rule).acceptance for e in steps.ravel()]
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
        return ess_per_step(0.5 * optimal_scale(d).slowest_jump)
    return optimal_gradient_step(sampler, d).ess_per_gradient
