"""Monte Carlo error of ONE parameter's draws, read in blocks of chains.

The engine behind :mod:`fisherwalk.results.diagnostics` and the summary table. Every function
here takes one parameter's draws ``col`` of shape ``(chains, draws)`` (a strided view
into a ``(chains, draws, d)`` array is fine, and is not copied) and validates nothing:
:mod:`fisherwalk.results.diagnostics` checks the input and states the conventions (split
chains, rank normalisation, autocorrelations pooled across chains, Geyer's truncation,
stuck parameters) that are implemented here.

Memory. The chains are read in blocks of about ``_BLOCK_DRAWS`` draws; each statistic
that needs ranks or quantiles keeps one sorted float64 copy of the slice, and never two
at once. The extra memory is therefore one copy of the slice plus the work arrays of
one block (for a chain longer than a block, those of one chain's FFT), whatever the
number of parameters or chains. Work is linear in the number of chains.

Monte Carlo standard errors (Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021,
"Rank-normalization, folding, and localization: an improved R-hat for assessing
convergence of MCMC", Bayesian Analysis 16(2)):

* mean: sd / sqrt(ESS of the split draws);
* quantile q_p: the ESS of the indicator I(x <= q_p) gives the probability below q_p a
  Beta(ESS p + 1, ESS (1 - p) + 1) law; its Φ(-1) and Φ(1) points (one standard
  deviation either side) are mapped back through the order statistics of all draws,
  and half the distance between the two order statistics is the MCSE;
* sd: the delta method, Var(s) ≈ Var(s²) / (4 s²), with Var(s²) estimated by
  (m4 - s⁴) / ESS, m4 the fourth central moment and ESS that of the squared centred
  draws (split chains, no rank normalisation).

The last two are computed as arviz 0.23 computes them (``arviz.mcse`` with methods
"quantile" and "sd"); the tests compare with it on the same arrays.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import NamedTuple

import numpy as np
from scipy import special, stats
from scipy.fft import next_fast_len

__all__ = [
    "ColumnStatistics",
    "column_statistics",
    "autocovariance",
    "split_rhat",
    "bulk_ess",
    "tail_ess",
    "mean_ess",
    "autocorrelation_time",
    "mean_mcse",
    "sd_mcse",
    "quantile_mcse",
]

_BLOCK_DRAWS = 1 << 17  # draws per block of chains: 1 MiB per float64 work array
_TAIL_PROBS = (0.05, 0.95)  # the quantiles behind the tail ESS (Vehtari et al. 2021)
_ONE_SD = (float(special.ndtr(-1.0)), float(special.ndtr(1.0)))


class ColumnStatistics(NamedTuple):
    """Every statistic the summary shows for one parameter, and per-chain figures."""

    mean: float
    sd: float  # all draws pooled, ddof 1
    quantiles: np.ndarray  # at the probabilities asked for (linear interpolation, type 7)
    mcse_mean: float
    mcse_sd: float
    mcse_quantiles: np.ndarray
    ess_bulk: float
    ess_tail: float
    rhat: float
    chain_means: np.ndarray  # (chains,)
    chain_sds: np.ndarray  # (chains,) ddof 1
    chain_mcse: np.ndarray  # (chains,) MCSE of each chain's own mean (its two halves)
    chain_moves: np.ndarray  # (chains,) bool: the chain is not constant


class _Moments(NamedTuple):
    """Row statistics of a (transformed) series; rows are split halves or whole chains."""

    means: np.ndarray  # (rows,) split: first halves of every chain, then second halves
    variances: np.ndarray  # (rows,) ddof 1
    lows: np.ndarray  # (rows,)
    highs: np.ndarray  # (rows,)
    length: int  # draws per row
    acov: np.ndarray | None  # (length,) mean over rows of the biased autocovariances
    chain_tau: np.ndarray | None  # (chains,) tau of each chain from its own two halves

    @property
    def constant(self) -> bool:  # exact test: a float variance of equal values need not be 0
        return bool(np.all(self.highs == self.lows))


def autocovariance(rows: np.ndarray) -> np.ndarray:
    """Biased autocovariance (divide by n) of each row at every lag 0..n-1, by FFT."""
    n = rows.shape[-1]
    size = next_fast_len(2 * n)
    spectrum = np.fft.rfft(rows - rows.mean(axis=-1, keepdims=True), n=size, axis=-1)
    power = np.square(spectrum.real)
    power += np.square(spectrum.imag)
    del spectrum
    return np.fft.irfft(power, n=size, axis=-1)[..., :n] / n


def _row_autocovariances(block: np.ndarray) -> np.ndarray:
    """Autocovariances of a block's rows, a few rows per FFT so that the FFT's work
    arrays follow about ``_BLOCK_DRAWS`` numbers, not the block."""
    rows, length = block.shape
    step = max(1, _BLOCK_DRAWS // (2 * length))
    if step >= rows:
        return autocovariance(block)
    out = np.empty((rows, length))
    for r in range(0, rows, step):
        out[r : r + step] = autocovariance(block[r : r + step])
    return out


def _blocks(chains: int, n: int):
    step = max(1, _BLOCK_DRAWS // max(1, n))
    return [(a, min(chains, a + step)) for a in range(0, chains, step)]


def _rows(col, a: int, b: int, split: bool) -> np.ndarray:
    """Chains a..b-1 as float rows: (2k, n // 2) halves when split, else (k, n)."""
    if not split:
        return np.array(col[a:b], dtype=float)
    n = col.shape[1]
    half = n // 2
    return np.concatenate([col[a:b, :half], col[a:b, n - half:]]).astype(float, copy=False)


def _moments(col, transform: Callable | None = None, *, split: bool = True,
             autocov: bool = True, per_chain: bool = False) -> _Moments:
    chains, n = col.shape
    length = n // 2 if split else n
    rows = 2 * chains if split else chains
    means, variances = np.empty(rows), np.empty(rows)
    lows, highs = np.empty(rows), np.empty(rows)
    acov = np.zeros(length) if autocov else None
    chain_tau = np.empty(chains) if per_chain else None
    for a, b in _blocks(chains, n):
        block = _rows(col, a, b, split)
        if transform is not None:
            block = transform(block)
        where = np.r_[a:b, chains + a:chains + b] if split else np.arange(a, b)
        means[where] = block.mean(axis=1)
        variances[where] = block.var(axis=1, ddof=1)
        lows[where], highs[where] = block.min(axis=1), block.max(axis=1)
        if autocov:
            rows_acov = _row_autocovariances(block)
            acov += rows_acov.sum(axis=0)
            if per_chain:  # each chain alone: its two halves pooled
                k = b - a
                m = means[where]
                between = 0.5 * (m[:k] - m[k:]) ** 2  # variance (ddof 1) of the two means
                still = (lows[where] == highs[where])
                chain_tau[a:b] = _geyer(0.5 * (rows_acov[:k] + rows_acov[k:]).T, between,
                                        2 * length, still[:k] & still[k:])
    if acov is not None:
        acov /= rows
    return _Moments(means, variances, lows, highs, length, acov, chain_tau)


def _geyer(acov: np.ndarray, between: np.ndarray, size: int, stuck: np.ndarray) -> np.ndarray:
    """Tau of K series from their pooled autocovariances ``acov`` (n, K).

    ``between`` is the variance (ddof 1) of the row means, ``size`` the pooled draw
    count. Geyer's initial monotone sequence, as described in fisherwalk.results.diagnostics.
    """
    n, count = acov.shape
    within = acov[0] * n / (n - 1.0)  # W
    var_plus = within * (n - 1.0) / n + between
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = 1.0 - (within - acov) / var_plus  # (n, K)
    rho[0] = 1.0
    # pairs P_k = rho_{2k} + rho_{2k+1}, over the lags the reference code uses
    last_odd = max(1, n - 3 + ((n - 3) % 2 == 0))  # smallest odd number >= n - 3
    pairs_count = (last_odd - 1) // 2 + 1
    pairs = rho[0 : 2 * pairs_count : 2] + rho[1 : 2 * pairs_count : 2]  # (pairs, K)
    nonpositive = pairs <= 0.0
    found = nonpositive.any(axis=0)
    first = np.where(found, np.argmax(nonpositive, axis=0), pairs_count)  # pairs kept
    monotone = np.minimum.accumulate(pairs, axis=0)  # Geyer's initial monotone sequence
    # without a nonpositive pair the sum stops at the last pair and adds the next even
    # autocorrelation as the reference code does; with one pair only, keep that pair
    first = np.where(found | (pairs_count == 1), first, pairs_count - 1)
    kept = np.arange(pairs_count)[:, None] < first[None, :]
    total = np.sum(np.where(kept, monotone, 0.0), axis=0)
    tail_even = rho[np.minimum(2 * first, n - 1), np.arange(count)]
    extra = np.where(found, np.maximum(tail_even, 0.0), np.where(pairs_count == 1, 0.0, tail_even))
    tau = np.maximum(-1.0 + 2.0 * total + extra, 1.0 / np.log10(size))
    return np.where(stuck, np.inf, tau)


def _tau(mo: _Moments) -> float:
    between = np.var(mo.means, ddof=1) if mo.means.size > 1 else 0.0
    tau = _geyer(mo.acov[:, None], np.array([between]), mo.means.size * mo.length,
                 np.array([mo.constant]))
    return float(tau[0])


def _ess(mo: _Moments) -> float:
    with np.errstate(divide="ignore"):
        return float(mo.means.size * mo.length / np.float64(_tau(mo)))


def _gelman_rubin(mo: _Moments) -> float:
    """Potential scale reduction of split rows (Vehtari et al. 2021, eq. 3-4)."""
    n = mo.length
    within = mo.variances.mean()
    between = n * np.var(mo.means, ddof=1)
    if mo.constant:
        return float("inf") if between > 0 else float("nan")
    return float(np.sqrt((between / within + n - 1.0) / n))


# ---------------------------------------------------------------------------------------
# sorted copies, ranks, quantiles
# ---------------------------------------------------------------------------------------


def _sorted_all(col) -> np.ndarray:
    values = np.array(col, dtype=float).ravel()
    values.sort()
    return values


def _sorted_split(col, centre: float | None = None) -> np.ndarray:
    """The split draws (the middle draw of an odd chain left out), or |split - centre|, sorted."""
    chains, n = col.shape
    half = n // 2
    out = np.empty(2 * chains * half)
    view = out.reshape(2, chains, half)
    view[0], view[1] = col[:, :half], col[:, n - half:]
    if centre is not None:
        out -= centre
        np.abs(out, out=out)
    out.sort()
    return out


def _scores(sorted_values: np.ndarray, centre: float | None = None) -> Callable:
    """Rank-normalise a block against sorted reference values (Vehtari et al. 2021, eq. 14):
    average ranks of ties, Blom's offset 3/8."""
    size = sorted_values.size

    def transform(block: np.ndarray) -> np.ndarray:
        if centre is not None:
            block = np.abs(block - centre)
        values = block.ravel()
        order = np.argsort(values)  # sorted keys make the binary searches cache-friendly
        keys = values[order]
        ranks = np.searchsorted(sorted_values, keys, side="left")
        ranks += np.searchsorted(sorted_values, keys, side="right")
        del keys
        scores = np.empty(values.size)
        scores[order] = ranks + 1.0  # average rank of ties, times 2 (exact in float64)
        del ranks, order
        scores /= 2.0
        scores -= 0.375
        scores /= size + 0.25
        return special.ndtri(scores, out=scores).reshape(block.shape)

    return transform


def _quantile(sorted_values: np.ndarray, prob: float) -> float:
    """Linear-interpolation (type 7) quantile, computed as numpy.quantile computes it."""
    size = sorted_values.size
    virtual = (size - 1) * prob
    below = int(np.floor(virtual))
    if virtual >= size - 1:
        return float(sorted_values[-1])
    a, b = sorted_values[below], sorted_values[below + 1]
    gamma = virtual - below
    diff = b - a
    return float(b - diff * (1 - gamma) if gamma >= 0.5 else a + diff * gamma)


def _median(sorted_values: np.ndarray) -> float:
    """Median of an even number of sorted values (split draws), as numpy.median takes it."""
    middle = sorted_values.size // 2
    return float((sorted_values[middle - 1] + sorted_values[middle]) / 2.0)


def _indicator_ess(col, threshold: float) -> float:
    return _ess(_moments(col, lambda block: (block <= threshold).astype(float)))


def _quantile_error(sorted_values: np.ndarray, prob: float, ess: float) -> float:
    if not ess > 0:
        return float("inf")
    size = sorted_values.size
    low, high = stats.beta.ppf(_ONE_SD, ess * prob + 1.0, ess * (1.0 - prob) + 1.0)
    first = int(np.floor(max(low * size - 1.0, 0.0)))
    last = int(np.ceil(min(high * size - 1.0, size - 1.0)))
    return float((sorted_values[last] - sorted_values[first]) / 2.0)


# ---------------------------------------------------------------------------------------
# one statistic at a time (the public diagnostics loop these over parameters)
# ---------------------------------------------------------------------------------------


def _pooled(chain: _Moments, n: int) -> tuple[float, float]:
    """Mean and sd (ddof 1) of all draws from per-chain means and variances."""
    size = chain.means.size * n
    mean = float(chain.means.mean())
    spread = (n - 1.0) * chain.variances.sum() + n * np.sum((chain.means - mean) ** 2)
    return mean, float(np.sqrt(spread / (size - 1.0)))


def _rhat_from(col, bulk: _Moments, centre: float, chain: _Moments) -> float:
    """R-hat from the bulk moments and the split median; the folded draws are sorted here,
    so the caller must have let go of its own sorted copy."""
    folded = _moments(col, _scores(_sorted_split(col, centre), centre), autocov=False)
    value = np.fmax(_gelman_rubin(bulk), _gelman_rubin(folded))  # a nan folded value defers
    return float("nan") if chain.highs.max() == chain.lows.min() else float(value)


def split_rhat(col: np.ndarray) -> float:
    """Rank-normalised split R-hat, the larger of the bulk and the folded value."""
    chain = _moments(col, split=False, autocov=False)
    values = _sorted_split(col)
    bulk = _moments(col, _scores(values), autocov=False)
    centre = _median(values)
    del values
    return _rhat_from(col, bulk, centre, chain)


def bulk_ess(col: np.ndarray) -> float:
    """ESS of the rank-normalised split draws."""
    return _ess(_moments(col, _scores(_sorted_split(col))))


def tail_ess(col: np.ndarray) -> float:
    """The smaller ESS of the 5% and 95% quantile indicators."""
    values = _sorted_all(col)
    low, high = (_quantile(values, p) for p in _TAIL_PROBS)
    del values
    return min(_indicator_ess(col, low), _indicator_ess(col, high))


def mean_ess(col: np.ndarray) -> float:
    """ESS of the split draws, no rank normalisation (the ESS behind the mean's MCSE)."""
    return _ess(_moments(col))


def autocorrelation_time(col: np.ndarray) -> float:
    """Integrated autocorrelation time of the chains as given (not split)."""
    return _tau(_moments(col, split=False))


def mean_mcse(col: np.ndarray) -> float:
    """sd / sqrt(ESS); inf when the ESS is 0."""
    _, sd = _pooled(_moments(col, split=False, autocov=False), col.shape[1])
    ess = mean_ess(col)
    return sd / np.sqrt(ess) if ess > 0 else float("inf")


def _sd_error(col, mean: float) -> float:
    total2 = total4 = 0.0
    for a, b in _blocks(*col.shape):
        squared = (_rows(col, a, b, split=False) - mean) ** 2
        total2 += float(squared.sum())
        total4 += float((squared**2).sum())
    size = col.shape[0] * col.shape[1]
    second, fourth = total2 / size, total4 / size
    ess = _ess(_moments(col, lambda block: (block - mean) ** 2))
    if not (ess > 0 and second > 0):
        return float("inf")
    return float(np.sqrt((fourth - second**2) / ess / second / 4.0))


def sd_mcse(col: np.ndarray) -> float:
    """MCSE of the sd by the delta method (see the module notes); inf when the ESS is 0."""
    mean, _ = _pooled(_moments(col, split=False, autocov=False), col.shape[1])
    return _sd_error(col, mean)


def quantile_mcse(col: np.ndarray, prob: float) -> float:
    """MCSE of the quantile at ``prob`` (see the module notes); inf when the ESS is 0."""
    values = _sorted_all(col)
    return _quantile_error(values, prob, _indicator_ess(col, _quantile(values, prob)))


# ---------------------------------------------------------------------------------------
# everything at once, for the summary
# ---------------------------------------------------------------------------------------


def column_statistics(col: np.ndarray, probs: Sequence[float] = (0.05, 0.5, 0.95),
                      ) -> ColumnStatistics:
    """Estimates, MCSEs, ESS and R-hat of one parameter, each computed as the single-statistic
    functions above compute it, with at most one sorted copy of the draws alive at a time."""
    chains, n = col.shape
    chain = _moments(col, split=False, autocov=False)
    mean, sd = _pooled(chain, n)
    raw = _moments(col, per_chain=True)
    ess_mean = _ess(raw)
    with np.errstate(divide="ignore", invalid="ignore"):
        chain_mcse = np.sqrt(chain.variances) / np.sqrt(2 * raw.length / raw.chain_tau)
    values = _sorted_all(col)
    wanted = {float(p): _quantile(values, p) for p in (*probs, *_TAIL_PROBS)}
    ess_at = {p: _indicator_ess(col, q) for p, q in wanted.items()}
    quantiles = np.array([wanted[float(p)] for p in probs])
    errors = np.array([_quantile_error(values, p, ess_at[float(p)]) for p in probs])
    if n % 2:  # an odd chain length: the split draws leave out each chain's middle draw
        del values
        values = _sorted_split(col)
    bulk = _moments(col, _scores(values))
    centre = _median(values)
    del values
    rhat = _rhat_from(col, bulk, centre, chain)
    return ColumnStatistics(
        mean=mean, sd=sd, quantiles=quantiles,
        mcse_mean=sd / np.sqrt(ess_mean) if ess_mean > 0 else float("inf"),
        mcse_sd=_sd_error(col, mean), mcse_quantiles=errors,
        ess_bulk=_ess(bulk), ess_tail=min(ess_at[p] for p in _TAIL_PROBS),
        rhat=rhat,
        chain_means=chain.means, chain_sds=np.sqrt(chain.variances),
        chain_mcse=np.where(raw.chain_tau < np.inf, chain_mcse, np.inf),
        chain_moves=chain.highs > chain.lows,
    )
