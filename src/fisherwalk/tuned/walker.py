"""The walker: every chain of a run, as data, and the one way to build it.

A :class:`Walker` holds all the chains of a run (not one chain). It is three pieces of
data and the closures made once from the user's log density:

- ``state``: the one :class:`~fisherwalk.engine.loop.ChainState` (positions ravelled to
  (chains, d), log densities (chains,), and for a gradient family the whitened position
  and its gradient), the family's own form;
- ``tuning``: the sampler family by name, its metric and its own tuned parameter
  (:class:`Tuning`); everything else about it is derived by the family;
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

from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from ..base import pytrees
from ..base.programs import batched, remembered, structure_key
from ..engine.metric import spectrum_of
from ..errors import InputError, SamplingError, explain
from ..fit.laplace import LaplaceFit
from ..samplers.family import Family
from .tuning import Tuning

__all__ = ["Tuning", "LaplaceCheck", "StartReport", "Model", "Walker", "make_model",
           "flat_logdensity", "with_engine", "assemble", "continuable_state", "spectrum_of"]


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
    engine: Any  # the family's multi-chain loop (compiled once), or None before assemble()


class Walker(NamedTuple):
    """All the chains of a run: their state, the proposal they use, and how they got it.

    ``state`` is the family's own form. For a BlackJAX loop of your own, ``algorithm`` is
    the family's BlackJAX sampler with this tuning and ``states`` its batched states,
    ready for ``jax.vmap(walker.algorithm.step)``.
    """

    state: Any  # the family's chain state (random walk: ravelled position, logdensity)
    tuning: Tuning  # the family, its metric and its tuned parameter
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
    def family(self) -> Family:
        """The sampler family (:mod:`fisherwalk.samplers`) the chains run."""
        return self.tuning.family

    @property
    def algorithm(self):
        """BlackJAX's ``SamplingAlgorithm`` with this walker's tuning, from its family:
        the additive-step random walk with the proposal factor as ``sigma``;
        ``blackjax.hmc`` or ``blackjax.nuts`` with ``inverse_mass_matrix = S Sᵀ`` on the
        log density as given; ``blackjax.mala`` on the WHITENED log density (BlackJAX's
        MALA takes no metric: its tuned step holds on z, see ``states``)."""
        return self.family.blackjax(self.model.logdensity_fn, self.tuning, self.model.engine)

    @property
    def states(self):
        """BlackJAX states per chain (leading chain axis), from the family: ``RWState`` or
        ``HMCState`` in the user's pytree; MALA's ``MALAState`` on the whitened ravelled
        coordinates, where ``algorithm`` runs."""
        positions = jax.tree.map(jnp.asarray, self.unravel_many(self.flat_positions()))
        return self.family.blackjax_states(positions, self.state.logdensity,
                                           self.model.engine, self.state, self.unravel_many)

    def flat_positions(self) -> np.ndarray:
        """Chain positions ravelled: (chains, d), on the host, original coordinates."""
        return np.asarray(self.family.positions(self.model.engine, self.state))

    def unravel_many(self, flat) -> Any:
        """(..., d) ravelled positions -> the user's pytree with the same leading axes."""
        return pytrees.unravel_batch(flat, self.report.laplace.mode)


def make_model(logdensity_fn: Callable, mode: Any, chains: int) -> Model:
    """The closures over a log density: ravelled, batched and jitted (no engine yet:
    :func:`assemble` asks the walker's family for one); built once per log density,
    structure and chains (:mod:`fisherwalk.base.programs`)."""
    return remembered(logdensity_fn, "model", (structure_key(mode), int(chains)),
                      lambda: _new_model(logdensity_fn, mode, chains))


def _new_model(logdensity_fn: Callable, mode: Any, chains: int) -> Model:
    _, unravel = jax.flatten_util.ravel_pytree(mode)

    def flat(vector):
        return logdensity_fn(unravel(vector))

    return Model(logdensity_fn, unravel, batched(flat), None)


def flat_logdensity(model: Model) -> Callable:
    """The user's log density on the ravelled position, ``(d,) -> scalar``: one function
    object per model, so that the programs built from it are remembered."""
    unravel, fn = model.unravel, model.logdensity_fn

    def build():
        def flat(vector):
            # cast at the edge: a float32 value with x64 on would give BlackJAX's states
            # and the gradient families' custom JVP two dtypes
            return jnp.asarray(fn(unravel(vector)), dtype=vector.dtype)

        return flat

    return remembered(model.evaluate, "flat log density", (), build)


def with_engine(model: Model, tuning: Tuning, mode_flat, chains: int,
                devices: Any = None) -> Model:
    """The model with the compiled loop of the tuning's family (placed on ``devices``)."""
    engine = tuning.family.engine(flat_logdensity(model), tuning, np.asarray(mode_flat),
                                  int(chains), devices)
    return model._replace(engine=engine)


def assemble(logdensity_fn: Callable, report: StartReport, tuning: Tuning, positions,
             logdensity=None, *, model: Model | None = None) -> Walker:
    """The one constructor of a :class:`Walker`, for every family.

    Builds the closures (:func:`make_model`) from ``logdensity_fn`` and the mode's
    structure in ``report.laplace`` unless ``model`` already holds them, the family's
    compiled loop unless ``model`` has one, and the chains' state at ``positions``
    ((chains, d), ravelled, original coordinates) by the family's ``init`` (the random
    walk evaluates the log density when ``logdensity`` is None; a gradient family
    evaluates value and gradient and refuses non-finite ones by parameter name).
    """
    positions = np.asarray(positions)
    chains = int(positions.shape[0])
    if model is None:
        model = make_model(logdensity_fn, report.laplace.mode, chains)
    if model.engine is None:
        model = with_engine(model, tuning, report.laplace.mode_flat, chains)
    state = tuning.family.init(model.engine, positions, logdensity, model.evaluate,
                               tuple(report.laplace.names))
    return Walker(state, tuning, report, model)


def continuable_state(walker: Walker, where: str):
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
    return jax.tree.map(np.asarray, walker.state)
