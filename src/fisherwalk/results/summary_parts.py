"""What summarize() checks and pools: its inputs, validated by name, the acceptance's
Monte Carlo error across chains, and the correlation matrix accumulated in blocks."""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError, explain
from . import diagnostics

__all__ = ["checked_per_chain", "optional_float", "checked_interval", "checked_steps",
           "acceptance_error", "pooled_correlation", "proposal_correlation", "BLOCK"]

BLOCK = 1 << 17  # numbers per block of draws when the correlation matrix is accumulated


def checked_per_chain(value, chains: int, label: str, *, integer: bool = False):
    if value is None:
        return None
    arr = np.asarray(value, dtype=np.int64 if integer else float)
    if arr.shape != (chains,) or (not integer and not np.all(np.isfinite(arr))):
        raise InputError(
            explain(
                f"{label} has shape {arr.shape}, or holds non-finite values",
                f"summarize(..., {label}=...)",
                f"pass one finite value per chain, shape ({chains},)",
            )
        )
    return arr


def optional_float(value, label: str):
    if value is None:
        return None
    value = float(value)
    if not math.isfinite(value):
        raise InputError(explain(f"{label} is {value}", f"summarize(..., {label}=...)",
                                 "pass a finite number or None"))
    return value


def checked_interval(value) -> float:
    try:
        interval = float(value)
    except (TypeError, ValueError):
        interval = float("nan")
    if isinstance(value, bool) or not 0.0 < interval < 1.0:
        raise InputError(explain(f"interval={value!r} is not a probability strictly between "
                                 "0 and 1", "summarize(..., interval=...)",
                                 "pass the central interval's probability, e.g. 0.9 for "
                                 "the 5% and 95% quantiles"))
    return interval


def checked_steps(value, chains: int):
    if value is None:
        return None
    arr = np.asarray(value, dtype=float)
    if arr.ndim != 2 or arr.shape[0] != chains or arr.shape[1] < 1 or not np.all(
        np.isfinite(arr)
    ):
        raise InputError(explain(f"acceptance_steps has shape {arr.shape}, or holds non-finite "
                                 "values", "summarize(..., acceptance_steps=...)",
                                 f"pass the acceptance of each kept draw, shape ({chains}, "
                                 "draws), finite"))
    return arr


def acceptance_error(steps: np.ndarray) -> float:
    """Monte Carlo standard error of the pooled acceptance ā = (1/m) Σ_c ā_c.

    The m chains are independent, so Var(ā) = (1/m²) Σ_c Var(ā_c), and a chain's mean of
    n correlated values has Var(ā_c) = s_c² τ_c / n = s_c² / ESS_c (the Markov-chain
    central limit theorem; Geyer 1992, "Practical Markov chain Monte Carlo", Statistical
    Science 7(4)), s_c² the chain's variance of the per-draw acceptance and ESS_c its
    effective size for the mean (:func:`fisherwalk.results.diagnostics.ess_mean` on that
    chain). For independent 0/1 indicators it is the binomial √(p(1 − p)/(m n)). A chain
    whose acceptance never varies adds nothing; its ESS is floored at 1.
    """
    if steps.shape[1] < 4:
        return float("nan")
    total = 0.0
    for chain in steps:
        spread = float(np.var(chain, ddof=1))
        if spread > 0:
            ess = float(diagnostics.ess_mean(chain[None, :]))
            total += spread / max(ess, 1.0)
    return float(math.sqrt(total) / steps.shape[0])


def pooled_correlation(draws: np.ndarray, used, mean: np.ndarray) -> np.ndarray:
    """Correlation matrix of the used chains' draws pooled, accumulated in blocks."""
    dim = draws.shape[2]
    step = max(1, BLOCK // dim)
    total = np.zeros((dim, dim))
    for c in used:
        for t in range(0, draws.shape[1], step):
            block = np.asarray(draws[c, t : t + step], dtype=float) - mean
            total += block.T @ block
    sd = np.sqrt(np.diag(total))
    with np.errstate(divide="ignore", invalid="ignore"):
        return total / np.outer(sd, sd)  # nan for a constant parameter: never reported


def proposal_correlation(shape, dim: int) -> np.ndarray:
    factor = np.asarray(shape, dtype=float)
    if factor.ndim != 2 or factor.shape[0] != dim or not np.all(np.isfinite(factor)):
        raise InputError(explain(f"proposal_shape has shape {factor.shape} or non-finite "
                                 "entries", "summarize(..., proposal_shape=...)",
                                 f"pass the walker's ({dim}, {dim}) shape S (tuning.shape), "
                                 "or some of its rows for some of the parameters"))
    cov = factor @ factor.T
    sd = np.sqrt(np.diag(cov))
    with np.errstate(divide="ignore", invalid="ignore"):
        return cov / np.outer(sd, sd)
