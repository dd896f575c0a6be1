"""refine(): a short warm-up that adapts the scale and checks the Gaussian picture.

The large-sample tuning of :func:`fisherwalk.start` is exact when the posterior is
N(mode, H⁻¹). The warm-up checks that in three ways and repairs what it can:

1. Before any step (computed by start() from the draws that seed the chains):
   Pareto-smoothed importance sampling k̂ of the posterior against the Laplace
   approximation (Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed
   importance sampling", JMLR 25(72)). k̂ above min(1 - 1/log10 S, 0.7) says the
   Gaussian misses the posterior's tails.
2. Phase 1 (half the steps): every chain steps with the start() proposal while the
   scale adapts toward the target acceptance (Robbins-Monro on the log scale, pooled
   over chains; Andrieu & Thoms 2008, Statistics and Computing 18). Then the pooled
   warm-up covariance is compared with H⁻¹ through the spectrum of Lᵀ Σ̂ L (all ones
   in the Gaussian picture; its sampling spread follows the Marchenko-Pastur edges
   (1 ± sqrt(d / n_eff))², Marchenko & Pastur 1967, Math. USSR Sbornik 1(4), with n_eff
   the effective number of warm-up draws) by a likelihood-ratio test at level 0.001,
   and the adapted scale with the predicted one (off by more than 10%). When every
   check agrees, the theoretical scale is kept (adaptation only adds noise to an exact
   answer) and phase 2 runs at it, measuring the acceptance there; if that acceptance
   departs from the prediction beyond 3 Monte Carlo standard errors, a third phase of
   the same length adapts the scale after all.
3. When a check fails beyond its Monte Carlo error, the proposal shape (or a gradient
   sampler's metric) is learned from draws: BlackJAX's window adaptation, started from the
   chains' positions and the Laplace metric, with windows that double so that early draws
   are forgotten, or, for the random walk at d <= 25, more steps of its own compiled loop
   and their covariance (:mod:`fisherwalk.prepare.metric_repair`); the scale and target acceptance
   are recomputed for the new shape (:func:`fisherwalk.optimal_scale` with the spectrum
   of A = Sᵀ P S, P the precision the walker now believes). When a check fails, phase 2
   (the other half) adapts the scale again, and the final scale is the average of the
   adapted log scale over the second half of phase 2 (Polyak & Juditsky 1992, SIAM J.
   Control Optim. 30(4)). When "auto" chose a family whose predicted speed rests on the
   Gaussian limit (the random walk, MALA) and the covariance check fails, the walker
   switches to NUTS with the learned metric (:func:`fisherwalk.prepare.evidence.redecide`).

Default length: 400 steps. Started near stationarity from N(mode, H⁻¹), the chains need
no burn-in to travel; the warm-up only has to settle one scalar (a few dozen steps from a
scale 4x off, see the tests) and to gather enough draws for the checks: 200 steps x 4
chains give n_eff of roughly 800 x 0.3 / d effective draws (RWM's efficiency at the
optimum is about 0.3/d per step, Roberts, Gelman & Gilks 1997), enough to see a variance
off by a factor of two at d <= 10.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import jax
import numpy as np
from scipy.stats import chi2

from ..base.checks import whole_number
from ..base.keys import as_key
from ..engine.loop import DEFAULT_CHUNK
from ..engine.progress import progress_bar
from ..results.diagnostics import ess_mean
from ..samplers.family import WarmContext
from ..tuned.walker import Walker, continuable_state, flat_logdensity
from .evidence import redecide
from .metric_repair import (
    fallback_walker_parts,
    learned_factors,
    learned_words,
    repair_metric,
    window_start,
)

COVARIANCE_LEVEL = 1e-3  # level of the test that the whitened warm-up covariance is I


class WarmupReport(NamedTuple):
    """What the warm-up measured, decided and changed.

    ``tuned`` names the family's tuned parameter (``"scale"``, the random walk's l, or
    ``"step_size"``, a gradient family's BlackJAX step size); ``tuned_start``,
    ``tuned_phase1`` and ``tuned_final`` hold its values.
    """

    steps: int  # warm-up steps per chain, as run
    khat: float  # PSIS k̂ of the posterior against the Laplace approximation
    khat_threshold: float  # min(1 - 1/log10 S, 0.7)
    outside_support: int  # Laplace draws where the log density was not finite
    tuned: str  # which parameter was tuned: "scale" or "step_size"
    tuned_start: float  # its value before the warm-up (the theory's)
    tuned_phase1: float  # its adapted value at the end of phase 1
    tuned_final: float  # the refined value
    target_acceptance: float  # the acceptance the adaptation aimed for (final shape)
    acceptance_phase1: float  # mean acceptance probability in phase 1 (second half)
    acceptance_final: float  # mean acceptance probability at the end (second half)
    covariance_spectrum: np.ndarray  # eigenvalues of Lᵀ Σ̂ L (ones in the Gaussian picture)
    spectrum_bounds: tuple[float, float]  # what Monte Carlo error allows for them
    covariance_p_value: float  # likelihood-ratio test of whitened covariance = I
    effective_draws: float  # n_eff of the phase-1 draws (median over whitened coordinates)
    reshaped: bool  # whether the proposal shape (the metric) was re-estimated
    reasons: tuple[str, ...]  # which checks failed
    fisher_spectrum: np.ndarray  # eigenvalues of Sᵀ H S for the final shape S
    notes: tuple[str, ...]  # plain-language account for the report
    divergent: int = 0  # divergent transitions in the warm-up (families that have them)


def _khat_words(khat: float, limit: float) -> str:
    """PSIS k̂ in words; -inf means the importance ratios were all equal; NaN that there
    was no Laplace approximation to check (no mode: :mod:`fisherwalk.prepare.modeless`)."""
    if math.isnan(khat):
        return "no PSIS k̂: the posterior has no mode, so no Laplace approximation"
    if khat == -math.inf:
        return ("PSIS k̂ -inf: every Laplace draw had the same importance ratio (at each "
                "of them the log density equals the Laplace Gaussian's up to a constant; "
                "the draws test the region they cover, not the tails beyond it)")
    return f"PSIS k̂ {khat:.2f} (threshold {limit:.2f})"


def _covariance_check(draws: np.ndarray, whitening: np.ndarray, within: bool = False,
                      squares: bool = False):
    """Whitened warm-up covariance C = Lᵀ Σ̂ L against the identity.

    Returns Σ̂, the spectrum of C, the band of eigenvalues Monte Carlo error allows
    (the Marchenko-Pastur edges (1 ± sqrt(d/n_eff))², reported for reading), n_eff, and
    the p-value of the likelihood-ratio test of C = I, whose statistic
    n_eff (tr C - log det C - d) is asymptotically chi-square with d(d+1)/2 degrees of
    freedom (Anderson 2003, An Introduction to Multivariate Statistical Analysis, 3rd ed.,
    section 10.8), with n_eff the effective number of draws (median ESS of the whitened
    coordinates) standing in for the number of independent draws. With ``within``
    (start() spread the chains over several modes) each chain is centred on its own mean.
    """
    chains, n, d = draws.shape
    kept = draws[:, n // 5:]  # drop the first fifth of phase 1 (the scale was settling)
    if within:  # chains in different modes: the spread within each, not between them
        kept = kept - kept.mean(axis=1, keepdims=True)
    pooled = kept.reshape(-1, d)
    cov = np.cov(pooled, rowvar=False).reshape(d, d)
    white = whitening.T @ cov @ whitening
    spectrum = np.linalg.eigvalsh(white)
    whitened = (kept - pooled.mean(axis=0)) @ whitening
    # ``squares``: the ESS of the squared whitened coordinates (a gradient sampler's draws
    # can be antithetic in the coordinates, ESS above the draws, while their squares, which
    # carry the covariance, mix more slowly); never more than the draws.
    n_eff = float(np.median(np.atleast_1d(ess_mean(whitened**2 if squares else whitened))))
    n_eff = min(max(n_eff, 2.0), float(pooled.shape[0]))
    ratio = math.sqrt(d / n_eff)
    low = (1.0 - ratio) ** 2 if ratio < 1 else 0.0
    high = (1.0 + ratio) ** 2
    statistic = n_eff * float(np.sum(spectrum - np.log(spectrum) - 1.0))
    p_value = float(chi2.sf(statistic, d * (d + 1) / 2))
    return cov, spectrum, (float(low), float(high)), n_eff, p_value


def chosen_by_auto(walker: Walker) -> bool:
    """Whether start(sampler="auto") made the walker's choice (its note says so)."""
    return any(str(n).startswith("sampler='auto' chose") for n in walker.report.notes)


def _switched(walker: Walker, learned, switch: str, learned_note: str, phase1,
              measured) -> Walker:
    """A walker of the registry's FALLBACK family (NUTS) with the learned metric,
    replacing a choice of "auto" the warm-up refuted.

    ``measured``: (steps, k̂, threshold, outside, spectrum, bounds, p-value, n_eff,
    reasons) of the phase already run."""
    steps, khat, k_limit, outside, spectrum, bounds, p_value, n_eff, reasons = measured
    tuning, model, state = fallback_walker_parts(walker, learned)
    theory = tuning.family.initial(tuning._replace(step_size=None)).step_size
    fit = walker.report.laplace
    fisher_spectrum = np.sort(np.linalg.svd(
        np.asarray(fit.cholesky).T @ np.asarray(tuning.shape), compute_uv=False) ** 2)
    warm = WarmupReport(
        steps + learned.steps, khat, k_limit, outside, tuning.family.parameter,
        float(theory), float(learned.step_size), float(learned.step_size),
        float(learned.target_acceptance), float(phase1.acceptance),
        float(learned.acceptance), spectrum, bounds, p_value, n_eff, True, reasons,
        fisher_spectrum, (switch, learned_note), phase1.divergent + learned.divergent)
    return walker._replace(state=state, tuning=tuning, model=model,
                           report=walker.report._replace(warmup=warm))


def refine(
    walker: Walker,
    rng_key: jax.Array,
    steps: int | None = None,
    *,
    reshape: bool | None = None,
    progress: bool | None = None,
) -> Walker:
    """Warm up a walker: adapt its family's parameter, check the Gaussian picture, reshape.

    One skeleton for every sampler family (:mod:`fisherwalk.samplers`): phase 1 is
    the family's adaptation from its theory value (the random walk's scale by
    Robbins-Monro, a gradient family's step size by dual averaging); then the shared
    checks (PSIS k̂, the warm-up covariance against H⁻¹) and the family's own (the random
    walk: adapted scale against the theory); then, when a check fails, the shape (the
    metric) is re-estimated; phase 2 (and a third phase if the family needs one) settles
    the parameter.

    Parameters
    ----------
    walker
        From :func:`fisherwalk.start`.
    rng_key
        JAX key (typed or old-style).
    steps
        Warm-up steps per chain, rounded up to a multiple of 200 (two phases of whole
        chunks) and run as asked, by every family (``report.warmup.steps`` says how many
        ran; the random walk may add a third phase, and a metric learned from draws adds
        the window adaptation's steps, :mod:`fisherwalk.prepare.metric_repair`). Default
        (None): the family's own, ``Family.warmup_steps``: 400 for the random walk
        (justified in the module docstring), 200 for the gradient families (dual averaging
        from the theory step).
    reshape
        ``None`` (default): learn the proposal shape (the metric) from draws only when
        the Gaussian picture is refuted (PSIS k̂ above its threshold, or the warm-up
        covariance against H⁻¹);
        ``True``: always; ``False``: never (the parameter still adapts).
    progress
        Progress bar; default only when standard error is a terminal.

    Returns
    -------
    Walker
        A new walker (nothing mutated): refined tuning, chains at their warm-up end,
        and ``report.warmup`` (:class:`WarmupReport`) saying what was done and why.
    """
    state = continuable_state(walker, "refine()")
    if steps is None:  # the family's own default length
        steps = walker.family.warmup_steps
    steps = whole_number(steps, "steps", "refine(steps=...)")
    block = 2 * DEFAULT_CHUNK
    steps = int(math.ceil(steps / block) * block)
    key = as_key(rng_key, where="refine(rng_key=...)")
    family, tuning0 = walker.family, walker.tuning
    fit, check = walker.report.laplace, walker.report.check
    khat, k_limit, outside = check.khat, check.threshold, check.outside_support
    bar = progress_bar(steps, progress, "warm-up")
    half = steps // 2
    context = WarmContext(walker.model, tuning0, walker.names, bar,
                          _khat_words(khat, k_limit))
    try:
        phase1 = family.phase(context, key, state, half)
        several = len(getattr(fit, "modes_flat", ())) > 1
        cov, spectrum, bounds, n_eff, p_value = _covariance_check(
            phase1.draws, np.asarray(fit.cholesky), within=several,
            squares=family.covariance_of_squares)
        reasons = []
        if khat > k_limit:
            reasons.append(f"PSIS k̂ = {khat:.2f} > {k_limit:.2f}: the Laplace approximation "
                           "misses the posterior's tails")
        if p_value < COVARIANCE_LEVEL:
            reasons.append(
                f"warm-up covariance against H⁻¹: whitened spectrum {spectrum[0]:.2f} to "
                f"{spectrum[-1]:.2f} (1 in the Gaussian picture; Monte Carlo error with "
                f"{n_eff:.0f} effective draws allows about {bounds[0]:.2f} to {bounds[1]:.2f}); "
                f"test of equality p = {p_value:.1e}")
        # the metric is learned from draws only when the Gaussian picture itself is refuted
        # (k̂, or the warm-up covariance against H⁻¹); a family's own check (the random
        # walk's adapted scale against the theory) is answered by its settling phase
        refuted = bool(reasons)
        reasons.extend(phase1.reasons)
        do_reshape = refuted if reshape is None else bool(reshape)
        if tuning0.shape_kind == "identity":
            do_reshape = False
        notes, tuning1, state, window = [], None, phase1.state, 0
        if do_reshape and reshape is None and fit.fisher_source == "draws":
            do_reshape = False  # no mode: start() learned the metric from 1000 steps' draws
            notes.append("The metric was not learned again: start() learned it from the "
                         "draws of its window adaptation (the posterior has no mode); a "
                         "shorter window from the same chains would not do better.")
        if do_reshape:  # the metric learned from draws (prepare/metric_repair.py)
            why = "; ".join(reasons) if reasons else "reshape=True was asked"
            switch = redecide(tuning0.sampler, chosen_by_auto(walker), p_value < COVARIANCE_LEVEL,
                              khat, k_limit)
            step0, aim0 = window_start(family, tuning0, phase1, switch)
            learned, _ = repair_metric(walker, context, phase1, state,
                                       jax.random.fold_in(key, 3), step0, aim0, switch)
            if switch:  # "auto" chose on a picture the warm-up refuted: NUTS instead
                return _switched(walker, learned, switch, learned_words(learned, why),
                                 phase1, (half, khat, k_limit, outside, spectrum, bounds,
                                          p_value, n_eff, tuple(reasons)))
            shape, precision_chol = learned_factors(learned, tuning0)
            tuning1, engine, state = family.reshape(
                context, phase1, flat_logdensity(walker.model), fit.mode_flat, walker.chains,
                learned, shape, precision_chol)
            context = context._replace(model=walker.model._replace(engine=engine))
            notes.append(learned_words(learned, why))
            window = learned.steps
        settled = family.settle(context, key, tuning1, state, phase1, half, tuple(reasons),
                                do_reshape)
    finally:
        if bar is not None:
            bar.close()
    final = settled.tuning
    fisher_spectrum = np.sort(
        np.linalg.svd(np.asarray(fit.cholesky).T @ np.asarray(final.shape), compute_uv=False) ** 2
    )
    name = family.parameter
    warm = WarmupReport(
        settled.steps + window, khat, k_limit, outside, name, float(getattr(tuning0, name)),
        float(phase1.value), float(getattr(final, name)), float(settled.target),
        float(phase1.acceptance), float(settled.acceptance), spectrum, bounds, p_value,
        n_eff, do_reshape, settled.reasons, fisher_spectrum,
        tuple(notes) + settled.notes, phase1.divergent + settled.divergent)
    return walker._replace(state=settled.state, tuning=final, model=context.model,
                           report=walker.report._replace(warmup=warm))
