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
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from blackjax.mcmc.random_walk import RWState

from . import proposal, pytrees
from .engine import make_engine
from .errors import FisherwalkWarning, InputError, explain
from .keys import as_key, normals, stream
from .laplace import LaplaceFit, laplace
from .scaling import ScaleChoice, optimal_scale

SHAPES = ("fisher", "diagonal", "identity")


class Tuning(NamedTuple):
    """The proposal a walker uses: theta' = theta + factor @ z, z ~ N(0, I)."""

    scale: float  # l, the dimension-free scale
    target_acceptance: float  # acceptance the theory predicts at this scale and shape
    factor: np.ndarray  # (d, d) (l / sqrt(d)) * shape, handed to BlackJAX as sigma
    shape: np.ndarray  # (d, d) S; S Sᵀ is the proposal's covariance up to l²/d
    dim: int  # d
    shape_kind: str  # "fisher", "diagonal", "identity", "user", "saved" or "warm-up"
    spectrum: np.ndarray  # (d,) eigenvalues of A = Sᵀ P S, P the precision the walker believes
    predicted_jump: float  # expected squared jump per step in whitened units at this scale
    choice: ScaleChoice  # the full scale computation behind scale and target_acceptance
    whitening: np.ndarray  # (d, d) lower L with L Lᵀ = P: whitened position = Lᵀ (theta - mode)


class StartReport(NamedTuple):
    """How a walker was obtained."""

    laplace: LaplaceFit  # the mode and Fisher information
    check: Any  # LaplaceCheck: PSIS k̂ of the Laplace approximation, before any step
    notes: tuple[str, ...]  # what start() did that a user should know
    warmup: Any = None  # set by refine(): a warmup.WarmupReport


class Walker(NamedTuple):
    """Everything needed to run tuned random-walk Metropolis chains.

    ``algorithm`` is BlackJAX's additive-step random walk with this walker's proposal;
    ``states`` holds one BlackJAX ``RWState`` per chain, batched along a leading axis,
    ready for ``jax.vmap(algorithm.step)``.
    """

    algorithm: Any  # blackjax SamplingAlgorithm(init, step)
    states: RWState  # position (user's pytree, leading chain axis), logdensity (chains,)
    tuning: Tuning  # scale, target acceptance, factor, shape, spectrum
    report: StartReport  # the Laplace fit and notes
    logdensity_fn: Callable  # the user's log density, position pytree -> scalar
    names: tuple[str, ...]  # one name per scalar parameter, ravelled order
    unravel: Callable  # (d,) vector -> the user's pytree
    engine: Callable  # the multi-chain loop (engine.make_engine), compiled once per walker
    evaluate: Callable  # jitted batched log density, (m, d) -> (m,)

    @property
    def chains(self) -> int:
        return int(np.shape(self.states.logdensity)[0])

    @property
    def flat_logdensity(self) -> Callable:
        """The log density on the ravelled position."""
        unravel, fn = self.unravel, self.logdensity_fn
        return lambda vector: fn(unravel(vector))

    def flat_positions(self) -> np.ndarray:
        """Chain positions ravelled: (chains, d), on the host."""
        return pytrees.ravel_batch(self.states.position)

    def unravel_many(self, flat) -> Any:
        """(..., d) ravelled positions -> the user's pytree with the same leading axes."""
        return pytrees.unravel_batch(flat, self.report.laplace.mode)


def _validate_chains(chains) -> int:
    if isinstance(chains, bool) or not isinstance(chains, int | np.integer) or chains < 1:
        raise InputError(
            explain(
                f"chains={chains!r} is not a positive whole number.",
                "start(chains=...)",
                "use at least 2 chains (4 is the default) so that R-hat can compare them.",
            )
        )
    return int(chains)


def _user_shape(matrix, fit: LaplaceFit) -> jax.Array:
    """A user's proposal covariance -> its lower Cholesky factor, validated."""
    d = len(fit.names)
    try:
        cov = np.asarray(matrix, dtype=float)
    except (TypeError, ValueError) as err:
        raise InputError(explain(f"shape={type(matrix).__name__} is neither a known shape nor "
                                 "a matrix.", "start(shape=...)",
                                 f"use one of {', '.join(map(repr, SHAPES))}, or a (d, d) "
                                 "covariance matrix.")) from err
    where = "start(shape=<matrix>)"
    if cov.shape != (d, d):
        raise InputError(
            explain(
                f"The proposal covariance has shape {cov.shape}; expected ({d}, {d}) in the "
                f"ravelled parameter order {', '.join(fit.names[:6])}{', ...' if d > 6 else ''}.",
                where,
                "pass a (d, d) covariance matrix for the proposal shape.",
            )
        )
    if not np.isfinite(cov).all():
        raise InputError(explain("The proposal covariance has non-finite entries.", where,
                                 "pass a finite symmetric positive-definite matrix."))
    asym = np.abs(cov - cov.T) / (np.abs(cov) + np.abs(cov.T) + 1e-300)
    if asym.max() > 1e-8:
        i, j = np.unravel_index(np.argmax(asym), asym.shape)
        raise InputError(
            explain(
                f"The proposal covariance is not symmetric: entries ({fit.names[i]}, "
                f"{fit.names[j]}) and ({fit.names[j]}, {fit.names[i]}) differ.",
                where,
                "pass a symmetric matrix, e.g. (M + M.T) / 2.",
            )
        )
    eigval, eigvec = np.linalg.eigh(cov)
    if eigval[0] <= 1e-12 * max(eigval[-1], 1e-300):
        worst = np.argsort(-np.abs(eigvec[:, 0]))[:3]
        raise InputError(
            explain(
                "The proposal covariance is not positive definite (smallest eigenvalue "
                f"{eigval[0]:.3g}); the direction involves "
                f"{', '.join(fit.names[k] for k in worst)}.",
                where,
                "pass a positive-definite covariance matrix.",
            )
        )
    return np.linalg.cholesky(cov).astype(np.asarray(fit.mode_flat).dtype)


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
    if isinstance(shape, Tuning):
        from .record import check_tuning

        check_tuning(shape, fit.names)
        return np.asarray(shape.shape, dtype=dtype), "saved"
    return _user_shape(shape, fit), "user"


def spectrum_of(shape: jax.Array, cholesky: jax.Array) -> np.ndarray:
    """Eigenvalues of A = Sᵀ H S with H = L Lᵀ: the squared singular values of Lᵀ S."""
    m = np.asarray(cholesky).T @ np.asarray(shape)
    return np.sort(np.linalg.svd(m, compute_uv=False) ** 2)


def tune(shape, shape_kind: str, cholesky, *, criterion: str = "slowest",
         scale: float | None = None) -> Tuning:
    """Scale and target acceptance for a proposal shape against the precision L Lᵀ.

    The matched shape uses the exact chi-law computation; any other shape uses the
    spectrum of A = Sᵀ H S (see :func:`fisherwalk.optimal_scale`).
    """
    shape = np.asarray(shape)
    cholesky = np.asarray(cholesky)
    dim = int(shape.shape[0])
    spectrum = spectrum_of(shape, cholesky)
    matched = bool(np.allclose(spectrum, 1.0, rtol=1e-6, atol=0.0))
    choice = optimal_scale(dim) if matched else optimal_scale(dim, spectrum, criterion=criterion)
    if scale is None:
        scale, target, jump = choice.scale, choice.acceptance, choice.jump_distance
    else:
        from .scaling import expected_acceptance, expected_jump

        sp = None if matched else spectrum
        target = float(expected_acceptance(scale, dim, sp))
        jump = float(expected_jump(scale, dim, sp))
    factor = proposal.proposal_factor(shape, scale)
    return Tuning(float(scale), float(target), factor, shape, dim, shape_kind, spectrum,
                  float(jump), choice, cholesky)


LAPLACE_DRAWS = 500  # draws of N(mode, H⁻¹): chains start at some; all feed PSIS k̂


class LaplaceCheck(NamedTuple):
    """PSIS check of the Laplace approximation against the posterior, before any step."""

    khat: float  # Pareto k̂ of the importance ratios posterior / Laplace
    threshold: float  # min(1 - 1/log10 S, 0.7) (Vehtari et al. 2024, JMLR 25(72))
    draws: int  # S, the number of Laplace draws
    outside_support: int  # draws where the log density was not finite


def _laplace_sample(evaluate, fit: LaplaceFit, key, chains: int):
    """Draw from N(mode, H⁻¹); chains start at the first draws with a finite log density.

    The same draws give the Pareto-smoothed importance-sampling check of the Laplace
    approximation (Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed
    importance sampling", JMLR 25(72)): log weights log π(θ) − log q(θ).
    """
    from .diagnostics import khat_threshold, pareto_khat

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
    chains = _validate_chains(chains)
    key = as_key(rng_key, where="start(rng_key=...)")
    if fit is None:
        key_restarts = jax.random.fold_in(key, 1) if restarts else None
        fit = laplace(logdensity_fn, position, fisher=fisher, restarts=restarts,
                      rng_key=key_restarts, **laplace_options)
    elif not isinstance(fit, LaplaceFit):
        raise InputError(explain(f"fit={type(fit).__name__} is not a LaplaceFit.",
                                 "start(fit=...)", "pass the result of fisherwalk.laplace()."))
    flat, unravel = jax.flatten_util.ravel_pytree(fit.mode)

    def flat_logdensity(vector):
        return logdensity_fn(unravel(vector))

    shape_matrix, kind = proposal_shape(shape, fit)
    tuning = tune(shape_matrix, kind, fit.cholesky, criterion=criterion)
    notes = list(fit.warnings)
    for message in fit.warnings:  # other modes, a better restart: say it out loud
        warnings.warn(message, FisherwalkWarning, stacklevel=2)
    if kind != "fisher":
        notes.append(
            f"Proposal shape '{kind}': the spectrum of A = Sᵀ H S spans "
            f"{tuning.spectrum[0]:.3g} to {tuning.spectrum[-1]:.3g}; scale {tuning.scale:.3f} "
            f"and target acceptance {tuning.target_acceptance:.3f} are chosen for it; relative "
            f"efficiency {tuning.choice.efficiency:.3f} of the matched proposal."
        )
    evaluate = jax.jit(jax.vmap(flat_logdensity))
    positions, logdens, check, state_notes = _laplace_sample(evaluate, fit, key, chains)
    notes.extend(state_notes)
    states = RWState(jax.tree.map(jnp.asarray, pytrees.unravel_batch(positions, fit.mode)),
                     jnp.asarray(logdens))
    algorithm = proposal.blackjax_algorithm(logdensity_fn, tuning.factor)
    engine = make_engine(flat_logdensity, chains)
    return Walker(algorithm, states, tuning, StartReport(fit, check, tuple(notes)),
                  logdensity_fn, tuple(fit.names), unravel, engine, evaluate)


def with_tuning(walker: Walker, tuning: Tuning, *, states: RWState | None = None,
                report: StartReport | None = None) -> Walker:
    """A new walker with another tuning (nothing mutated)."""
    return walker._replace(
        algorithm=proposal.blackjax_algorithm(walker.logdensity_fn, tuning.factor),
        tuning=tuning,
        states=walker.states if states is None else states,
        report=walker.report if report is None else report,
    )
