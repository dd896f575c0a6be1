"""What the gradient families (MALA, HMC, NUTS) share: one builder of a :class:`Family`.

Each runs BlackJAX's own kernel on the whitened posterior z -> log pi(mode + W z),
W Wᵀ = S Sᵀ (:mod:`fisherwalk.engine.gradient`), with one step size shared by the chains,
started at the Gaussian-limit value for this d (:mod:`fisherwalk.theory.gradient`) and
adapted by dual averaging (:mod:`fisherwalk.engine.stepsize`). The chains' state is the
whitened state (z, log density, gradient), which checkpoints keep whole: that is what
makes a resumed run bit-identical. Step ``s`` draws its randomness from
``fold_in(run key, s)`` alone, so chunking and resuming cannot change the draws.
A family module supplies its kernel, its target acceptance, its words and its BlackJAX
form; everything else is here.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from scipy.linalg import solve_triangular

from ..engine import gradient
from ..engine.gradient_checks import check_gradients
from ..engine.loop import DEFAULT_CHUNK, chunk_loop
from ..engine.stepsize import warm_up
from ..theory.gradient import optimal_gradient_step, predicted_ess_per_evaluation
from ..theory.tolerance import acceptance_band
from .family import Family, Phase, Settled

__all__ = ["step_family", "ChunkView", "gradients_in_original", "dual_averaging_target"]

# refine()'s default for the gradient families: two phases of one chunk each. Dual averaging
# started at the theory's step settles within it (measured on the benchmark's logistic
# targets; the random walk's Robbins-Monro needs its 400).
GRADIENT_WARMUP_STEPS = 200


class ChunkView(NamedTuple):
    """One call of a gradient engine, in the fields walk() collects (draw axis first)."""

    state: Any  # the chains' whitened state after the call
    position: Any  # (draws, chains, d) original coordinates
    logdensity: Any  # (draws, chains)
    accepted: Any  # (draws, chains) mean acceptance probability (gradient kernels)
    acceptance_rate: Any  # (draws, chains)
    faults: Any  # (draws, chains) flagged transitions
    divergent: Any  # (draws, chains) divergent transitions
    gradients: Any  # (draws, chains) gradient evaluations
    energy: Any = None  # (draws, chains) Hamiltonian energy at the kept draw (HMC, NUTS)


def dual_averaging_target(tuning) -> float:
    """What dual averaging aims for: the user's ``target_acceptance=`` (``tuning.aim``, for
    a family that takes one), else the theory's acceptance at this d."""
    return float(tuning.aim) if tuning.aim is not None else float(tuning.choice.acceptance)


def _engine(name: str, kernel: Callable):
    def build(flat_logdensity, tuning, mode_flat, chains, devices=None):
        return gradient.make_gradient_engine(
            name, kernel, flat_logdensity, np.asarray(mode_flat),
            tuning.metric.factor(tuning.matched), int(chains),
            target_acceptance=dual_averaging_target(tuning), devices=devices)
    return build


def _init(engine, positions, logdensity, evaluate, names):
    """Whitened states at ``positions``; non-finite gradients refused by name."""
    return check_gradients(engine, positions, names)


def _positions(engine, state) -> np.ndarray:
    return engine.mode + np.asarray(state.position) @ np.asarray(engine.whitening).T


def _chunks_with(energy: bool):
    def chunks(engine, tuning, key, state, draws, chunk, thin, done):
        for keep, view in _chunks(engine, tuning, key, state, draws, chunk, thin, done):
            yield keep, view if energy else view._replace(energy=None)
    return chunks


def _chunks(engine, tuning, key, state, draws, chunk, thin, done):
    """walk()'s chunks: step ``s`` takes its randomness from ``fold_in(key, 0)`` and s."""
    run_key = jax.random.fold_in(key, 0)
    dtype = np.asarray(state.logdensity).dtype
    ctrl = gradient.control(tuning.step_size, adapt=False, dtype=dtype)

    def call(first, state, n, steps_per_draw):
        out = engine.run(run_key, first, state, ctrl, n, steps_per_draw)
        return ChunkView(out.state, out.position, out.logdensity, out.acceptance_rate,
                         out.acceptance_rate, out.faults, out.divergent, out.gradients,
                         out.energy), out.state

    return chunk_loop(call, state, draws, chunk=chunk, thin=thin, done=done)


def _phase(context, key, state, steps) -> Phase:
    warm = warm_up(context.model.engine, jax.random.fold_in(key, 1), state,
                   context.tuning.step_size, steps=steps, chunk=DEFAULT_CHUNK,
                   names=context.names)
    if context.bar is not None:
        context.bar.update(steps)
    return Phase(warm.state, warm.position, warm.acceptance, warm.step_size,
                 int(warm.divergent.sum()), (), warm)


def _reshape(engine_of):
    def reshape(context, phase1, flat_logdensity, mode_flat, chains, learned, shape,
                precision_chol):
        """The metric and step size learned from draws (run.metric_repair); the chains
        continue from where the window adaptation left them."""
        old = context.model.engine
        tuning = context.tuning._replace(step_size=float(learned.step_size), shape=shape,
                                         whitening=precision_chol, shape_kind="warm-up")
        devices = None if old.placement is None else old.placement.mesh
        engine = engine_of(flat_logdensity, tuning, mode_flat, chains, devices)
        positions = np.asarray(learned.position).astype(np.asarray(shape).dtype)
        return tuning, engine, check_gradients(engine, positions, context.names)
    return reshape


def _settle(context, key, tuning1, state, phase1, steps, reasons, reshaped) -> Settled:
    tuning0, notes = context.tuning, []
    if tuning1 is None:
        tuning1 = tuning0._replace(step_size=phase1.value)
        notes.append(("Kept the metric H⁻¹ although " + "; ".join(reasons) + ".") if reasons
                     else "Every check agreed with the Gaussian picture: kept the metric H⁻¹.")
    warm2 = warm_up(context.model.engine, jax.random.fold_in(key, 2), state,
                    tuning1.step_size, steps=steps, chunk=DEFAULT_CHUNK, names=context.names)
    if context.bar is not None:
        context.bar.update(steps)
    final = tuning1._replace(step_size=warm2.step_size)
    target = dual_averaging_target(tuning0)
    notes.append(
        f"Step size {tuning0.step_size:.4g} (start) -> {phase1.value:.4g} -> "
        f"{warm2.step_size:.4g} by dual averaging toward acceptance {target:.3f}; acceptance "
        f"in the second half {warm2.acceptance:.3f} (Monte Carlo error "
        f"{warm2.acceptance_mcse:.3f}); {context.khat}.")
    divergent = phase1.divergent + int(warm2.divergent.sum())
    if divergent:
        notes.append(f"{divergent} divergent transitions in the warm-up.")
    return Settled(final, warm2.state, warm2.acceptance, float(target), 2 * steps,
                   int(warm2.divergent.sum()), tuple(reasons), tuple(notes))


def gradients_in_original(engine, state) -> np.ndarray:
    """The state keeps ∇_z = Wᵀ ∇_θ (row form ∇_θ W): solve for ∇_θ on the host."""
    whitening = np.asarray(engine.whitening)
    return solve_triangular(whitening, np.asarray(state.logdensity_grad).T, lower=True,
                            trans="T").T


def _describe(name: str, extra: Callable[[Any], str]):
    def describe(tuning) -> str:
        aimed = ("" if tuning.aim is None else " (your target_acceptance; the theory's "
                 f"{tuning.choice.acceptance:.3f})")
        return (f"Sampler {name!r}: BlackJAX's kernel on the whitened posterior (metric "
                f"S Sᵀ, '{tuning.shape_kind}'); theory step size {tuning.step_size:.4g}, "
                f"target acceptance {dual_averaging_target(tuning):.3f}{aimed} for "
                f"d = {tuning.dim}" + extra(tuning) + ".")
    return describe


def _aimed(theory: Callable[[Any], float]) -> Callable[[Any], float]:
    """The predicted acceptance of a family that takes a target: the user's aim if given."""
    def target_acceptance(tuning) -> float:
        return float(tuning.aim) if tuning.aim is not None else float(theory(tuning))
    return target_acceptance


def _window_start(tuning, phase1) -> tuple[float, float]:
    """refine()'s metric repair starts BlackJAX's window adaptation from the step size
    phase 1 reached, aiming where this family's dual averaging aims."""
    return float(phase1.value), dual_averaging_target(tuning)


def step_family(*, name: str, label: str, kernel: Callable, extra_compile_seconds: float,
                target_acceptance: Callable[[Any], float], blackjax: Callable,
                blackjax_states: Callable, blackjax_parameters: Callable,
                blackjax_api: Any, blackjax_takes_metric: bool = True,
                words: Callable[[Any], str] = lambda tuning: "",
                energy: bool = True, takes_target_acceptance: bool = False,
                relies_on_limit: bool = False) -> Family:
    """A gradient family from its kernel, its target and its BlackJAX form; ``energy``:
    whether its kernel has a Hamiltonian (HMC, NUTS), which walk() then records;
    ``takes_target_acceptance``: whether start(target_acceptance=) sets its dual
    averaging's aim (then the predicted acceptance is that aim); ``relies_on_limit``:
    whether its predicted speed rests wholly on the Gaussian limit (MALA)."""
    predicted = _aimed(target_acceptance) if takes_target_acceptance else target_acceptance

    def choice(tuning):
        return optimal_gradient_step(name, tuning.dim)

    def ess_per_step(tuning) -> float:
        c = choice(tuning)  # a step can be antithetic; the plan should not count on it
        return float(min(c.ess_per_gradient * c.gradients_per_step, 1.0))

    engine = _engine(name, kernel)
    return Family(
        name=name, label=label, parameter="step_size", evaluation="gradient",
        extra_compile_seconds=float(extra_compile_seconds),
        initial=lambda draft: draft._replace(step_size=float(choice(draft).step_size)),
        choice=choice, target_acceptance=predicted,
        predicted_jump=lambda tuning: float(choice(tuning).jump_distance * tuning.dim),
        ess_per_step=ess_per_step,
        ess_per_evaluation=lambda dim: predicted_ess_per_evaluation(name, dim),
        describe=_describe(name, words),
        acceptance_band=lambda tuning: acceptance_band(name, tuning.dim, tuning.spectrum),
        engine=engine, init=_init, positions=_positions,
        chunks=_chunks_with(energy), stores_state=True, phase=_phase, reshape=_reshape(engine),
        settle=_settle, covariance_of_squares=True, blackjax=blackjax,
        blackjax_states=blackjax_states, blackjax_parameters=blackjax_parameters,
        blackjax_api=blackjax_api, blackjax_takes_metric=blackjax_takes_metric,
        kernel=kernel, warmup_steps=GRADIENT_WARMUP_STEPS,
        takes_target_acceptance=bool(takes_target_acceptance),
        relies_on_limit=bool(relies_on_limit), window_start=_window_start, learns_metric=True)


def hmc_like_states(kind):
    """BlackJAX states in the user's pytree, gradients mapped back to the original axes."""
    def states(positions, logdensity, engine, state, unravel_many):
        grads = jax.tree.map(jnp.asarray, unravel_many(gradients_in_original(engine, state)))
        return kind(positions, jnp.asarray(logdensity), grads)
    return states
