"""Better chain starts from the same Laplace draws: sampling importance resampling.

start() draws S points from N(mode, H⁻¹) and computes their importance ratios
w = π / q for PSIS k̂. When k̂ is high, the Laplace draws are not where the posterior's
mass is, and chains started at the first few of them start far from the bulk. Sampling
importance resampling (Rubin 1988, "Using the SIR algorithm to simulate posterior
distributions", Bayesian Statistics 3) picks the starts with probability proportional to
the Pareto-smoothed weights (Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed
importance sampling", JMLR 25(72)), without replacement, so that when a few weights
dominate the chains still start at distinct points (Skare, Bølviken & Holden 2003,
"Improved sampling-importance resampling and reduced bias importance sampling", Scand.
J. Statist. 30(4), on resampling without replacement). No extra log density is spent.

Smoothing: the M = ceil(min(0.2 S, 3 sqrt(S))) largest weights are replaced by the
expected order statistics of a generalized Pareto law fitted to them (shape k̂ from
:func:`fisherwalk.results.diagnostics.pareto_khat`; scale from the exceedances' median,
median = σ (2^k − 1)/k, our simplification of the paper's joint fit), capped at the
largest raw weight.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy.special import ndtr

from ..base.keys import normals
from ..results.diagnostics import pareto_khat

__all__ = ["Resampled", "smoothed_log_weights", "resample_starts"]


class Resampled(NamedTuple):
    """Chain starts picked by SIR, and how far they moved."""

    positions: np.ndarray  # (chains, d)
    indices: np.ndarray  # (chains,) which Laplace draws
    shift: np.ndarray  # (d,) mean of the new starts − mean of the old, in Laplace sd
    note: str


def smoothed_log_weights(log_weights: np.ndarray) -> np.ndarray:
    """Pareto-smoothed log importance weights (module docstring), normalised to sum 1."""
    lw = np.asarray(log_weights, np.float64) - np.max(log_weights)
    size = lw.size
    tail = int(math.ceil(min(0.2 * size, 3.0 * math.sqrt(size))))
    order = np.argsort(lw)
    khat = float(pareto_khat(lw)) if size > 20 else math.inf
    if tail >= 5 and math.isfinite(khat) and khat != 0.0:
        cutoff = lw[order[size - tail - 1]]
        exceed = np.exp(lw[order[size - tail:]]) - math.exp(cutoff)
        median = float(np.median(exceed))
        sigma = median * khat / (2.0**khat - 1.0)
        probs = (np.arange(1, tail + 1) - 0.5) / tail
        smoothed = math.exp(cutoff) + sigma / khat * ((1.0 - probs) ** (-khat) - 1.0)
        smoothed = np.minimum(smoothed, 1.0)  # the largest raw weight (shifted to 1)
        lw = lw.copy()
        lw[order[size - tail:]] = np.log(np.maximum(smoothed, 1e-300))
    return lw - np.logaddexp.reduce(lw)


def resample_starts(draws: np.ndarray, log_weights: np.ndarray, old: np.ndarray,
                    philox_key, sd: np.ndarray, names) -> Resampled:
    """``len(old)`` starts from ``draws`` by SIR without replacement (Gumbel top-k:
    the k largest of log w + Gumbel noise are a weighted draw without replacement,
    Efraimidis & Spirakis 2006, "Weighted random sampling with a reservoir", Inf.
    Process. Lett. 97(5)); ``sd`` the Laplace sds for the report."""
    chains = old.shape[0]
    lw = smoothed_log_weights(log_weights)
    u = np.clip(ndtr(normals(philox_key, (lw.size,))), 1e-300, 1 - 1e-16)
    keys = lw - np.log(-np.log(u))
    picked = np.argsort(-keys)[:chains]
    positions = draws[picked]
    shift = (positions.mean(axis=0) - old.mean(axis=0)) / sd
    i = int(np.argmax(np.abs(shift)))
    ess = float(1.0 / np.sum(np.exp(2 * lw)))
    note = (f"Chain starts resampled from the {lw.size} Laplace draws by their Pareto-"
            f"smoothed importance weights (sampling importance resampling without "
            f"replacement; the weights' effective size is {ess:.0f}): the starts' mean "
            f"moved by up to {abs(shift[i]):.2f} Laplace sd ({names[i]}, "
            f"{shift[i]:+.2f}).")
    return Resampled(positions, picked, shift, note)
