"""start(): from a log density and a starting position to a tuned random walk.

The pipeline: Laplace fit (mode and observed Fisher information H), a proposal shape
S (by default S Sᵀ = H⁻¹), the scale l and target acceptance that the Gaussian limit
prescribes for this dimension and this shape, and chains drawn from N(mode, H⁻¹) so
that they start near stationarity (Bernstein-von Mises: the posterior is close to
that Gaussian when n is large; van der Vaart 1998, Asymptotic Statistics, ch. 10).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from typing import Any

import jax
import numpy as np

from ..base.checks import spd_matrix, whole_number
from ..base.keys import as_key, normals, stream
from ..errors import FisherwalkWarning, InputError, explain, warn_user
from ..fit.laplace import LaplaceFit, laplace
from ..results.diagnostics import khat_threshold, pareto_khat
from . import proposal
from .tuningfile import SavedTuning, check_tuning
from .walker import LaplaceCheck, StartReport, Tuning, Walker, assemble, make_model

__all__ = ["start", "proposal_shape", "tuning_for", "SHAPES", "LAPLACE_DRAWS"]

SHAPES = ("fisher", "diagonal", "identity")
LAPLACE_DRAWS = 500  # draws of N(mode, H⁻¹): chains start at some; all feed PSIS k̂
LARGE_DIM = 1000  # from here on start() says up front what to expect (see _large_dim_note)


def _user_shape(matrix, fit: LaplaceFit) -> np.ndarray:
    """A user's proposal covariance -> its lower Cholesky factor, validated."""
    cov = spd_matrix(matrix, fit.names, "start(shape=<matrix>)", what="proposal covariance",
                     todo="pass a positive-definite covariance matrix, or one of "
                          f"{', '.join(map(repr, SHAPES))}.")
    return np.linalg.cholesky(cov).astype(np.asarray(fit.mode_flat).dtype)


def _large_dim_note(dim: int) -> str:
    """What to expect of random-walk Metropolis at a large dimension, and what to use."""
    return (
        f"{dim} parameters: the fit computes a {dim} x {dim} Hessian (about "
        f"{dim * dim * 8 / 2**20:.0f} MiB per copy, and {dim} gradient evaluations), and a "
        "random walk needs of the order of d steps per effectively independent draw (its "
        "optimal step shrinks as 1/sqrt(d): Roberts, Gelman & Gilks 1997, Ann. Appl. "
        "Probab. 7(1)), so expect a small ESS unless thin x draws is many times d. A "
        "gradient-based sampler such as NUTS needs far fewer steps at this dimension "
        "(of the order of d^(1/4) for HMC: Beskos, Pillai, Roberts, Sanz-Serna & Stuart "
        "2013, Bernoulli 19(5A))."
    )


def proposal_shape(shape, fit: LaplaceFit) -> tuple[jax.Array, str]:
    """The proposal shape S for a named kind or a user covariance matrix."""
    dtype = np.asarray(fit.mode_flat).dtype
    fisher_shape = proposal.shape_from_cholesky(fit.cholesky).astype(dtype)
    if isinstance(shape, str):
        if shape == "fisher":
            return fisher_shape, "fisher"
        if shape == "diagonal":
            sd = np.sqrt(np.sum(fisher_shape**2, axis=1))  # sqrt(diag(H⁻¹))
            return np.diag(sd), "diagonal"
        if shape == "identity":
            return np.eye(len(fit.names), dtype=dtype), "identity"
        raise InputError(
            explain(
                f"shape={shape!r} is not a known proposal shape.",
                "start(shape=...)",
                f"use one of {', '.join(map(repr, SHAPES))}, or pass a (d, d) covariance matrix.",
            )
        )
    if isinstance(shape, SavedTuning):
        check_tuning(shape, fit.names)
        return np.asarray(shape.tuning.shape, dtype=dtype), "saved"
    if isinstance(shape, Tuning):
        check_tuning(SavedTuning(shape, None, None), fit.names)
        return np.asarray(shape.shape, dtype=dtype), "saved"
    return _user_shape(shape, fit), "user"


def tuning_for(shape, shape_kind: str, cholesky, *, criterion: str = "slowest") -> Tuning:
    """The tuning of a proposal shape against the precision L Lᵀ, at the optimal scale.

    The matched shape uses the exact chi-law computation; any other shape uses the
    spectrum of A = Sᵀ H S (see :func:`fisherwalk.optimal_scale`).
    """
    shape, cholesky = np.asarray(shape), np.asarray(cholesky)
    draft = Tuning(shape, 1.0, cholesky, shape_kind, criterion)
    return draft._replace(scale=float(draft.choice.scale))


def _laplace_sample(evaluate, fit: LaplaceFit, key, chains: int):
    """Draw from N(mode, H⁻¹); chains start at the first draws with a finite log density.

    The same draws give the Pareto-smoothed importance-sampling check of the Laplace
    approximation (Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed
    importance sampling", JMLR 25(72)): log weights log π(θ) − log q(θ).
    """
    mode = np.asarray(fit.mode_flat)
    fisher_shape = proposal.shape_from_cholesky(fit.cholesky).astype(mode.dtype)
    size = max(LAPLACE_DRAWS, chains)
    z = normals(stream(key, 3), (size, mode.shape[0]), mode.dtype)
    draws = mode + z @ fisher_shape.T
    logp = np.asarray(evaluate(draws))
    finite = np.isfinite(logp)
    logq = -0.5 * np.sum(z**2, axis=1)
    khat = float(pareto_khat((logp - logq)[finite])) if finite.sum() > 10 else float("inf")
    check = LaplaceCheck(khat, float(khat_threshold(size)), size, int((~finite).sum()))
    notes: list[str] = []
    good = np.flatnonzero(finite)[:chains]
    positions = np.repeat(mode[None], chains, axis=0)
    logdens = np.full(chains, fit.logdensity, dtype=positions.dtype)
    positions[: len(good)] = draws[good]
    logdens[: len(good)] = logp[good]
    if check.outside_support:
        notes.append(
            f"{check.outside_support} of {size} draws from the Laplace approximation fell "
            "where the log density is not finite (outside the support?); chains start at "
            "finite ones."
        )
    if len(good) < chains:
        notes.append(
            f"Chains {', '.join(map(str, range(len(good), chains)))} start at the mode: too "
            "few Laplace draws had a finite log density."
        )
    if khat > check.threshold:
        notes.append(
            f"PSIS k̂ = {khat:.2f} exceeds {check.threshold:.2f}: the Laplace approximation "
            "misses the posterior's tails (refine() will check the shape and may re-estimate it)."
        )
    return positions, logdens, check, notes


def start(
    logdensity_fn: Callable,
    position: Any,
    rng_key: jax.Array,
    chains: int = 4,
    *,
    fit: LaplaceFit | None = None,
    fisher=None,
    shape="fisher",
    criterion: str = "slowest",
    restarts: int = 0,
    **laplace_options,
) -> Walker:
    """Tune random-walk Metropolis from the Laplace approximation of the posterior.

    Parameters
    ----------
    logdensity_fn
        The log posterior (up to a constant), ``position -> scalar``; pure JAX.
    position
        A starting position (pytree of floating arrays) for the mode search.
    rng_key
        A JAX key (typed or old-style); used for the chains' starting points and restarts.
    chains
        Number of chains.
    fit
        A :class:`LaplaceFit` to reuse instead of fitting again.
    fisher
        Your own Fisher information: a (d, d) matrix or a function of the mode
        (e.g. the expected information of a GLM, McCullagh & Nelder 1989).
    shape
        Proposal shape: ``"fisher"`` (S Sᵀ = H⁻¹, the default), ``"diagonal"`` (the
        Laplace marginal variances), ``"identity"``, a (d, d) covariance matrix, or the
        ``tuning`` of a saved walker (:func:`fisherwalk.load_tuning`).
    criterion
        For a shape that does not match H: ``"slowest"`` maximises the slowest
        direction's jump (it governs the minimum ESS), ``"total"`` the total jump.
    restarts
        Extra mode searches from dispersed starting points (a check for other modes).
    **laplace_options
        Passed to :func:`fisherwalk.laplace` (e.g. ``max_iterations``).

    Returns
    -------
    Walker

    Notes
    -----
    The scale l and the target acceptance maximise the expected squared jump of the
    Gaussian limit (Roberts, Gelman & Gilks 1997, Ann. Appl. Probab. 7(1); Gelman,
    Roberts & Gilks 1996, Bayesian Statistics 5), computed for this finite d.

    Examples
    --------
    >>> import jax, jax.numpy as jnp, fisherwalk
    >>> jax.config.update("jax_enable_x64", True)
    >>> walker = fisherwalk.start(lambda x: -0.5 * jnp.sum(x**2), jnp.zeros(3),
    ...                           jax.random.key(0))
    >>> round(walker.tuning.target_acceptance, 2)
    0.31
    """
    chains = whole_number(chains, "chains", "start(chains=...)",
                          todo="use at least 2 chains (4 is the default) so that R-hat can "
                               "compare them.")
    key = as_key(rng_key, where="start(rng_key=...)")
    dim = len(fit.names) if isinstance(fit, LaplaceFit) else sum(
        int(np.size(leaf)) for leaf in jax.tree.leaves(position))
    large = [_large_dim_note(dim)] if dim >= LARGE_DIM else []
    for message in large:  # before the fit, which is itself slow at this dimension
        warn_user(message, FisherwalkWarning)
    if fit is None:
        key_restarts = jax.random.fold_in(key, 1) if restarts else None
        fit = laplace(logdensity_fn, position, fisher=fisher, restarts=restarts,
                      rng_key=key_restarts, **laplace_options)
    elif not isinstance(fit, LaplaceFit):
        raise InputError(explain(f"fit={type(fit).__name__} is not a LaplaceFit.",
                                 "start(fit=...)", "pass the result of fisherwalk.laplace()."))
    shape_matrix, kind = proposal_shape(shape, fit)
    tuning = tuning_for(shape_matrix, kind, fit.cholesky, criterion=criterion)
    notes = large + list(fit.warnings)
    for message in fit.warnings:  # other modes, a better restart: say it out loud
        warnings.warn(message, FisherwalkWarning, stacklevel=2)
    if kind != "fisher":
        notes.append(
            f"Proposal shape '{kind}': the spectrum of A = Sᵀ H S spans "
            f"{tuning.spectrum[0]:.3g} to {tuning.spectrum[-1]:.3g}; scale {tuning.scale:.3f} "
            f"and target acceptance {tuning.target_acceptance:.3f} are chosen for it; relative "
            f"efficiency {tuning.choice.efficiency:.3f} of the matched proposal."
        )
    model = make_model(logdensity_fn, fit.mode, chains)
    positions, logdens, check, state_notes = _laplace_sample(model.evaluate, fit, key, chains)
    notes.extend(state_notes)
    report = StartReport(fit, check, tuple(notes))
    return assemble(logdensity_fn, report, tuning, positions, logdens, model=model)
