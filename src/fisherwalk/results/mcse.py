"""Monte Carlo error of ONE parameter's draws, read in blocks of chains.

The engine behind :mod:`fisherwalk.results.diagnostics` and the summary table. Every function
here takes one parameter's draws ``col`` of shape ``(chains, draws)`` (a strided view
into a ``(chains, draws, d)`` array is fine, and is not copied) and validates nothing:
:mod:`fisherwalk.results.diagnostics` checks the input and states the conventions (split
chains, rank normalisation, autocorrelations pooled across chains, Geyer's truncation,
stuck parameters) that are implemented here.

Memory. The chains are read in blocks of about ``BLOCK_DRAWS`` draws; each statistic
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

from .autocov import (
    Moments,
    autocovariance,
    blocks,
    chain_moments,
    chain_rows,
    ess_of,
    gelman_rubin,
    tau,
)

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
    return ess_of(chain_moments(col, lambda block: (block <= threshold).astype(float)))


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


def _pooled(chain: Moments, n: int) -> tuple[float, float]:
    """Mean and sd (ddof 1) of all draws from per-chain means and variances."""
    size = chain.means.size * n
    mean = float(chain.means.mean())
    spread = (n - 1.0) * chain.variances.sum() + n * np.sum((chain.means - mean) ** 2)
    return mean, float(np.sqrt(spread / (size - 1.0)))


def _rhat_from(col, bulk: Moments, centre: float, chain: Moments) -> float:
    """R-hat from the bulk moments and the split median; the folded draws are sorted here,
    so the caller must have let go of its own sorted copy."""
    folded = chain_moments(col, _scores(_sorted_split(col, centre), centre), autocov=False)
    value = np.fmax(gelman_rubin(bulk), gelman_rubin(folded))  # a nan folded value defers
    return float("nan") if chain.highs.max() == chain.lows.min() else float(value)


def split_rhat(col: np.ndarray) -> float:
    """Rank-normalised split R-hat, the larger of the bulk and the folded value."""
    chain = chain_moments(col, split=False, autocov=False)
    values = _sorted_split(col)
    bulk = chain_moments(col, _scores(values), autocov=False)
    centre = _median(values)
    del values
    return _rhat_from(col, bulk, centre, chain)


def bulk_ess(col: np.ndarray) -> float:
    """ESS of the rank-normalised split draws."""
    return ess_of(chain_moments(col, _scores(_sorted_split(col))))


def tail_ess(col: np.ndarray) -> float:
    """The smaller ESS of the 5% and 95% quantile indicators."""
    values = _sorted_all(col)
    low, high = (_quantile(values, p) for p in _TAIL_PROBS)
    del values
    return min(_indicator_ess(col, low), _indicator_ess(col, high))


def mean_ess(col: np.ndarray) -> float:
    """ESS of the split draws, no rank normalisation (the ESS behind the mean's MCSE)."""
    return ess_of(chain_moments(col))


def autocorrelation_time(col: np.ndarray) -> float:
    """Integrated autocorrelation time of the chains as given (not split)."""
    return tau(chain_moments(col, split=False))


def mean_mcse(col: np.ndarray) -> float:
    """sd / sqrt(ESS); inf when the ESS is 0."""
    _, sd = _pooled(chain_moments(col, split=False, autocov=False), col.shape[1])
    ess = mean_ess(col)
    return sd / np.sqrt(ess) if ess > 0 else float("inf")


def _sd_error(col, mean: float) -> float:
    total2 = total4 = 0.0
    for a, b in blocks(*col.shape):
        squared = (chain_rows(col, a, b, split=False) - mean) ** 2
        total2 += float(squared.sum())
        total4 += float((squared**2).sum())
    size = col.shape[0] * col.shape[1]
    second, fourth = total2 / size, total4 / size
    ess = ess_of(chain_moments(col, lambda block: (block - mean) ** 2))
    if not (ess > 0 and second > 0):
        return float("inf")
    return float(np.sqrt((fourth - second**2) / ess / second / 4.0))


def sd_mcse(col: np.ndarray) -> float:
    """MCSE of the sd by the delta method (see the module notes); inf when the ESS is 0."""
    mean, _ = _pooled(chain_moments(col, split=False, autocov=False), col.shape[1])
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
    chain = chain_moments(col, split=False, autocov=False)
    mean, sd = _pooled(chain, n)
    raw = chain_moments(col, per_chain=True)
    ess_mean = ess_of(raw)
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
    bulk = chain_moments(col, _scores(values))
    centre = _median(values)
    del values
    rhat = _rhat_from(col, bulk, centre, chain)
    return ColumnStatistics(
        mean=mean, sd=sd, quantiles=quantiles,
        mcse_mean=sd / np.sqrt(ess_mean) if ess_mean > 0 else float("inf"),
        mcse_sd=_sd_error(col, mean), mcse_quantiles=errors,
        ess_bulk=ess_of(bulk), ess_tail=min(ess_at[p] for p in _TAIL_PROBS),
        rhat=rhat,
        chain_means=chain.means, chain_sds=np.sqrt(chain.variances),
        chain_mcse=np.where(raw.chain_tau < np.inf, chain_mcse, np.inf),
        chain_moves=chain.highs > chain.lows,
    )
