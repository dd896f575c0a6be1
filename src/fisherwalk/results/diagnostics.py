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
* **Memory.** Each statistic is computed by :mod:`fisherwalk.results.mcse` one parameter at a
  time, reading the chains in blocks: the extra memory is a small multiple of one
  parameter's draws, never of all of them, whatever the floating dtype of the input.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from ..base.checks import whole_number
from ..errors import InputError, explain
from . import mcse
from .psis import khat_threshold, pareto_khat

__all__ = [
    "rhat",
    "ess_bulk",
    "ess_tail",
    "ess_mean",
    "integrated_autocorrelation_time",
    "autocorrelation",
    "mcse_mean",
    "mcse_sd",
    "mcse_quantile",
    "pareto_khat",
    "khat_threshold",
    "whitened_jump",
    "WhitenedJump",
]

_MIN_DRAWS = 4
_JUMP_BLOCK = 1 << 17  # numbers per block of steps in whitened_jump


# ---------------------------------------------------------------------------------------
# input handling
# ---------------------------------------------------------------------------------------


def _as_draws(x, where: str) -> tuple[np.ndarray, bool]:
    """Validate draws; return a floating array (chains, draws, d) and whether d was absent.

    Floating input of any width is kept as it is (no copy): the statistics convert one
    block at a time."""
    try:
        arr = np.asarray(x)
        if arr.dtype.kind != "f":
            arr = np.asarray(x, dtype=float)
    except (TypeError, ValueError) as err:
        raise InputError(explain(
            f"draws cannot be read as a floating-point array ({err})", where,
            "pass a numpy array of shape (chains, draws) or (chains, draws, d)")) from None
    if arr.ndim not in (2, 3):
        raise InputError(explain(
            f"draws have {arr.ndim} dimension(s), shape {arr.shape}", where,
            "pass shape (chains, draws) for one parameter or (chains, draws, d)"))
    scalar = arr.ndim == 2
    if scalar:
        arr = arr[:, :, None]
    chains, draws, dim = arr.shape
    if chains < 1 or dim < 1:
        raise InputError(explain(
            f"draws of shape {arr.shape[:2] if scalar else arr.shape} hold no chain or no "
            "parameter", where, "pass at least one chain and one parameter"))
    if draws < _MIN_DRAWS:
        raise InputError(explain(
            f"only {draws} draw(s) per chain; these diagnostics need at least {_MIN_DRAWS}",
            where, "run the chains longer (a few hundred draws per chain at the very least)"))
    if not np.isfinite(arr.sum(dtype=float)):  # finite only if every term is; no temporary
        _refuse_non_finite(arr, where)
    return arr, scalar


def _refuse_non_finite(arr: np.ndarray, where: str) -> None:
    bad = ~np.isfinite(arr)
    if bad.any():  # (a finite array whose sum overflowed passes)
        c, t, j = (int(i) for i in np.argwhere(bad)[0])
        chains_hit = sorted({int(i) for i in np.nonzero(bad.any(axis=(1, 2)))[0]})
        raise InputError(explain(
            f"draws hold {int(bad.sum())} non-finite value(s) (first: {arr[c, t, j]} at chain "
            f"{c}, draw {t}, parameter index {j}); no diagnostic is computed from them",
            f"{where}, chain(s) {chains_hit}",
            "drop the affected chains, or find why the sampler produced a non-finite "
            "position (a transform overflowing, an unconstrained parameter)"))


def _out(values: np.ndarray, scalar: bool):
    return float(values[0]) if scalar else values


def _each(arr: np.ndarray, statistic) -> np.ndarray:
    """A per-parameter statistic of (chains, draws, d) draws, one parameter at a time."""
    return np.array([statistic(arr[:, :, j]) for j in range(arr.shape[2])], dtype=float)


# ---------------------------------------------------------------------------------------
# public diagnostics (each computed by fisherwalk.results.mcse, one parameter's slice at a time)
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
    return _out(_each(arr, mcse.split_rhat), scalar)


def ess_bulk(x) -> float | np.ndarray:
    """Bulk effective sample size: ESS of the rank-normalised split chains.

    Vehtari et al. (2021), Bayesian Analysis 16(2), section 4.2. 0 for a parameter in
    which every chain is constant; never above ``N log10 N`` for ``N`` pooled draws.
    """
    arr, scalar = _as_draws(x, "ess_bulk(x)")
    return _out(_each(arr, mcse.bulk_ess), scalar)


def ess_tail(x) -> float | np.ndarray:
    """Tail effective sample size: the smaller ESS of the 5% and 95% quantile indicators.

    Vehtari et al. (2021), Bayesian Analysis 16(2), section 4.3. The quantiles are the
    linear-interpolation (type 7) quantiles of all draws pooled.
    """
    arr, scalar = _as_draws(x, "ess_tail(x)")
    return _out(_each(arr, mcse.tail_ess), scalar)


def ess_mean(x) -> float | np.ndarray:
    """Effective sample size for the posterior mean: split chains, no rank normalisation.

    Geyer (1992), Statistical Science 7(4), with the multi-chain pooling of
    Vehtari et al. (2021); this is the ESS behind :func:`mcse_mean`.
    """
    arr, scalar = _as_draws(x, "ess_mean(x)")
    return _out(_each(arr, mcse.mean_ess), scalar)


def integrated_autocorrelation_time(x) -> float | np.ndarray:
    """Integrated autocorrelation time tau = 1 + 2 sum_{t>=1} rho_t of the draws as given.

    Geyer's initial monotone sequence estimator (Geyer 1992, "Practical Markov chain
    Monte Carlo", Statistical Science 7(4)), with autocorrelations computed by FFT and
    pooled across chains as in Vehtari et al. (2021) (chains are not split here). For
    an AR(1) series with coefficient rho the true value is (1 + rho) / (1 - rho).
    Floored at ``1/log10 N`` like the ESS; ``inf`` when every chain is constant.
    """
    arr, scalar = _as_draws(x, "integrated_autocorrelation_time(x)")
    return _out(_each(arr, mcse.autocorrelation_time), scalar)


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
    for j in range(arr.shape[2]):
        total = np.zeros(max_lag + 1)
        for c in range(arr.shape[0]):  # one chain at a time: memory follows one chain
            acov = mcse.autocovariance(np.asarray(arr[c, :, j], dtype=float))[: max_lag + 1]
            total += acov / acov[0] if acov[0] > 0 else 1.0
        out[j] = total / arr.shape[0]
    return out[0] if scalar else out


def mcse_mean(x) -> float | np.ndarray:
    """Monte Carlo standard error of the posterior mean: sd / sqrt(ess_mean).

    sd is the standard deviation of all draws pooled (ddof 1); see Vehtari et al.
    (2021), Bayesian Analysis 16(2). ``inf`` when the ESS is 0 (a stuck parameter).
    """
    arr, scalar = _as_draws(x, "mcse_mean(x)")
    return _out(_each(arr, mcse.mean_mcse), scalar)


def mcse_sd(x) -> float | np.ndarray:
    """Monte Carlo standard error of the posterior sd: the delta method with the ESS of the
    squared centred draws (Vehtari et al. 2021; see :mod:`fisherwalk.results.mcse`, which also
    names the reference implementation it agrees with). ``inf`` when that ESS is 0."""
    arr, scalar = _as_draws(x, "mcse_sd(x)")
    return _out(_each(arr, mcse.sd_mcse), scalar)


def mcse_quantile(x, prob: float) -> float | np.ndarray:
    """Monte Carlo standard error of the posterior quantile at ``prob``: the ESS of the
    indicator I(x <= q) and a Beta law mapped back through the order statistics (Vehtari
    et al. 2021; see :mod:`fisherwalk.results.mcse`). ``inf`` when that ESS is 0."""
    where = "mcse_quantile(x, prob)"
    arr, scalar = _as_draws(x, where)
    if isinstance(prob, bool) or not isinstance(prob, int | float | np.number) or not (
        0.0 < float(prob) < 1.0
    ):
        raise InputError(explain(f"prob is {prob!r}", where,
                                 "pass a probability strictly between 0 and 1, e.g. 0.05"))
    return _out(_each(arr, lambda col: mcse.quantile_mcse(col, float(prob))), scalar)


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
    count = arr.shape[1]
    step = max(1, _JUMP_BLOCK // dim)
    per_chain = np.empty(arr.shape[0])
    for c in range(arr.shape[0]):  # blocks of steps: memory follows the block, not the draws
        total = 0.0
        for t in range(0, count - 1, step):
            block = np.asarray(arr[c, t : t + step + 1], dtype=float)
            jumps = np.diff(block, axis=0) @ factor  # rows (Lᵀ Δ)ᵀ = Δᵀ L
            total += float(np.sum(jumps**2))
        per_chain[c] = total / (count - 1)
    return WhitenedJump(mean=float(per_chain.mean()), per_chain=per_chain)
