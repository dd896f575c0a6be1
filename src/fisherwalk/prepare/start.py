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
from ..base.keys import as_key
from ..engine import proposal
from ..engine.memory import check_start_memory
from ..engine.progress import progress_bar
from ..errors import FisherwalkWarning, InputError, NoModeError, explain, warn_user
from ..fit.laplace import LaplaceFit, laplace
from ..fit.modes import SCOUTS, describe_modes
from ..fit.symmetry import probe_symmetry, symmetry_warning
from ..persistence.tuningfile import SavedTuning, check_tuning
from ..samplers import registry
from ..samplers.auto import choose_sampler
from ..tuned.walker import (
    StartReport,
    Tuning,
    Walker,
    assemble,
    flat_logdensity,
    make_model,
)
from .aim import check_aim
from .evidence import weigh_evidence
from .laplace_starts import LAPLACE_DRAWS, laplace_sample, padded, spread_over_modes
from .modeless import modeless_start
from .starts import chosen_starts

__all__ = ["start", "proposal_shape", "tuning_for", "SHAPES", "LAPLACE_DRAWS"]

SHAPES = ("fisher", "diagonal", "identity")
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
    draft = Tuning(shape, None, cholesky, shape_kind, criterion)
    return draft.family.initial(draft)


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
    scouts: int = SCOUTS,
    progress: bool | None = None,
    sampler: str = "rwm",
    chain_starts: Any = None,
    target_acceptance: float | None = None,
    **laplace_options,
) -> Walker:
    """Tune a sampler from the Laplace approximation of the posterior.

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
        Extra mode searches from dispersed starting points (a check for other modes;
        ``spread=`` or ``box=(lower, upper)`` in ``laplace_options`` say where: see
        :func:`fisherwalk.laplace`).
    scouts
        Cheap searches for other modes from over-dispersed points, mode ± 15 posterior
        sd in antithetic pairs (:func:`fisherwalk.laplace`'s ``scouts``; they reuse the
        compiled search). 0 switches them off. When two or more distinct modes are
        found, the chains start spread across them (one chain per mode in order of
        Laplace mass, round robin), so that R-hat and the summary can see them, and a
        warning names the modes.
    progress
        Show the phases (the Laplace fit, compilation included, then the Laplace draws)
        as a progress bar; default: in a terminal and in a notebook.
    sampler
        ``"rwm"`` (random-walk Metropolis, the default), ``"mala"``, ``"hmc"`` or
        ``"nuts"`` (BlackJAX's own kernels, run on the posterior whitened by the metric
        S Sᵀ, H⁻¹ by default, with the step size the Gaussian limit gives for this d:
        Roberts & Rosenthal 1998, JRSS B 60(1) for MALA; Beskos, Pillai, Roberts,
        Sanz-Serna & Stuart 2013, Bernoulli 19(5A) for HMC; Hoffman & Gelman 2014, JMLR
        15 for NUTS, whose step then starts dual averaging), or ``"auto"``: time one
        batched log density and one batched gradient here and pick the sampler predicted
        to reach bulk ESS 400 first (the report says why). The choices are the registered
        sampler families (:mod:`fisherwalk.samplers.registry`) and ``"auto"``.
    chain_starts
        Each chain's own starting point instead of a draw of N(mode, H⁻¹): a pytree with
        the position's structure and a leading axis of length ``chains`` on every leaf.
        The report gives each start's distance from the mode in posterior sds
        (:mod:`fisherwalk.prepare.starts`); the Laplace draws still feed the PSIS check.
    target_acceptance
        HMC and NUTS (and "auto" when it picks them): the acceptance dual averaging aims
        for, in (0, 1); default the Gaussian-limit optimum for HMC and 0.8 for NUTS.
        Raise it (0.9, 0.95) when the summary reports divergent transitions; it is kept
        in the tuning file and the run record.
    **laplace_options
        Passed to :func:`fisherwalk.laplace` (e.g. ``max_iterations``).

    Returns
    -------
    Walker
        All the chains (not one chain): their starting positions, the proposal they
        share, and the report of the fit.

    Notes
    -----
    No mode: when the mode search runs off along one parameter while the log density
    keeps rising (a centred hierarchical model's log scale going to −∞, a funnel), start()
    warns (naming that parameter, the non-centred form first) and returns a NUTS walker
    warmed up from draws by BlackJAX's window adaptation from the best points the search
    visited (:mod:`fisherwalk.prepare.modeless`); ``report.laplace.no_mode`` says so.

    Evidence: with PSIS k̂ above its threshold the chain starts are resampled from the
    Laplace draws by their Pareto-smoothed weights (:mod:`fisherwalk.prepare.resample`), and
    "auto" discounts (k̂ > threshold; squared above 1) the random walk and MALA
    (:mod:`fisherwalk.prepare.evidence`). A posterior symmetric under swapping labels is said
    to be (:mod:`fisherwalk.fit.symmetry`).

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
                          todo="use 1 or more chains; 4 (the default) or more lets R-hat "
                               "compare chains.")
    if chains == 1:
        warn_user("chains=1: R-hat needs at least 2 chains to compare; with one chain it only "
                  "compares the chain's two halves, and a second mode or a stuck chain goes "
                  "unseen. Use chains=4 (the default) unless you know why one chain "
                  "suffices.", FisherwalkWarning)
    sampler = registry.check_sampler(sampler)
    aim = check_aim(target_acceptance, sampler)
    key = as_key(rng_key, where="start(rng_key=...)")
    dim = len(fit.names) if isinstance(fit, LaplaceFit) else sum(
        int(np.size(leaf)) for leaf in jax.tree.leaves(position))
    check_start_memory(chains, dim)  # before the fit: chains=10**10 is refused, not tried
    large = [_large_dim_note(dim)] if dim >= LARGE_DIM else []
    for message in large:  # before the fit, which is itself slow at this dimension
        warn_user(message, FisherwalkWarning)
    bar = progress_bar(2, progress, "start: Laplace fit (compiling, searching)", unit="phase")
    if fit is None:
        key_restarts = jax.random.fold_in(key, 1) if restarts or scouts else None
        try:
            fit = laplace(logdensity_fn, position, fisher=fisher, restarts=restarts,
                          rng_key=key_restarts, scouts=scouts, **laplace_options)
        except NoModeError as err:  # no mode: NUTS warmed up from draws (run.modeless)
            if bar is not None:
                bar.close()
            return modeless_start(logdensity_fn, position, key, chains, err.runaway,
                                  sampler=sampler, target_acceptance=aim,
                                  chain_starts=chain_starts)
    elif not isinstance(fit, LaplaceFit):
        raise InputError(explain(f"fit={type(fit).__name__} is not a LaplaceFit.",
                                 "start(fit=...)", "pass the result of fisherwalk.laplace()."))
    shape_matrix, kind = proposal_shape(shape, fit)
    tuning = tuning_for(shape_matrix, kind, fit.cholesky, criterion=criterion)
    notes = list(fit.warnings)
    if len(fit.modes_flat) > 1:  # one account of the modes, with their masses
        notes = [n for n in notes if "distinct modes found" not in n]
        notes.append(describe_modes(fit.modes_flat, [h for _, h in fit.modes],
                                    fit.modes_fisher, fit.names))
    for message in notes:  # other modes, a better restart: say it out loud
        warnings.warn(message, FisherwalkWarning, stacklevel=2)
    notes = large + notes
    if kind != "fisher":
        notes.append(
            f"Proposal shape '{kind}': the spectrum of A = Sᵀ H S spans "
            f"{tuning.spectrum[0]:.3g} to {tuning.spectrum[-1]:.3g}; scale {tuning.scale:.3f} "
            f"and target acceptance {tuning.target_acceptance:.3f} are chosen for it; relative "
            f"efficiency {tuning.choice.efficiency:.3f} of the matched proposal."
        )
    if bar is not None:
        bar.update(1)
        bar.set_description("start: Laplace draws, PSIS check")
    model = make_model(logdensity_fn, fit.mode, chains)
    positions, logdens, check, state_notes = laplace_sample(model.evaluate, fit, key, chains)
    symmetric = probe_symmetry(padded(model.evaluate, max(LAPLACE_DRAWS, chains)), fit.mode,
                               fit.mode_flat, fit.logdensity, fit.cholesky)
    if symmetric:  # label switching: said at start, kept in the report's notes
        warn_user(symmetry_warning(symmetric), FisherwalkWarning)
        state_notes.append(symmetry_warning(symmetric))
    notes.extend(state_notes)
    if chain_starts is not None:
        positions, logdens, note = chosen_starts(chain_starts, fit, model.evaluate, chains)
        notes.append(note)
    elif len(fit.modes_flat) > 1:
        positions, logdens, note = spread_over_modes(model.evaluate, fit, positions, logdens)
        notes.append(note)
    if sampler == registry.AUTO:
        picked = choose_sampler(flat_logdensity(model), positions, dim, model.evaluate)
        weighed = weigh_evidence(picked.seconds_per_answer, check.khat, check.threshold)
        sampler = weighed.sampler
        notes.extend(n for n in (picked.note, weighed.note) if n)
    if aim is not None and not registry.family(sampler).takes_target_acceptance:
        notes.append(f"target_acceptance={aim} was not used: sampler='auto' chose "
                     f"{sampler!r}, which has no dual averaging toward a target.")
        aim = None
    if sampler != tuning.sampler:  # another family: its own theory value for this shape
        tuning = registry.family(sampler).initial(
            Tuning(shape_matrix, None, fit.cholesky, kind, criterion, sampler=sampler,
                   aim=aim))
    described = tuning.family.describe(tuning)
    if described:
        notes.append(described)
    report = StartReport(fit, check, tuple(notes))
    if bar is not None:
        bar.update(1)
        bar.set_description("start: done")
        bar.close()
    return assemble(logdensity_fn, report, tuning, positions, logdens, model=model)
