"""Convergence and efficiency diagnostics of Markov chains (numpy and scipy only).

Every chain-based function takes draws with the chain axis first and the draw axis
second, ``(chains, draws)`` for one scalar parameter or ``(chains, draws, d)`` for
``d`` of them, and returns a float or a ``(d,)`` array accordingly.

Conventions (documented once, used everywhere below)
----------------------------------------------------
* **Rank normalisation and splitting** follow Vehtari, Gelman, Simpson, Carpenter &
  Bürkner (2021), "Rank-normalization, folding, and localization: an improved R-hat
  for assessing convergence of MCMC", Bayesian Analysis 16(2): each chain is cut into
  its first and last halves (the middle draw is dropped when the count is odd), ranks
  are pooled over all draws and mapped through the normal quantile function with
  Blom's offset 3/8.
* **Autocorrelations are pooled across chains** as in that paper,
  ``rho_t = 1 - (W - mean_m acov_{m,t}) / var_plus`` with ``W`` the mean within-chain
  variance and ``var_plus = W (n-1)/n + B/n``; the autocovariances are the biased
  (divide by ``n``) FFT estimates. The sum is truncated with Geyer's initial positive
  sequence and made monotone (Geyer 1992, "Practical Markov chain Monte Carlo",
  Statistical Science 7(4)); the even autocorrelation just after the truncation point
  is added when positive, and the integrated time is floored at ``1/log10(N)`` so an
  ESS never exceeds ``N log10 N`` for ``N`` pooled draws (antithetic chains). These two
  details follow the reference code that accompanies Vehtari et al. (2021), recalled
  from memory and checked against arviz 0.23 in the tests. (One departure: when a
  split chain is so short that a single pair of lags is available and it is
  positive, that pair is kept, where the reference code would return the ESS cap.)
* **Stuck parameters.** When every chain is constant in a parameter (within-chain
  variance exactly zero), its ESS is 0, its integrated autocorrelation time and MCSE
  are ``inf``, and its R-hat is ``inf`` if the chains sit at different values and
  ``nan`` if all draws are identical (nothing to compare). arviz returns the number of
  draws as the ESS of a constant array; fisherwalk deliberately does not. A single
  constant chain among moving ones is pooled like any other chain: the folded R-hat
  exposes it and the summary names it.
* **Non-finite draws** (NaN or inf) raise :class:`~fisherwalk.errors.InputError`
  naming the chain, draw and parameter: no statistic is computed from them.
* Fewer than 4 draws per chain raise :class:`~fisherwalk.errors.InputError`.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from scipy import special, stats
from scipy.fft import next_fast_len

from ..base.checks import whole_number
from ..errors import InputError, explain

__all__ = [
    "rhat",
    "ess_bulk",
    "ess_tail",
    "ess_mean",
    "integrated_autocorrelation_time",
    "autocorrelation",
    "mcse_mean",
    "pareto_khat",
    "khat_threshold",
    "whitened_jump",
    "WhitenedJump",
]

_MIN_DRAWS = 4
_BLOCK_ELEMENTS = 4_000_000  # FFT work arrays are processed in parameter blocks of this size


# ---------------------------------------------------------------------------------------
# input handling
# ---------------------------------------------------------------------------------------


def _as_draws(x, where: str) -> tuple[np.ndarray, bool]:
    """Validate draws; return a float array (chains, draws, d) and whether d was absent."""
    try:
        arr = np.asarray(x, dtype=float)
    except (TypeError, ValueError) as err:
        raise InputError(
            explain(
                f"draws cannot be read as a floating-point array ({err})",
                where,
                "pass a numpy array of shape (chains, draws) or (chains, draws, d)",
            )
        ) from None
    if arr.ndim not in (2, 3):
        raise InputError(
            explain(
                f"draws have {arr.ndim} dimension(s), shape {arr.shape}",
                where,
                "pass shape (chains, draws) for one parameter or (chains, draws, d)",
            )
        )
    scalar = arr.ndim == 2
    if scalar:
        arr = arr[:, :, None]
    chains, draws, dim = arr.shape
    if chains < 1 or dim < 1:
        raise InputError(
            explain(
                f"draws of shape {arr.shape[:2] if scalar else arr.shape} hold no chain "
                "or no parameter",
                where,
                "pass at least one chain and one parameter",
            )
        )
    if draws < _MIN_DRAWS:
        raise InputError(
            explain(
                f"only {draws} draw(s) per chain; these diagnostics need at least "
                f"{_MIN_DRAWS}",
                where,
                "run the chains longer (a few hundred draws per chain at the very least)",
            )
        )
    bad = ~np.isfinite(arr)
    if bad.any():
        c, t, j = (int(i) for i in np.argwhere(bad)[0])
        count = int(bad.sum())
        chains_hit = sorted({int(i) for i in np.nonzero(bad.any(axis=(1, 2)))[0]})
        raise InputError(
            explain(
                f"draws hold {count} non-finite value(s) (first: {arr[c, t, j]} at chain {c}, "
                f"draw {t}, parameter index {j}); no diagnostic is computed from them",
                f"{where}, chain(s) {chains_hit}",
                "drop the affected chains, or find why the sampler produced a non-finite "
                "position (a transform overflowing, an unconstrained parameter)",
            )
        )
    return arr, scalar


def _out(values: np.ndarray, scalar: bool):
    return float(values[0]) if scalar else values


def _split(x: np.ndarray) -> np.ndarray:
    """Cut every chain into its first and last halves: (2 chains, draws // 2, d)."""
    half = x.shape[1] // 2
    return np.concatenate([x[:, :half], x[:, x.shape[1] - half :]], axis=0)


def _z_scale(x: np.ndarray) -> np.ndarray:
    """Rank-normalise each parameter over all chains and draws (Vehtari et al. 2021, eq. 14)."""
    chains, draws, dim = x.shape
    rows = np.ascontiguousarray(x.reshape(chains * draws, dim).T)  # rank along a fast axis
    ranks = stats.rankdata(rows, method="average", axis=1)
    size = chains * draws
    z = special.ndtri((ranks - 0.375) / (size + 0.25))
    return z.T.reshape(chains, draws, dim)


def _stuck(x: np.ndarray) -> np.ndarray:
    """(d,) True where every chain is constant in that parameter."""
    return np.all(np.ptp(x, axis=1) == 0, axis=0)


def _blocks(x: np.ndarray):
    chains, draws, dim = x.shape
    width = max(1, _BLOCK_ELEMENTS // max(1, 2 * chains * draws))
    for start in range(0, dim, width):
        yield slice(start, min(dim, start + width))


def _autocovariance(x: np.ndarray) -> np.ndarray:
    """Biased autocovariance (divide by n) of each chain at every lag, by FFT."""
    n = x.shape[1]
    centred = x - x.mean(axis=1, keepdims=True)
    size = next_fast_len(2 * n)
    spectrum = np.fft.rfft(centred, n=size, axis=1)
    acov = np.fft.irfft(spectrum * np.conjugate(spectrum), n=size, axis=1)[:, :n]
    return acov / n


# ---------------------------------------------------------------------------------------
# the integrated autocorrelation time (the core of every ESS)
# ---------------------------------------------------------------------------------------


def _tau_block(x: np.ndarray) -> np.ndarray:
    """Pooled Geyer initial-monotone-sequence estimate of tau for one parameter block."""
    chains, n, dim = x.shape
    acov = _autocovariance(x)
    within = acov[:, 0, :].mean(axis=0) * n / (n - 1.0)  # W
    var_plus = within * (n - 1.0) / n
    if chains > 1:
        var_plus = var_plus + np.var(x.mean(axis=1), axis=0, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = 1.0 - (within - acov.mean(axis=0)) / var_plus  # (n, dim)
    rho[0] = 1.0
    # pairs P_k = rho_{2k} + rho_{2k+1}, over the lags the reference code uses
    last_odd = max(1, n - 3 + ((n - 3) % 2 == 0))  # smallest odd number >= n - 3
    pairs_count = (last_odd - 1) // 2 + 1
    even = rho[0 : 2 * pairs_count : 2]
    odd = rho[1 : 2 * pairs_count : 2]
    pairs = even + odd  # (K, dim)
    nonpositive = pairs <= 0.0
    found = nonpositive.any(axis=0)
    first = np.where(found, np.argmax(nonpositive, axis=0), pairs_count)  # pairs kept
    monotone = np.minimum.accumulate(pairs, axis=0)  # Geyer's initial monotone sequence
    # without a nonpositive pair the sum stops at the last pair and adds the next even
    # autocorrelation as the reference code does; with one pair only, keep that pair
    first = np.where(found | (pairs_count == 1), first, pairs_count - 1)
    kept = np.arange(pairs_count)[:, None] < first[None, :]
    total = np.sum(np.where(kept, monotone, 0.0), axis=0)
    tail_even = rho[np.minimum(2 * first, n - 1), np.arange(dim)]
    extra = np.where(found, np.maximum(tail_even, 0.0), np.where(pairs_count == 1, 0.0, tail_even))
    tau = -1.0 + 2.0 * total + extra
    tau = np.maximum(tau, 1.0 / np.log10(chains * n))
    return np.where(_stuck(x), np.inf, tau)


def _tau(x: np.ndarray) -> np.ndarray:
    out = np.empty(x.shape[2])
    for block in _blocks(x):
        out[block] = _tau_block(x[:, :, block])
    return out


def _ess(x: np.ndarray) -> np.ndarray:
    """ESS = N / tau with N pooled draws; 0 where every chain is constant."""
    size = x.shape[0] * x.shape[1]
    with np.errstate(divide="ignore"):
        return size / _tau(x)


def _gelman_rubin(x: np.ndarray) -> np.ndarray:
    """Potential scale reduction of (chains, n, d) draws (Vehtari et al. 2021, eq. 3-4)."""
    n = x.shape[1]
    within = np.var(x, axis=1, ddof=1).mean(axis=0)
    between = n * np.var(x.mean(axis=1), axis=0, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        value = np.sqrt((between / within + n - 1.0) / n)
    constant = _stuck(x)  # exact test: a float variance of equal values need not be 0
    value = np.where(constant, np.where(between > 0, np.inf, np.nan), value)
    return value


# ---------------------------------------------------------------------------------------
# public diagnostics
# ---------------------------------------------------------------------------------------


def rhat(x) -> float | np.ndarray:
    """Rank-normalised split R-hat: the larger of the bulk and the folded version.

    Vehtari, Gelman, Simpson, Carpenter & Bürkner (2021), "Rank-normalization,
    folding, and localization: an improved R-hat for assessing convergence of MCMC",
    Bayesian Analysis 16(2). Works with a single chain (its two halves are compared).

    Parameters
    ----------
    x : array (chains, draws) or (chains, draws, d)

    Returns
    -------
    float or (d,) array
        Values near 1 mean the chains agree; above 1.01 they do not. ``inf`` when
        every chain is constant but the chains sit at different values, ``nan`` when
        all draws of a parameter are identical (see the module notes).
    """
    arr, scalar = _as_draws(x, "rhat(x)")
    split = _split(arr)
    bulk = _gelman_rubin(_z_scale(split))
    folded_raw = np.abs(split - np.median(split.reshape(-1, split.shape[2]), axis=0))
    folded = _gelman_rubin(_z_scale(folded_raw))
    value = np.fmax(bulk, folded)  # a nan folded value (all folded draws equal) defers
    value = np.where(np.ptp(arr, axis=(0, 1)) == 0, np.nan, value)
    return _out(value, scalar)


def ess_bulk(x) -> float | np.ndarray:
    """Bulk effective sample size: ESS of the rank-normalised split chains.

    Vehtari et al. (2021), Bayesian Analysis 16(2), section 4.2. 0 for a parameter in
    which every chain is constant; never above ``N log10 N`` for ``N`` pooled draws.
    """
    arr, scalar = _as_draws(x, "ess_bulk(x)")
    return _out(_ess(_z_scale(_split(arr))), scalar)


def _ess_quantile(arr: np.ndarray, prob: float) -> np.ndarray:
    quantile = np.quantile(arr.reshape(-1, arr.shape[2]), prob, axis=0)
    indicator = (arr <= quantile).astype(float)
    return _ess(_split(indicator))


def ess_tail(x) -> float | np.ndarray:
    """Tail effective sample size: the smaller ESS of the 5% and 95% quantile indicators.

    Vehtari et al. (2021), Bayesian Analysis 16(2), section 4.3. The quantiles are the
    linear-interpolation (type 7) quantiles of all draws pooled.
    """
    arr, scalar = _as_draws(x, "ess_tail(x)")
    low = _ess_quantile(arr, 0.05)
    high = _ess_quantile(arr, 0.95)
    return _out(np.minimum(low, high), scalar)


def ess_mean(x) -> float | np.ndarray:
    """Effective sample size for the posterior mean: split chains, no rank normalisation.

    Geyer (1992), Statistical Science 7(4), with the multi-chain pooling of
    Vehtari et al. (2021); this is the ESS behind :func:`mcse_mean`.
    """
    arr, scalar = _as_draws(x, "ess_mean(x)")
    return _out(_ess(_split(arr)), scalar)


def integrated_autocorrelation_time(x) -> float | np.ndarray:
    """Integrated autocorrelation time tau = 1 + 2 sum_{t>=1} rho_t of the draws as given.

    Geyer's initial monotone sequence estimator (Geyer 1992, "Practical Markov chain
    Monte Carlo", Statistical Science 7(4)), with autocorrelations computed by FFT and
    pooled across chains as in Vehtari et al. (2021) (chains are not split here). For
    an AR(1) series with coefficient rho the true value is (1 + rho) / (1 - rho).
    Floored at ``1/log10 N`` like the ESS; ``inf`` when every chain is constant.
    """
    arr, scalar = _as_draws(x, "integrated_autocorrelation_time(x)")
    return _out(_tau(arr), scalar)


def autocorrelation(x, max_lag: int) -> np.ndarray:
    """Autocorrelation at lags 0..max_lag of each parameter, averaged over chains.

    Each chain's autocorrelation is its FFT autocovariance (divide by n) over its
    lag-0 value; a constant chain counts as perfectly correlated (1 at every lag).

    Returns
    -------
    array (max_lag + 1,) for draws (chains, draws), or (d, max_lag + 1).
    """
    arr, scalar = _as_draws(x, "autocorrelation(x, max_lag)")
    draws = arr.shape[1]
    max_lag = whole_number(max_lag, "max_lag", "autocorrelation(x, max_lag)", minimum=0,
                           maximum=draws - 1,
                           todo=f"pass a lag smaller than the number of draws per chain "
                                f"({draws})")
    out = np.empty((arr.shape[2], max_lag + 1))
    for block in _blocks(arr):
        acov = _autocovariance(arr[:, :, block])[:, : max_lag + 1]  # (chains, lags, k)
        lag0 = acov[:, :1]
        with np.errstate(divide="ignore", invalid="ignore"):
            acf = np.where(lag0 > 0, acov / lag0, 1.0)
        out[block] = acf.mean(axis=0).T
    return out[0] if scalar else out


def mcse_mean(x) -> float | np.ndarray:
    """Monte Carlo standard error of the posterior mean: sd / sqrt(ess_mean).

    sd is the standard deviation of all draws pooled (ddof 1); see Vehtari et al.
    (2021), Bayesian Analysis 16(2). ``inf`` when the ESS is 0 (a stuck parameter).
    """
    arr, scalar = _as_draws(x, "mcse_mean(x)")
    sd = np.std(arr.reshape(-1, arr.shape[2]), axis=0, ddof=1)
    ess = _ess(_split(arr))
    with np.errstate(divide="ignore", invalid="ignore"):
        value = np.where(ess > 0, sd / np.sqrt(ess), np.inf)
    return _out(value, scalar)


# ---------------------------------------------------------------------------------------
# Pareto k-hat
# ---------------------------------------------------------------------------------------


def _gpd_fit(y: np.ndarray) -> float:
    """Shape of a generalized Pareto fit to sorted positive exceedances ``y``.

    Zhang & Stephens (2009), "A new and efficient estimation method for the generalized
    Pareto distribution", Technometrics 51(3): a posterior-mean estimate of
    theta = -xi / sigma over a grid of m = 30 + floor(sqrt(n)) points, weighted by the
    profile likelihood; then the shape is shrunk toward 0.5 with the weakly informative
    prior of Vehtari, Simpson, Gelman, Yao & Gabry (2024), "Pareto smoothed importance
    sampling", JMLR 25(72): xi <- (n xi + 10 * 0.5) / (n + 10).
    """
    n = y.size
    grid = 30 + int(np.sqrt(n))
    j = np.arange(1, grid + 1, dtype=float)
    quartile = y[int(n / 4 + 0.5) - 1]
    theta = 1.0 / y[-1] + (1.0 - np.sqrt(grid / (j - 0.5))) / (3.0 * quartile)
    k = -np.mean(np.log1p(-theta[:, None] * y[None, :]), axis=1)
    profile = n * (np.log(theta / k) + k - 1.0)
    weights = 1.0 / np.sum(np.exp(profile[None, :] - profile[:, None]), axis=1)
    keep = weights >= 10 * np.finfo(float).eps
    weights, theta = weights[keep], theta[keep]
    theta_hat = np.sum(theta * weights) / np.sum(weights)
    xi = float(np.mean(np.log1p(-theta_hat * y)))
    return (n * xi + 10 * 0.5) / (n + 10)


def pareto_khat(log_weights) -> float:
    """Pareto-smoothed importance sampling shape estimate k-hat of the largest weights.

    The M = ceil(min(0.2 S, 3 sqrt(S))) largest of S importance weights, less the
    next largest, are fitted by a generalized Pareto law (see :func:`_gpd_fit`);
    Vehtari, Simpson, Gelman, Yao & Gabry (2024), "Pareto smoothed importance
    sampling", JMLR 25(72). Compare with :func:`khat_threshold`.

    Parameters
    ----------
    log_weights : array of S log importance ratios (any shape; all entries are pooled).
        ``-inf`` (a zero weight) is allowed; NaN and ``+inf`` are not.

    Returns
    -------
    float
        k-hat; ``inf`` (read: cannot be trusted) when fewer than 5 tail weights are
        left to fit, i.e. S <= 20 or ties among the largest weights; ``-inf`` when the
        finite weights are all equal to rounding (the proposal is the target: an exactly
        Gaussian posterior against its Laplace approximation).
    """
    where = "pareto_khat(log_weights)"
    try:
        lw = np.asarray(log_weights, dtype=float).ravel()
    except (TypeError, ValueError) as err:
        raise InputError(explain(f"log weights cannot be read as floats ({err})", where,
                                 "pass a numpy array of log importance ratios")) from None
    bad = np.isnan(lw) | (lw == np.inf)
    if bad.any():
        raise InputError(
            explain(f"{int(bad.sum())} log weight(s) are NaN or +inf (first at flat index "
                    f"{int(np.argmax(bad))})", where,
                    "compute log weights as log target - log proposal at finite draws; "
                    "a point the proposal cannot produce has weight -inf, not NaN"))
    size = lw.size
    tail = int(np.ceil(min(0.2 * size, 3.0 * np.sqrt(size))))
    if size == 0:
        raise InputError(explain("no log weights were given", where,
                                 "pass the log importance ratios of hundreds of draws or more"))
    if not np.isfinite(lw).any():
        raise InputError(explain("every log weight is -inf", where,
                                 "check the target and proposal log densities"))
    finite = lw[np.isfinite(lw)]
    spread = np.ptp(finite) if finite.size else np.inf
    if size > 20 and finite.size == size and spread <= 1e-9 * max(1.0, np.abs(finite).max()):
        return float("-inf")
    shifted = lw - np.max(lw)
    ordered = np.sort(shifted)
    cutoff = max(ordered[size - tail - 1], np.log(np.finfo(float).tiny))
    exceed = ordered[ordered > cutoff]
    if tail < 5 or exceed.size <= 4:
        return float("inf")
    return float(_gpd_fit(np.exp(exceed) - np.exp(cutoff)))


def khat_threshold(size: int) -> float:
    """Largest k-hat at which S = size importance draws are trustworthy.

    min(1 - 1/log10(S), 0.7): Vehtari, Simpson, Gelman, Yao & Gabry (2024),
    "Pareto smoothed importance sampling", JMLR 25(72).
    """
    size = whole_number(size, "size", "khat_threshold(size)", minimum=11,
                        todo="pass the number of importance draws (more than 10)")
    return float(min(1.0 - 1.0 / np.log10(size), 0.7))


# ---------------------------------------------------------------------------------------
# expected squared jump distance
# ---------------------------------------------------------------------------------------


class WhitenedJump(NamedTuple):
    """Realised squared jump distance per step, in whitened units."""

    mean: float  # over all steps of all chains
    per_chain: np.ndarray  # (chains,)


def whitened_jump(draws, cholesky) -> WhitenedJump:
    """Realised expected squared jump distance |Lᵀ (x_{t+1} - x_t)|² per step.

    With L Lᵀ = H (the observed Fisher information) and theta ~ N(mode, H⁻¹),
    Lᵀ (theta - mode) ~ N(0, I), so the jump is measured in posterior standard
    deviations; independent draws give 2 d. Rejected proposals count as zero jumps,
    as in the ESJD of Roberts, Gelman & Gilks (1997), Annals of Applied Probability 7(1).

    Parameters
    ----------
    draws : array (chains, draws, d), or (chains, draws) when d = 1
    cholesky : lower-triangular (d, d) array L with L Lᵀ = H (a scalar when d = 1)
    """
    where = "whitened_jump(draws, cholesky)"
    arr, _ = _as_draws(draws, where)
    dim = arr.shape[2]
    factor = np.asarray(cholesky, dtype=float)
    if factor.ndim == 0:
        factor = factor.reshape(1, 1)
    if factor.shape != (dim, dim):
        raise InputError(explain(f"cholesky has shape {factor.shape}, draws have d = {dim}",
                                 where, f"pass the ({dim}, {dim}) factor L of the Fisher "
                                 "information, in the ravelled parameter order"))
    if not np.all(np.isfinite(factor)) or np.any(np.triu(factor, 1) != 0):
        raise InputError(explain("cholesky is not a finite lower-triangular matrix", where,
                                 "pass L = numpy.linalg.cholesky(H), not H or its inverse"))
    steps = np.diff(arr, axis=1) @ factor  # rows are (Lᵀ Δ)ᵀ = Δᵀ L
    squared = np.sum(steps**2, axis=2)  # (chains, draws - 1)
    per_chain = squared.mean(axis=1)
    return WhitenedJump(mean=float(per_chain.mean()), per_chain=per_chain)
