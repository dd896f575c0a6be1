"""The moments of ONE parameter's chains, read in blocks: autocovariances (by FFT),
Geyer's initial monotone sequence, the effective sample size and R-hat's variances.

The machinery under :mod:`fisherwalk.results.mcse` (which documents the conventions:
split chains, autocorrelations pooled across chains, stuck parameters; Vehtari, Gelman,
Simpson, Carpenter & Bürkner 2021, Bayesian Analysis 16(2); Geyer 1992, Statistical
Science 7(4)). Memory: chains are read in blocks of about :data:`BLOCK_DRAWS` draws.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import NamedTuple

import numpy as np
from scipy.fft import next_fast_len

__all__ = [
    "Moments",
    "autocovariance",
    "row_autocovariances",
    "blocks",
    "chain_rows",
    "chain_moments",
    "geyer",
    "tau",
    "ess_of",
    "gelman_rubin",
    "BLOCK_DRAWS",
]

BLOCK_DRAWS = 1 << 17  # draws per block of chains: 1 MiB per float64 work array


class Moments(NamedTuple):
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


def row_autocovariances(block: np.ndarray) -> np.ndarray:
    """Autocovariances of a block's rows, a few rows per FFT so that the FFT's work
    arrays follow about ``BLOCK_DRAWS`` numbers, not the block."""
    rows, length = block.shape
    step = max(1, BLOCK_DRAWS // (2 * length))
    if step >= rows:
        return autocovariance(block)
    out = np.empty((rows, length))
    for r in range(0, rows, step):
        out[r : r + step] = autocovariance(block[r : r + step])
    return out


def blocks(chains: int, n: int):
    step = max(1, BLOCK_DRAWS // max(1, n))
    return [(a, min(chains, a + step)) for a in range(0, chains, step)]


def chain_rows(col, a: int, b: int, split: bool) -> np.ndarray:
    """Chains a..b-1 as float rows: (2k, n // 2) halves when split, else (k, n)."""
    if not split:
        return np.array(col[a:b], dtype=float)
    n = col.shape[1]
    half = n // 2
    return np.concatenate([col[a:b, :half], col[a:b, n - half:]]).astype(float, copy=False)


def chain_moments(col, transform: Callable | None = None, *, split: bool = True,
                  autocov: bool = True, per_chain: bool = False) -> Moments:
    chains, n = col.shape
    length = n // 2 if split else n
    rows = 2 * chains if split else chains
    means, variances = np.empty(rows), np.empty(rows)
    lows, highs = np.empty(rows), np.empty(rows)
    acov = np.zeros(length) if autocov else None
    chain_tau = np.empty(chains) if per_chain else None
    for a, b in blocks(chains, n):
        block = chain_rows(col, a, b, split)
        if transform is not None:
            block = transform(block)
        where = np.r_[a:b, chains + a:chains + b] if split else np.arange(a, b)
        means[where] = block.mean(axis=1)
        variances[where] = block.var(axis=1, ddof=1)
        lows[where], highs[where] = block.min(axis=1), block.max(axis=1)
        if autocov:
            rows_acov = row_autocovariances(block)
            acov += rows_acov.sum(axis=0)
            if per_chain:  # each chain alone: its two halves pooled
                k = b - a
                m = means[where]
                between = 0.5 * (m[:k] - m[k:]) ** 2  # variance (ddof 1) of the two means
                still = (lows[where] == highs[where])
                chain_tau[a:b] = geyer(0.5 * (rows_acov[:k] + rows_acov[k:]).T, between,
                                        2 * length, still[:k] & still[k:])
    if acov is not None:
        acov /= rows
    return Moments(means, variances, lows, highs, length, acov, chain_tau)


def geyer(acov: np.ndarray, between: np.ndarray, size: int, stuck: np.ndarray) -> np.ndarray:
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


def tau(mo: Moments) -> float:
    between = np.var(mo.means, ddof=1) if mo.means.size > 1 else 0.0
    tau = geyer(mo.acov[:, None], np.array([between]), mo.means.size * mo.length,
                 np.array([mo.constant]))
    return float(tau[0])


def ess_of(mo: Moments) -> float:
    with np.errstate(divide="ignore"):
        return float(mo.means.size * mo.length / np.float64(tau(mo)))


def gelman_rubin(mo: Moments) -> float:
    """Potential scale reduction of split rows (Vehtari et al. 2021, eq. 3-4)."""
    n = mo.length
    within = mo.variances.mean()
    between = n * np.var(mo.means, ddof=1)
    if mo.constant:
        return float("inf") if between > 0 else float("nan")
    return float(np.sqrt((between / within + n - 1.0) / n))
