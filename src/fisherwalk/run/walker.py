"""The walker: every chain of a run, as data, and the one way to build it.

A :class:`Walker` holds all the chains of a run (not one chain). It is three pieces of
data and the closures made once from the user's log density:

- ``state``: the chains' positions ravelled to (chains, d) and their log densities
  (chains,), the engine's own form;
- ``tuning``: the proposal (:class:`Tuning`: the shape S, the scale l, the precision
  factor the walker believes in); everything else about it is derived;
- ``report``: how the walker was obtained (:class:`StartReport`: the Laplace fit, the
  check of it, notes, and the warm-up report once :func:`fisherwalk.refine` ran);
- ``model``: the closures (:class:`Model`), built by :func:`assemble`, which
  :func:`fisherwalk.start`, :func:`fisherwalk.load_tuning`'s rebuild and
  :func:`fisherwalk.resume` all use; warm-up and sampling replace ``state``, ``tuning``
  and ``report`` and keep ``model``.

BlackJAX's view (``algorithm`` and the batched ``states`` in the user's pytree) is
derived on request, for users who run their own BlackJAX loop.
"""

from __future__ import annotations

import hashlib
from collections import OrderedDict
from collections.abc import Callable
from typing import Any, NamedTuple

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
from blackjax.mcmc.hmc import HMCState
from blackjax.mcmc.mala import MALAState
from blackjax.mcmc.random_walk import RWState
from scipy.linalg import solve_triangular

from ..base import pytrees
from ..errors import InputError, SamplingError, explain
from ..fit.laplace import LaplaceFit
from ..theory.gradient import (
    NUTS_TARGET_ACCEPTANCE,
    GradientChoice,
    optimal_gradient_step,
    step_acceptance,
)
from ..theory.randomwalk import (
    ScaleChoice,
    expected_acceptance,
    expected_jump,
    is_matched,
    optimal_scale,
)
from . import proposal
from .engine import ChainState, make_engine

__all__ = ["Tuning", "GradientTuning", "LaplaceCheck", "StartReport", "Model", "Walker",
           "make_model", "assemble", "continuable_state", "spectrum_of"]


class Tuning(NamedTuple):
    """A proposal: theta' = theta + (l / sqrt(d)) S z, z ~ N(0, I_d).

    Only what cannot be derived is stored; the factor, the spectrum, the scale choice,
    the target acceptance and the predicted jump are computed from it (and memoised).
    """

    shape: np.ndarray  # (d, d) S; S Sᵀ is the proposal covariance up to l²/d
    scale: float  # l, the dimension-free scale
    whitening: np.ndarray  # (d, d) lower L, L Lᵀ = P, the precision the walker believes
    shape_kind: str  # "fisher", "diagonal", "identity", "user", "saved" or "warm-up"
    criterion: str = "slowest"  # scale criterion for a shape that does not match P

    @property
    def dim(self) -> int:
        return int(np.shape(self.shape)[0])

    @property
    def factor(self) -> np.ndarray:
        """(d, d) (l / sqrt(d)) S, handed to BlackJAX as ``sigma`` (a square root)."""
        return proposal.proposal_factor(self.shape, self.scale)

    @property
    def spectrum(self) -> np.ndarray:
        """(d,) eigenvalues of A = Sᵀ P S, ascending (all ones when S Sᵀ = P⁻¹)."""
        return _geometry(self)["spectrum"]

    @property
    def matched(self) -> bool:
        """Whether the proposal matches the precision (A = I within rounding)."""
        return bool(_geometry(self)["matched"])

    @property
    def choice(self) -> ScaleChoice:
        """The optimal scale for this shape in the Gaussian picture."""
        return _geometry(self)["choice"]

    @property
    def target_acceptance(self) -> float:
        """The acceptance the Gaussian picture predicts at ``scale`` for this shape."""
        return _derived(self)["acceptance"]

    @property
    def predicted_jump(self) -> float:
        """Expected squared jump per step, whitened units, at ``scale`` for this shape."""
        return _derived(self)["jump"]


_MEMO: OrderedDict[bytes, dict] = OrderedDict()
_MEMO_SIZE = 128


def _memo(key: bytes, compute: Callable[[], dict]) -> dict:
    if key in _MEMO:
        _MEMO.move_to_end(key)
        return _MEMO[key]
    value = _MEMO[key] = compute()
    if len(_MEMO) > _MEMO_SIZE:
        _MEMO.popitem(last=False)
    return value


def _geometry(tuning: Tuning) -> dict:
    """Spectrum and optimal scale choice of a tuning's shape (memoised by content)."""
    shape, whitening = np.asarray(tuning.shape), np.asarray(tuning.whitening)
    h = hashlib.blake2b(digest_size=20)
    for part in (shape, whitening):
        h.update(str(part.dtype).encode() + repr(part.shape).encode())
        h.update(np.ascontiguousarray(part).tobytes())
    h.update(tuning.criterion.encode())

    def compute() -> dict:
        spectrum = spectrum_of(shape, whitening)
        matched = is_matched(spectrum)
        choice = (optimal_scale(shape.shape[0]) if matched
                  else optimal_scale(shape.shape[0], spectrum, criterion=tuning.criterion))
        return {"spectrum": spectrum, "matched": matched, "choice": choice, "key": key}

    key = h.digest()
    return _memo(key, compute)


def _derived(tuning: Tuning) -> dict:
    """The geometry, and the acceptance and jump predicted at the tuning's scale."""
    geometry = _geometry(tuning)
    choice, scale = geometry["choice"], float(tuning.scale)

    def compute() -> dict:
        if scale == choice.scale:
            acceptance, jump = choice.acceptance, choice.jump_distance
        else:
            sp = None if geometry["matched"] else geometry["spectrum"]
            acceptance = float(expected_acceptance(scale, choice.dim, sp))
            jump = float(expected_jump(scale, choice.dim, sp))
        return {**geometry, "acceptance": float(acceptance), "jump": float(jump)}

    return _memo(geometry["key"] + repr(scale).encode(), compute)


def spectrum_of(shape, cholesky) -> np.ndarray:
    """Eigenvalues of A = Sᵀ H S with H = L Lᵀ: the squared singular values of Lᵀ S."""
    m = np.asarray(cholesky).T @ np.asarray(shape)
    return np.sort(np.linalg.svd(m, compute_uv=False) ** 2)


class GradientTuning(NamedTuple):
    """A gradient sampler (BlackJAX's MALA, HMC or NUTS) with the metric S Sᵀ.

    The chains run on the whitened posterior z -> log pi(mode + W z), W Wᵀ = S Sᵀ
    (:mod:`fisherwalk.run.gradient`); S Sᵀ = H⁻¹ for the default, matched metric. Only
    what cannot be derived is stored.
    """

    sampler: str  # "mala", "hmc" or "nuts"
    step_size: float  # BlackJAX's step_size (h/2 for MALA, the leapfrog ε for HMC, NUTS)
    shape: np.ndarray  # (d, d) S: S Sᵀ is the inverse mass matrix (the metric)
    whitening: np.ndarray  # (d, d) lower L, L Lᵀ = P, the precision the walker believes
    shape_kind: str  # "fisher", "diagonal", "identity", "user", "saved" or "warm-up"
    aim: float | None = None  # the user's target_acceptance for dual averaging (HMC, NUTS)

    @property
    def dim(self) -> int:
        return int(np.shape(self.shape)[0])

    @property
    def scale(self) -> float:
        """The step size (shown where the random walk shows its scale l)."""
        return float(self.step_size)

    @property
    def inverse_mass_matrix(self) -> np.ndarray:
        """S Sᵀ, BlackJAX's dense ``inverse_mass_matrix``."""
        s = np.asarray(self.shape)
        m = s @ s.T
        return 0.5 * (m + m.T)

    @property
    def precision_cholesky(self) -> np.ndarray:
        """Lower C with C Cᵀ = (S Sᵀ)⁻¹ (the whitening itself when the metric is H⁻¹)."""
        if self.matched:
            return np.asarray(self.whitening)
        return np.linalg.cholesky(np.linalg.inv(self.inverse_mass_matrix))

    @property
    def spectrum(self) -> np.ndarray:
        """(d,) eigenvalues of A = Sᵀ P S, ascending (all ones for the matched metric)."""
        return spectrum_of(self.shape, self.whitening)

    @property
    def matched(self) -> bool:
        return is_matched(self.spectrum)

    @property
    def choice(self) -> GradientChoice:
        """The theory step for this sampler and d (Gaussian limit, whitened target)."""
        return optimal_gradient_step(self.sampler, self.dim)

    @property
    def integration_steps(self) -> tuple[int, int] | None:
        """HMC: the least and most leapfrog steps of the jittered integration time."""
        return self.choice.integration_steps if self.sampler == "hmc" else None

    @property
    def target_acceptance(self) -> float:
        """The acceptance predicted at ``step_size`` on the Gaussian picture (NUTS: the
        dual-averaging target, 0.8, which its circle model only roughly predicts); the
        user's ``target_acceptance`` when one was given."""
        if self.aim is not None:
            return float(self.aim)
        if self.sampler == "nuts":
            return NUTS_TARGET_ACCEPTANCE
        return float(step_acceptance(self.sampler, self.step_size, self.dim))

    @property
    def predicted_jump(self) -> float:
        """Expected squared jump per step, whitened units, at the theory step (all d)."""
        return float(self.choice.jump_distance * self.dim)


class LaplaceCheck(NamedTuple):
    """PSIS check of the Laplace approximation against the posterior, before any step."""

    khat: float  # Pareto k̂ of the importance ratios posterior / Laplace
    threshold: float  # min(1 - 1/log10 S, 0.7) (Vehtari et al. 2024, JMLR 25(72))
    draws: int  # S, the number of Laplace draws
    outside_support: int  # draws where the log density was not finite


class StartReport(NamedTuple):
    """How a walker was obtained."""

    laplace: LaplaceFit  # the mode and Fisher information
    check: LaplaceCheck | None  # PSIS k̂ of the Laplace approximation, before any step
    notes: tuple[str, ...]  # what start() did that a user should know
    warmup: Any = None  # set by refine(): a warmup.WarmupReport


class Model(NamedTuple):
    """The closures made once from the user's log density (by :func:`assemble`)."""

    logdensity_fn: Callable  # the user's log density, position pytree -> scalar
    unravel: Callable  # (d,) vector -> the user's pytree
    evaluate: Callable  # jitted batched log density on ravelled positions, (m, d) -> (m,)
    engine: Callable  # the multi-chain loop (engine.make_engine), compiled once


class Walker(NamedTuple):
    """All the chains of a run: their state, the proposal they use, and how they got it.

    ``state`` is the engine's own form (ravelled positions, log densities). For a
    BlackJAX loop of your own, ``algorithm`` is BlackJAX's additive-step random walk
    with this proposal and ``states`` the batched ``RWState`` in your pytree, ready for
    ``jax.vmap(walker.algorithm.step)``.
    """

    state: ChainState  # position (chains, d) ravelled, logdensity (chains,)
    tuning: Tuning  # the proposal
    report: StartReport  # the Laplace fit, its check, notes, warm-up report
    model: Model  # closures over the user's log density

    @property
    def chains(self) -> int:
        return int(np.shape(self.state.logdensity)[0])

    @property
    def dim(self) -> int:
        return int(np.shape(self.state.position)[1])

    @property
    def names(self) -> tuple[str, ...]:
        """One name per scalar parameter, ravelled order."""
        return tuple(self.report.laplace.names)

    @property
    def logdensity_fn(self) -> Callable:
        return self.model.logdensity_fn

    @property
    def unravel(self) -> Callable:
        return self.model.unravel

    @property
    def evaluate(self) -> Callable:
        return self.model.evaluate

    @property
    def engine(self) -> Callable:
        return self.model.engine

    @property
    def gradient(self) -> bool:
        """Whether the chains run a gradient sampler (their state is then whitened)."""
        return isinstance(self.tuning, GradientTuning)

    @property
    def algorithm(self):
        """BlackJAX's ``SamplingAlgorithm`` with this walker's tuning: the additive-step
        random walk with the proposal factor as ``sigma``; ``blackjax.hmc`` or
        ``blackjax.nuts`` with ``inverse_mass_matrix = S Sᵀ``; ``blackjax.mala`` on the
        log density as given (BlackJAX's MALA takes no metric: see
        :func:`fisherwalk.blackjax_parameters` for the whitened problem)."""
        t = self.tuning
        if not self.gradient:
            return proposal.blackjax_algorithm(self.model.logdensity_fn, t.factor)
        fn = self.model.logdensity_fn
        if t.sampler == "mala":
            return blackjax.mala(fn, t.step_size)
        if t.sampler == "hmc":
            lo, hi = t.integration_steps
            return blackjax.hmc(fn, t.step_size, t.inverse_mass_matrix, (lo + hi) // 2)
        return blackjax.nuts(fn, t.step_size, t.inverse_mass_matrix)

    @property
    def states(self):
        """BlackJAX states per chain (leading chain axis) in the user's pytree: ``RWState``
        for the random walk, ``HMCState``/``MALAState`` for the gradient samplers."""
        positions = jax.tree.map(jnp.asarray, self.unravel_many(self.flat_positions()))
        logdensity = jnp.asarray(self.state.logdensity)
        if not self.gradient:
            return RWState(positions, logdensity)
        # the state keeps ∇_z = Wᵀ ∇_θ (row form ∇_θ W): solve for ∇_θ on the host
        whitening = np.asarray(self.model.engine.whitening)
        grad_flat = solve_triangular(whitening, np.asarray(self.state.logdensity_grad).T,
                                     lower=True, trans="T").T
        grads = jax.tree.map(jnp.asarray, self.unravel_many(grad_flat))
        return _gradient_states(
            self.tuning.sampler, positions, logdensity, grads)

    def flat_positions(self) -> np.ndarray:
        """Chain positions ravelled: (chains, d), on the host, original coordinates."""
        position = np.asarray(self.state.position)
        if not self.gradient:
            return position
        engine = self.model.engine
        return engine.mode + position @ np.asarray(engine.whitening).T

    def unravel_many(self, flat) -> Any:
        """(..., d) ravelled positions -> the user's pytree with the same leading axes."""
        return pytrees.unravel_batch(flat, self.report.laplace.mode)


def _gradient_states(sampler: str, positions, logdensity, grads):
    kind = MALAState if sampler == "mala" else HMCState
    return kind(positions, logdensity, grads)


def make_model(logdensity_fn: Callable, mode: Any, chains: int) -> Model:
    """The closures over a log density: ravelled, batched and jitted, and the engine."""
    _, unravel = jax.flatten_util.ravel_pytree(mode)

    def flat_logdensity(vector):
        return logdensity_fn(unravel(vector))

    evaluate = jax.jit(jax.vmap(flat_logdensity))
    return Model(logdensity_fn, unravel, evaluate, make_engine(flat_logdensity, chains))


def assemble(logdensity_fn: Callable, report: StartReport, tuning: Tuning, positions,
             logdensity=None, *, model: Model | None = None) -> Walker:
    """The one constructor of a :class:`Walker`.

    Builds the closures (:func:`make_model`) from ``logdensity_fn`` and the mode's
    structure in ``report.laplace`` unless ``model`` already holds them; evaluates the
    log density at ``positions`` ((chains, d), ravelled) when ``logdensity`` is None.
    """
    positions = np.asarray(positions)
    if model is None:
        model = make_model(logdensity_fn, report.laplace.mode, int(positions.shape[0]))
    if logdensity is None:
        logdensity = np.asarray(model.evaluate(positions))
    return Walker(ChainState(positions, np.asarray(logdensity)), tuning, report, model)


def continuable_state(walker: Walker, where: str) -> ChainState:
    """The walker's chain state, after checking that the chains can be continued."""
    if not isinstance(walker, Walker):
        raise InputError(explain(f"Expected a Walker, got {type(walker).__name__}.", where,
                                 "pass the result of fisherwalk.start() or refine()."))
    logdens = np.asarray(walker.state.logdensity)
    bad = np.flatnonzero(~np.isfinite(logdens))
    if bad.size:
        raise SamplingError(
            explain(
                f"The log density at the current state of chain {bad[0]} is {logdens[bad[0]]}.",
                f"{where}, chain {bad[0]}, before step 0",
                "start the chains where the log density is finite (fisherwalk.start does).",
            )
        )
    return type(walker.state)(*(np.asarray(part) for part in walker.state))
