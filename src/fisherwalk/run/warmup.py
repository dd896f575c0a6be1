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
   are forgotten (:mod:`fisherwalk.run.metric_repair`); the scale and target acceptance
   are recomputed for the new shape (:func:`fisherwalk.optimal_scale` with the spectrum
   of A = Sᵀ P S, P the precision the walker now believes). When a check fails, phase 2
   (the other half) adapts the scale again, and the final scale is the average of the
   adapted log scale over the second half of phase 2 (Polyak & Juditsky 1992, SIAM J.
   Control Optim. 30(4)). When "auto" chose the random walk or MALA and the covariance
   check fails, the walker switches to NUTS with the learned metric
   (:func:`fisherwalk.run.evidence.redecide`).

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
from ..base.keys import as_key, stream
from ..results.diagnostics import ess_mean
from ..theory.gradient import NUTS_TARGET_ACCEPTANCE
from . import engine
from .draws_warmup import metric_factors
from .engine import DEFAULT_CHUNK, ChainState, run_chunks
from .evidence import redecide
from .gradient_run import dual_averaging_target, gradient_model, gradient_state, warm_gradient
from .metric_repair import learn_metric, learned_words, nuts_from_learned, positions_of
from .progress import progress_bar
from .start import tuning_for
from .walker import Walker, continuable_state

ADAPTATION_RATE = 1.0  # Robbins-Monro gain constant: gain_t = rate * (t + 1)^-0.6
SCALE_TOLERANCE = 0.10  # |log(adapted / predicted scale)| beyond this says the picture is off
COVARIANCE_LEVEL = 1e-3  # level of the test that the whitened warm-up covariance is I
GRADIENT_WARMUP = 200  # steps of a gradient sampler's warm-up: dual averaging settles in ~100
LATE_ADAPTATION = 50  # a third phase starts its gain at (50 + 1)^-0.6: near the optimum already


class WarmupReport(NamedTuple):
    """What the warm-up measured, decided and changed."""

    steps: int  # warm-up steps per chain
    khat: float  # PSIS k̂ of the posterior against the Laplace approximation
    khat_threshold: float  # min(1 - 1/log10 S, 0.7)
    outside_support: int  # Laplace draws where the log density was not finite
    scale_start: float  # scale before the warm-up
    scale_phase1: float  # adapted scale at the end of phase 1
    scale_final: float  # the refined scale
    target_acceptance: float  # the acceptance the adaptation aimed for (final shape)
    acceptance_phase1: float  # mean acceptance probability in phase 1 (second half)
    acceptance_final: float  # mean acceptance probability in phase 2 (second half)
    covariance_spectrum: np.ndarray  # eigenvalues of Lᵀ Σ̂ L (ones in the Gaussian picture)
    spectrum_bounds: tuple[float, float]  # what Monte Carlo error allows for them
    covariance_p_value: float  # likelihood-ratio test of whitened covariance = I
    effective_draws: float  # n_eff of the phase-1 draws (median over whitened coordinates)
    reshaped: bool  # whether the proposal shape was re-estimated
    reasons: tuple[str, ...]  # which checks failed
    fisher_spectrum: np.ndarray  # eigenvalues of Sᵀ H S for the final shape S
    notes: tuple[str, ...]  # plain-language account for the report


def _run_phase(walker, noise_key, state, factor, steps, adapt_from, target, bar,
               rate_constant=ADAPTATION_RATE):
    """Adapt the scale multiplier for ``steps`` steps; return draws and the path."""
    dtype = np.asarray(state.logdensity).dtype
    pieces, rates, paths = [], [], []
    ctrl = engine.control(log_multiplier=0.0, target=target, rate=rate_constant,
                          adapt_step=adapt_from, dtype=dtype)
    for keep, out in run_chunks(walker.engine, noise_key, state, factor, ctrl, steps):
        state = out.state
        pieces.append(np.asarray(out.position))
        rates.append(np.asarray(out.acceptance_rate))
        paths.append(np.asarray(out.log_multiplier_path))
        if bar is not None:
            bar.update(keep)
    draws = np.swapaxes(np.concatenate(pieces), 0, 1)  # (chains, steps, d)
    rate = np.concatenate(rates)  # (steps, chains)
    path = np.concatenate(paths)  # (steps,)
    half = steps // 2
    # Acceptance: over the second half while adapting (the scale has settled), over the
    # whole phase at a fixed scale; with its Monte Carlo error (ESS of the probabilities).
    used = rate if rate_constant == 0.0 else rate[half:]
    mcse = float(used.std() / math.sqrt(max(float(ess_mean(used.T)), 1.0)))
    return state, draws, float(used.mean()), float(path[half:].mean()), mcse


def _khat_words(khat: float, limit: float) -> str:
    """PSIS k̂ in words; -inf means the importance ratios were all equal; NaN that there
    was no Laplace approximation to check (no mode: :mod:`fisherwalk.run.modeless`)."""
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


def _switched(walker: Walker, learned, switch: str, learned_note: str, measured) -> Walker:
    """A NUTS walker with the learned metric, replacing a choice the warm-up refuted.

    ``measured``: (steps, k̂, threshold, outside, start scale, phase-1 scale, phase-1
    acceptance, spectrum, bounds, p-value, n_eff, reasons) of the phase already run."""
    (steps, khat, k_limit, outside, scale0, scale1, acc1, spectrum, bounds, p_value,
     n_eff, reasons) = measured
    tuning, model, state = nuts_from_learned(walker, learned,
                                             getattr(walker.tuning, "aim", None))
    notes = (switch, learned_note)
    warm = WarmupReport(
        steps + learned.steps, khat, k_limit, outside, scale0, scale1, learned.step_size,
        learned.target_acceptance, acc1, learned.acceptance, spectrum, bounds, p_value,
        n_eff, True, reasons, tuning.spectrum, notes)
    return walker._replace(state=state, tuning=tuning, model=model,
                           report=walker.report._replace(warmup=warm))


def _refine_gradient(walker: Walker, key, steps: int, reshape: bool | None) -> Walker:
    """The warm-up of a gradient sampler: two phases of dual averaging of the shared step
    size (:mod:`fisherwalk.run.stepsize`), the Gaussian-picture checks between them, and
    the metric re-estimated (shrunk toward H⁻¹) when a check fails."""
    steps = min(steps, GRADIENT_WARMUP)
    half = max(DEFAULT_CHUNK, steps // 2 // DEFAULT_CHUNK * DEFAULT_CHUNK)
    tuning0, fit, check = walker.tuning, walker.report.laplace, walker.report.check
    names = walker.names
    warm1 = warm_gradient(walker.model, tuning0, jax.random.fold_in(key, 1), walker.state,
                          half, names)
    within = len(getattr(fit, "modes_flat", ())) > 1
    cov, spectrum, bounds, n_eff, p_value = _covariance_check(
        warm1.position, np.asarray(fit.cholesky), within=within, squares=True)
    reasons = []
    if check.khat > check.threshold:
        reasons.append(f"PSIS k̂ = {check.khat:.2f} > {check.threshold:.2f}: the Laplace "
                       "approximation misses the posterior's tails")
    if p_value < COVARIANCE_LEVEL:
        reasons.append(
            f"warm-up covariance against H⁻¹: whitened spectrum {spectrum[0]:.2f} to "
            f"{spectrum[-1]:.2f} (Monte Carlo error with {n_eff:.0f} effective draws allows "
            f"about {bounds[0]:.2f} to {bounds[1]:.2f}); test of equality p = {p_value:.1e}")
    do_reshape = (bool(reasons) if reshape is None else bool(reshape)) and (
        tuning0.shape_kind != "identity")
    model, state, notes = walker.model, warm1.state, []
    tuning1 = tuning0._replace(step_size=warm1.step_size)
    if do_reshape:  # the metric learned from draws (run/metric_repair.py)
        switch = redecide(tuning0.sampler, chosen_by_auto(walker), p_value < COVARIANCE_LEVEL,
                          check.khat, check.threshold)
        learned = learn_metric(
            walker, positions_of(walker, warm1.state), jax.random.fold_in(key, 3),
            step_size=warm1.step_size,
            target_acceptance=(NUTS_TARGET_ACCEPTANCE if switch
                               else dual_averaging_target(tuning0)))
        if switch:
            return _switched(walker, learned, switch, learned_words(
                learned, "; ".join(reasons)), (half, check.khat, check.threshold,
                                               check.outside_support, tuning0.step_size,
                                               warm1.step_size, warm1.acceptance, spectrum,
                                               bounds, p_value, n_eff, tuple(reasons)))
        shape, precision_chol = metric_factors(learned.inverse_mass_matrix)
        dtype = np.asarray(tuning0.shape).dtype
        tuning1 = tuning1._replace(shape=shape.astype(dtype), step_size=learned.step_size,
                                   whitening=precision_chol.astype(dtype),
                                   shape_kind="warm-up")
        model = gradient_model(walker.model, tuning1, fit.mode_flat, walker.chains)
        state = gradient_state(model, learned.position.astype(dtype), names)
        notes.append(learned_words(learned, "; ".join(reasons) if reasons
                                   else "reshape=True was asked"))
    elif reasons:
        notes.append("Kept the metric H⁻¹ although " + "; ".join(reasons) + ".")
    else:
        notes.append("Every check agreed with the Gaussian picture: kept the metric H⁻¹.")
    warm2 = warm_gradient(model, tuning1, jax.random.fold_in(key, 2), state, half, names)
    final = tuning1._replace(step_size=warm2.step_size)
    target = dual_averaging_target(tuning0)
    notes.append(
        f"Step size {tuning0.step_size:.4g} (start) -> {warm1.step_size:.4g} -> "
        f"{warm2.step_size:.4g} by dual averaging toward acceptance {target:.3f}; acceptance "
        f"in the second half {warm2.acceptance:.3f} (Monte Carlo error "
        f"{warm2.acceptance_mcse:.3f}); " + _khat_words(check.khat, check.threshold) + ".")
    divergent = int(warm1.divergent.sum() + warm2.divergent.sum())
    if divergent:
        notes.append(f"{divergent} divergent transitions in the warm-up.")
    warm = WarmupReport(
        2 * half, check.khat, check.threshold, check.outside_support, tuning0.step_size,
        warm1.step_size, warm2.step_size, float(target), warm1.acceptance, warm2.acceptance,
        spectrum, bounds, p_value, n_eff, do_reshape, tuple(reasons), final.spectrum,
        tuple(notes))
    return walker._replace(state=warm2.state, tuning=final, model=model,
                           report=walker.report._replace(warmup=warm))


def refine(
    walker: Walker,
    rng_key: jax.Array,
    steps: int = 400,
    *,
    reshape: bool | None = None,
    progress: bool | None = None,
) -> Walker:
    """Warm up a walker: adapt the scale, check the Gaussian picture, reshape if needed.

    Parameters
    ----------
    walker
        From :func:`fisherwalk.start`.
    rng_key
        JAX key (typed or old-style).
    steps
        Warm-up steps per chain, rounded up to a multiple of 200 (two phases of whole
        chunks). The default, 400, is justified in the module docstring.
    reshape
        ``None`` (default): re-estimate the proposal shape only when a check fails;
        ``True``: always; ``False``: never (the scale still adapts).
    progress
        Progress bar; default only when standard error is a terminal.

    Returns
    -------
    Walker
        A new walker (nothing mutated): refined tuning, chains at their warm-up end,
        and ``report.warmup`` (:class:`WarmupReport`) saying what was done and why.
    """
    steps = whole_number(steps, "steps", "refine(steps=...)")
    if isinstance(walker, Walker) and walker.gradient:
        continuable_state(walker, "refine()")
        return _refine_gradient(walker, as_key(rng_key, where="refine(rng_key=...)"), steps,
                                reshape)
    block = 2 * DEFAULT_CHUNK
    steps = int(math.ceil(steps / block) * block)
    key = as_key(rng_key, where="refine(rng_key=...)")
    state = continuable_state(walker, "refine()")
    tuning0 = walker.tuning
    fit = walker.report.laplace
    check = walker.report.check
    khat, k_limit, outside = check.khat, check.threshold, check.outside_support
    bar = progress_bar(steps, progress, "warm-up")
    half = steps // 2
    try:
        state, draws, acc1, log_m1, _ = _run_phase(
            walker, stream(key, 1), state, tuning0.factor, half, 0,
            tuning0.choice.acceptance, bar)
        several = len(getattr(fit, "modes_flat", ())) > 1
        cov, spectrum, bounds, n_eff, p_value = _covariance_check(
            draws, np.asarray(fit.cholesky), within=several)
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
        theory = tuning0.choice.scale  # the optimum for this shape in the Gaussian picture
        scale1 = tuning0.scale * math.exp(log_m1)
        if abs(math.log(scale1 / theory)) > SCALE_TOLERANCE:
            reasons.append(f"the adapted scale {scale1:.3f} is {scale1 / theory:.2f} x the "
                           f"predicted optimum {theory:.3f}")
        do_reshape = bool(reasons) if reshape is None else bool(reshape)
        if tuning0.shape_kind == "identity":
            do_reshape = False
        notes = []
        if do_reshape:  # the shape learned from draws (run/metric_repair.py)
            learned = learn_metric(walker, np.asarray(state.position),
                                   jax.random.fold_in(key, 3))
            why = "; ".join(reasons) if reasons else "reshape=True was asked"
            switch = redecide("rwm", chosen_by_auto(walker), p_value < COVARIANCE_LEVEL,
                              khat, k_limit)
            if switch:  # "auto" chose on a picture the warm-up refuted: NUTS instead
                if bar is not None:
                    bar.close()
                return _switched(walker, learned, switch, learned_words(learned, why),
                                 (half, khat, k_limit, outside, tuning0.scale,
                                  tuning0.scale * math.exp(log_m1), acc1, spectrum, bounds,
                                  p_value, n_eff, tuple(reasons)))
            shape, precision_chol = metric_factors(learned.inverse_mass_matrix)
            dtype = np.asarray(tuning0.shape).dtype
            tuning1 = tuning_for(shape.astype(dtype), "warm-up", precision_chol.astype(dtype))
            # phase 2 continues from the window warm-up's chains, which have travelled
            # further into the tails than phase 1's: its scale then fits the whole posterior
            state = ChainState(learned.position.astype(dtype),
                               learned.logdensity.astype(dtype))
            notes.append(learned_words(learned, why))
            log_m_start, rate = 0.0, ADAPTATION_RATE
        elif reasons:
            tuning1 = tuning0
            log_m_start, rate = log_m1, ADAPTATION_RATE
            notes.append("Kept the proposal shape; the scale keeps adapting because "
                         + "; ".join(reasons) + ".")
        else:
            # Every check agrees with the Gaussian picture, where the theoretical scale is
            # exact: keep it (the adapted one differs from it only by Monte Carlo noise)
            # and let phase 2 measure the acceptance at that scale.
            tuning1 = tuning0._replace(scale=float(theory))
            log_m_start, rate = 0.0, 0.0
            notes.append("Every check agreed with the Gaussian picture: kept the proposal "
                         f"shape and the theoretical scale {theory:.3f}.")
        target = tuning1.choice.acceptance  # the optimum for this shape
        state2, _, acc2, log_m2, mcse2 = _run_phase(
            walker, stream(key, 2), state,
            tuning1.factor * math.exp(log_m_start),
            half, half, target, bar, rate)
        if rate == 0.0 and abs(acc2 - target) > 3.0 * mcse2:
            # At the theoretical scale the chains accept more or less often than the
            # Gaussian picture predicts, beyond Monte Carlo error: take the adapted scale.
            reasons.append(
                f"at the theoretical scale the acceptance was {acc2:.3f}, not the predicted "
                f"{target:.3f} (Monte Carlo error {mcse2:.3f})")
            if bar is not None:  # the third phase adds steps to the bar's total
                bar.total += half
                bar.refresh()
            notes[-1] = ("Kept the proposal shape; adapted the scale in a third phase of "
                         f"{half} steps because " + reasons[-1] + ".")
            state2, _, acc2, log_m2, _ = _run_phase(
                walker, stream(key, 3), state2, tuning1.factor, half, LATE_ADAPTATION, target,
                bar)
            steps += half
    finally:
        if bar is not None:
            bar.close()
    scale_final = tuning1.scale * math.exp(log_m_start + log_m2)
    final = tuning1._replace(scale=float(scale_final))
    fisher_spectrum = np.sort(
        np.linalg.svd(np.asarray(fit.cholesky).T @ np.asarray(final.shape), compute_uv=False) ** 2
    )
    aimed = f"aimed at {target:.3f}, the optimum for this shape"
    if abs(final.target_acceptance - target) > 5e-4:  # the summary's target is this one
        aimed += (f"; at the refined scale the Gaussian picture predicts "
                  f"{final.target_acceptance:.3f}, the summary's target")
    notes.append(
        f"Scale {tuning0.scale:.3f} -> {scale_final:.3f}; acceptance in the last quarter "
        f"{acc2:.3f} ({aimed}); " + _khat_words(khat, k_limit) + ".")
    warm = WarmupReport(
        steps, khat, k_limit, outside, tuning0.scale, tuning0.scale * math.exp(log_m1),
        float(scale_final), float(target), acc1, acc2, spectrum, bounds, p_value, n_eff,
        do_reshape,
        tuple(reasons), fisher_spectrum, tuple(notes))
    state2 = ChainState(np.asarray(state2.position), np.asarray(state2.logdensity))
    return walker._replace(state=state2, tuning=final, report=walker.report._replace(warmup=warm))
