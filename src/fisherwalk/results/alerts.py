"""The rules that turn a summary's numbers into warnings, and the way numbers are shown.

Each rule reads figures that the summary also prints, and each warning quotes them as
the table and the header show them (the same rounding, the same target), so a warning
never contradicts the numbers above it. A warning says what is wrong, where, and what
to do.

Thresholds: R-hat above 1.01 and bulk or tail ESS below 400 follow Vehtari, Gelman,
Simpson, Carpenter & Bürkner (2021), "Rank-normalization, folding, and localization: an
improved R-hat for assessing convergence of MCMC", Bayesian Analysis 16(2). The
stuck-chain, separated-chain, acceptance and correlation rules are fisherwalk's own
(common practice, no published source); each is spelled out in its function.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from . import divergences

__all__ = [
    "rhat_text",
    "ess_text",
    "excluded_warning",
    "rhat_warnings",
    "ess_warnings",
    "stuck_warnings",
    "separated_chains",
    "fault_warnings",
    "acceptance_warning",
    "correlated_pairs",
    "correlation_warning",
    "divergence_warning",
]

MAX_LISTED = 8  # items named in one warning before "and N more"
STUCK_ACCEPTANCE = 0.01  # absolute floor of a moving chain's acceptance
STUCK_RATIO = 0.2  # ... and the fraction of the other chains' median acceptance
APART_NOISE = 5.0  # separated chain: difference beyond 5 Monte Carlo standard errors
APART_SPREAD = 2.0  # ... and beyond 2 within-chain standard deviations of the others
ACCEPTANCE_NOISE = 4.0  # acceptance departs: beyond 4 Monte Carlo errors ...
ACCEPTANCE_SLACK = 0.005  # ... plus this much
ACCEPTANCE_MIN_DRAWS = 20  # fewer draws per chain: no acceptance rule
SAME_TARGET = 5e-4  # a target within this of the Gaussian prediction is that prediction
CORRELATION_LIMIT = 0.95  # |posterior correlation| above this is worth a word ...
RESIDUAL_LIMIT = 0.5  # ... when the proposal leaves more than this after whitening


def _warn(what: str, todo: str) -> str:
    return f"{what} What to do: {todo}"


def _join(items) -> str:
    items = [str(i) for i in items]
    if len(items) > MAX_LISTED:
        return ", ".join(items[:MAX_LISTED]) + f" and {len(items) - MAX_LISTED} more"
    return ", ".join(items)


def rhat_text(value: float, limit: float) -> str:
    """R-hat with 3 decimals, or more when 3 would put it on the wrong side of ``limit``
    (1.0104 shows as 1.0104, not as 1.010, beside a warning "above 1.01")."""
    if not math.isfinite(value):
        return str(value)
    for places in range(3, 10):
        text = f"{value:.{places}f}"
        if (float(text) > limit) == (value > limit):
            return text
    return repr(value)


def ess_text(value: float) -> str:
    """ESS rounded down (399.7 shows as 399, below a threshold of 400, as it is)."""
    return str(value) if not math.isfinite(value) else str(math.floor(value))


def excluded_warning(chains: Sequence[int]) -> str:
    """Chains left out of every statistic because they hold NaN or inf draws."""
    return _warn(
        f"Chain(s) {_join(chains)} hold NaN or inf draws and were left out of every "
        "statistic below.",
        "The sampler should never produce a non-finite position; check the model's "
        "transforms and the starting points of those chains.")


def rhat_warnings(names: Sequence[str], rh: np.ndarray, limit: float) -> list[str]:
    """R-hat undefined (every chain constant) or above ``limit``."""
    out = []
    undefined = [names[j] for j in np.nonzero(~np.isfinite(rh))[0]]
    if undefined:
        out.append(_warn(
            f"R-hat is undefined or infinite for {_join(undefined)}: every chain stayed "
            "constant in these parameters.",
            "the chains did not move; see the acceptance rates and restart or refine() "
            "the walker before trusting any estimate."))
    high = np.nonzero(np.isfinite(rh) & (rh > limit))[0]
    if high.size:
        order = high[np.argsort(-rh[high])]
        listed = [f"{names[j]} ({rhat_text(rh[j], limit)})" for j in order]
        out.append(_warn(
            f"R-hat above {limit} for {high.size} parameter(s): {_join(listed)}. The chains "
            "disagree about these parameters.",
            "run longer; if R-hat stays high, look at the per-chain traces for a stuck or "
            "separated chain (see the other warnings)."))
    return out


def ess_warnings(names: Sequence[str], ess_b: np.ndarray, ess_t: np.ndarray, limit: float,
                 chains: int, count: int) -> list[str]:
    """Bulk or tail ESS below ``limit``, with the draws per chain that would reach it."""
    worst = np.minimum(ess_b, ess_t)
    low = np.nonzero(worst < limit)[0]
    if not low.size:
        return []
    order = low[np.argsort(worst[low])]
    listed = [f"{names[j]} ({ess_text(worst[j])})" for j in order]
    lowest = float(worst[order[0]])
    what = (f"Bulk or tail ESS below {limit:.0f} for {low.size} parameter(s): "
            f"{_join(listed)}.")
    if lowest <= 0:
        return [_warn(what + " An ESS of 0 means a parameter never moved in any chain.",
                      "running longer will not help until the chains move: check the "
                      "acceptance rates, and whether the proposal has any spread in the "
                      "direction of that parameter (its Fisher information).")]
    needed = math.ceil(count * limit / lowest)
    return [_warn(
        what + f" At the current {lowest / (chains * count):.3g} effective draws per draw, "
        f"reaching {limit:.0f} needs roughly {needed} draws per chain (now {count}).",
        f"run about {needed} draws per chain (or proportionally more chains).")]


def _median_of_others(values: np.ndarray) -> np.ndarray:
    """For each entry, the median of all the other entries (one sort: O(n log n))."""
    size = values.size
    order = np.argsort(values, kind="stable")
    ranked = values[order]
    rank = np.empty(size, dtype=np.int64)
    rank[order] = np.arange(size)
    rest = size - 1
    low, high = (rest - 1) // 2, rest // 2  # positions among the others
    first = ranked[low + (low >= rank)]
    second = ranked[high + (high >= rank)]
    return (first + second) / 2.0


def stuck_warnings(chains: int, frozen: set[int], acceptance: np.ndarray | None) -> list[str]:
    """A chain is stuck when its acceptance is below 1%, or below a fifth of the median
    acceptance of the other chains, or its draws never change (``frozen``, a set)."""
    low, reference = set(), None
    if acceptance is not None:
        if chains > 1:
            reference = _median_of_others(acceptance)
        for c in range(chains):
            if acceptance[c] < STUCK_ACCEPTANCE or (
                reference is not None and acceptance[c] < STUCK_RATIO * reference[c]
            ):
                low.add(c)
    out = []
    for c in sorted(set(frozen) | low):
        detail = []
        if acceptance is not None:
            text = f"acceptance {acceptance[c]:.3f}"
            if reference is not None:
                text += f" against a median of {reference[c]:.3f} for the other chains"
            detail.append(text)
        if c in frozen:
            detail.append("its draws never change")
        out.append(_warn(
            f"Chain {c} is stuck: {'; '.join(detail)}. Its draws describe little more "
            "than its starting point.",
            "check where it started; a chain stuck far out in the tails or in a narrow "
            "region needs a better start or a reshaped proposal (refine()); drop it only if "
            "you understand why it stuck."))
    return out


def _leave_one_out(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sum over the other rows of (rows, d) values, and whether any other row is inf."""
    infinite = ~np.isfinite(values)
    finite = np.where(infinite, 0.0, values)
    others_inf = (infinite.sum(axis=0) - infinite) > 0
    return finite.sum(axis=0) - finite, others_inf


def separated_chains(names: Sequence[str], used: Sequence[int], chain_means: np.ndarray,
                     chain_sds: np.ndarray, chain_mcse: np.ndarray,
                     frozen: np.ndarray) -> list[str]:
    """A chain sits apart when, in some parameter, its mean differs from the mean of all
    the other chains by more than 5 Monte Carlo standard errors of that difference *and*
    by more than 2 within-chain standard deviations of the other chains.

    Linear in the chains: the other chains' mean, spread and standard error come from
    leave-one-out sums of per-chain figures (``(chains, d)`` arrays over the ``used``
    chains). The squared standard error of the other chains' mean is the larger of
    sum(MCSE_c²) / (m - 1)² (independent chains, each MCSE from the chain's own ESS) and
    var(their means) / (m - 1) (what their disagreement says, so that a chain is not
    called apart from others that disagree among themselves), m the number of chains;
    chance alone almost never triggers the rule.
    """
    count = len(used)
    if count < 2:
        return []
    centred = chain_means - chain_means.mean(axis=0)  # leave-one-out sums without cancellation
    others_sum = centred.sum(axis=0) - centred
    diff = centred - others_sum / (count - 1)
    squared, noisy = _leave_one_out(chain_mcse**2)
    with np.errstate(invalid="ignore"):
        noise2 = np.where(noisy, np.inf, squared) / (count - 1) ** 2
    if count > 2:
        others_sq = (centred**2).sum(axis=0) - centred**2
        between = (others_sq - others_sum**2 / (count - 1)) / (count - 2)
        noise2 = np.maximum(noise2, np.maximum(between, 0.0) / (count - 1))
    with np.errstate(invalid="ignore"):
        noise = np.sqrt(chain_mcse**2 + noise2)
    variances, _ = _leave_one_out(chain_sds**2)
    spread = np.sqrt(np.maximum(variances, 0.0) / (count - 1))
    apart = (np.abs(diff) > APART_NOISE * noise) & (np.abs(diff) > APART_SPREAD * spread)
    out = []
    for i, c in enumerate(used):
        hit = np.nonzero(apart[i])[0]
        if frozen[i] or not hit.size:
            continue  # a frozen chain is reported as stuck
        with np.errstate(divide="ignore"):
            gap = np.abs(diff[i]) / spread[i]
        order = hit[np.argsort(-gap[hit])]
        listed = [f"{names[j]} ({gap[j]:.1f} sd away)" for j in order]
        out.append(_warn(
            f"Chain {c} sits apart from the other chains in {hit.size} parameter(s): "
            f"{_join(listed)}, with sd the within-chain standard deviation of the other "
            "chains. This looks like a second mode, or chains that have not mixed yet.",
            "plot the traces of these parameters; if the posterior has several modes, "
            "random-walk Metropolis will not move between them: report them separately "
            "or reparameterise; otherwise run longer."))
    return out


def fault_warnings(faults: np.ndarray | None, *, gradient: bool = False) -> list[str]:
    """Proposals rejected for a NaN or +inf log density, per chain (``gradient``: a
    gradient sampler, whose faults are also non-finite gradients)."""
    if faults is None or not np.any(faults > 0):
        return []
    hit = [f"chain {c}: {int(faults[c])}" for c in range(faults.size) if faults[c] > 0]
    what = ("a NaN or +inf log density, or a gradient that is not finite (NaN or inf: the "
            "log density is not differentiable there)," if gradient
            else "a NaN or +inf log density")
    return [_warn(
        f"{int(faults.sum())} proposal(s) had {what} and were "
        f"rejected ({', '.join(hit)}).",
        "a NaN usually means the model is evaluated outside its domain (a negative "
        "scale, the log of a negative number): sample such parameters on an "
        "unconstrained scale (e.g. log sigma) or guard the log density; +inf means the "
        "density is unbounded there.")]


def acceptance_warning(realised: float, error: float, target: float, draws: int,
                       scale: float | None = None,
                       gaussian: float | None = None, *,
                       band: tuple[float, float] | None = None,
                       label: str = "scale") -> str | None:
    """The realised acceptance departs from what the header says it should be.

    A departure is a gap beyond 4 Monte Carlo errors (``error``, the MCSE of the pooled
    acceptance from its ESS) plus 0.005, *and* beyond the theory's own tolerance: the
    realised acceptance, widened by the same 4 errors, lies outside ``band``, the
    acceptances at which the Gaussian limit keeps 80% of its best jump
    (:func:`fisherwalk.theory.tolerance.acceptance_band`). Inside the band the mismatch is
    real but costs little (the jump is flat near its optimum), so it is not worth a
    warning. ``target`` is the acceptance expected at the
    scale used: the Gaussian picture's prediction at that scale, or, when the warm-up
    moved the scale (``gaussian``, the Gaussian picture's acceptance at the scale used,
    then differs from ``target``), the acceptance the adaptation aimed for. In the
    second case the chains must depart from both numbers: accepting as the Gaussian
    picture predicts at the scale used means only that the short adaptation stopped
    a little off its aim, which costs little (the jump is flat near its optimum). The
    warning quotes the numbers as the header shows them. No rule below 20 draws per chain.
    """
    tolerance = ACCEPTANCE_NOISE * error + ACCEPTANCE_SLACK
    if draws < ACCEPTANCE_MIN_DRAWS or abs(realised - target) <= tolerance:
        return None
    if band is not None and band[0] <= realised + tolerance and realised - tolerance <= band[1]:
        return None
    at = "" if scale is None else f" at {label} {scale:.4g}"
    what = (f"The realised acceptance {realised:.3f} (Monte Carlo error {error:.3f}) departs "
            f"from the target {target:.3f}{at} shown above")
    rule = (f", by more than {ACCEPTANCE_NOISE:.0f} Monte Carlo errors + {ACCEPTANCE_SLACK}"
            + ("." if band is None else f", and lies outside {band[0]:.3f} to {band[1]:.3f}, "
               "the theory's tolerance (an acceptance that costs little efficiency)."))
    if gaussian is None or abs(gaussian - target) <= SAME_TARGET:
        return _warn(
            what + rule + " That target is what the Gaussian picture N(mode, H⁻¹) predicts "
            f"at this {label}, so the posterior is not shaped like its Laplace approximation "
            "here.",
            f"the tuning is approximate: run refine() to adapt the {label}, compare the "
            "marginals with the Gaussian curves (plots.save_all), and draw more if the ESS "
            "is short.")
    if abs(realised - gaussian) <= tolerance:
        return None
    return _warn(
        what + f" and from the {gaussian:.3f} that the Gaussian picture predicts at this "
        f"{label}" + rule + f" The warm-up adapted the {label} to reach that target, so the "
        "chains now accept differently from the warm-up's, and not as the Gaussian picture "
        "says either.",
        "the warm-up may have been too short, or the chains have moved to a region it did "
        "not see: refine() again with more steps, and check the traces.")


def correlated_pairs(correlation: np.ndarray, proposal_correlation: np.ndarray, *,
                     limit: float = CORRELATION_LIMIT,
                     residual_limit: float = RESIDUAL_LIMIT) -> list[tuple]:
    """Parameter pairs strongly correlated in the posterior that the proposal does not follow.

    For a pair with posterior correlation r and proposal correlation c (from the
    proposal's covariance S Sᵀ), whitening the pair by the proposal leaves the
    correlation w = |r - c| / (1 - r c) (the two 2x2 correlation matrices share their
    eigenvectors; w = tanh|atanh r - atanh c|). The pair is reported when |r| > 0.95
    and w > 0.5. Why 0.5: seen by the proposal, the pair's posterior has eigenvalues in
    the ratio (1 + w) / (1 - w), and in the large-d form of the per-direction jump J_i
    of :mod:`fisherwalk.theory.randomwalk` (Gaussian algebra) a direction's jump at the best scale
    is proportional to its eigenvalue of A = Sᵀ H S over their mean; for the pair's two
    directions alone that is 1 - w of a matched proposal's jump along the ridge, and
    w > 0.5 means less than half (fisherwalk's own threshold, no published source;
    with other, matched directions the loss is smaller). A diagonal
    proposal (c = 0) is reported for every |r| > 0.95; c = 0.9 covers r = 0.95
    (w = 0.34) but not r = 0.99 (w = 0.83).

    Returns
    -------
    list of (i, j, r, c, w), the largest w first.
    """
    corr = np.asarray(correlation, dtype=float)
    prop = np.asarray(proposal_correlation, dtype=float)
    rows, cols = np.triu_indices(corr.shape[0], 1)
    r, c = corr[rows, cols], prop[rows, cols]
    with np.errstate(divide="ignore", invalid="ignore"):
        left = np.abs(r - c) / (1.0 - r * c)
    hit = np.nonzero((np.abs(r) > limit) & (left > residual_limit))[0]  # nan compares False
    hit = hit[np.argsort(-left[hit], kind="stable")]
    return [(int(rows[k]), int(cols[k]), float(r[k]), float(c[k]), float(left[k])) for k in hit]


def correlation_warning(names: Sequence[str], pairs: list[tuple]) -> str | None:
    """One warning naming the pairs of :func:`correlated_pairs`."""
    if not pairs:
        return None
    listed = [f"{names[i]} and {names[j]} (posterior {r:+.3f}, proposal {c:+.3f}, "
              f"{w:.3f} left after whitening)" for i, j, r, c, w in pairs]
    return _warn(
        f"{len(pairs)} pair(s) of parameters are correlated beyond ±{CORRELATION_LIMIT} "
        f"in the posterior and the proposal's shape does not follow: {_join(listed)}. "
        "The random walk steps across the narrow ridge and crawls along it.",
        "use the Fisher-information shape (start(shape='fisher'), the default) or let "
        "refine() re-estimate the shape from warm-up draws; or reparameterise the pair "
        "(e.g. sample their sum and difference).")


def divergence_warning(divergent: np.ndarray | None, flat: np.ndarray | None = None,
                       names: tuple[str, ...] = (), aim: float | None = None) -> str | None:
    """Divergent transitions of HMC or NUTS (BlackJAX flags a transition whose leapfrog
    energy error exceeded 1000), counted over the whole run; with the draws ``flat``
    (chains, draws, d) and their ``names``, where they gather and the remedy that fits
    (a funnel: the non-centred form; elsewhere: a higher target acceptance than ``aim``,
    :mod:`fisherwalk.results.divergences`)."""
    if divergent is None or not np.any(divergent):
        return None
    if flat is not None:
        return divergences.divergence_warning(np.asarray(flat), np.asarray(divergent),
                                              tuple(names), aim)
    count, total = int(np.sum(divergent)), int(np.size(divergent))
    return _warn(
        f"{count} of {total} transitions were divergent (the leapfrog energy error exceeded "
        "1000): the sampler met curvature its step size cannot follow, and the draws near "
        "there may be biased. Where: the whole run.",
        "look for a funnel or a boundary in the posterior; reparametrise, or run refine() "
        "again (a smaller step) and compare.")
