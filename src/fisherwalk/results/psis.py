"""Pareto-smoothed importance sampling's k̂: how far importance ratios can be trusted.

(Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed importance sampling",
JMLR 25(72).) :func:`pareto_khat` fits a generalised Pareto distribution to the largest
ratios (Zhang & Stephens 2009's estimator); :func:`khat_threshold` is the sample-size
dependent limit min(1 − 1/log10 S, 0.7). Both are re-exported by
:mod:`fisherwalk.results.diagnostics`.
"""

from __future__ import annotations

import numpy as np

from ..base.checks import whole_number
from ..errors import InputError, explain

__all__ = ["pareto_khat", "khat_threshold"]


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
