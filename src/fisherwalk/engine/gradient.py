"""The gradient samplers' compiled loop: BlackJAX's MALA, HMC and NUTS on the whitened posterior.

The chains run BlackJAX's own kernels (``blackjax.mala``, ``blackjax.hmc``,
``blackjax.nuts``; nothing here re-implements a transition) on the whitened log density

    z -> log pi(mode + W z),    W lower triangular, W Wᵀ = H⁻¹,

so that in the Gaussian picture the target is N(0, I_d) and each sampler's tuning from
the Gaussian limit applies with unit scales. W is the lower Cholesky factor of H⁻¹, the
factor BlackJAX itself takes of a dense ``inverse_mass_matrix``: HMC and NUTS run here
on z with an identity metric follow, for the same key, the same trajectory as BlackJAX's
kernels on the original coordinates with ``inverse_mass_matrix = H⁻¹`` (up to rounding;
tested), so the step size means the same in both and the hand-off to a user's own loop
(:func:`blackjax_parameters`) is exact. MALA has no mass matrix in BlackJAX; whitening is
how it gets the Fisher metric.

One jitted ``lax.scan`` serves warm-up and sampling: the step size, a flag that switches
adaptation on, the state of dual averaging (Nesterov 2009, "Primal-dual subgradient
methods for convex problems", Math. Program. 120; Hoffman & Gelman 2014, "The No-U-Turn
sampler", JMLR 15, section 3.2; BlackJAX's ``dual_averaging_adaptation``) and HMC's
integration-time range are data in the carry. Step ``s`` draws its randomness only from
the run key and ``s``: ``fold_in(rng_key, s)`` is split into a key for HMC's jitter and
a key folded with each chain's index for the kernels, so chunking and resuming cannot
change the draws.

Faults. The log density is guarded: where its value is NaN or +inf, or its gradient is
not finite, both become NaN, which BlackJAX rejects (a +inf would otherwise be accepted
and trap the chain). A step is flagged when HMC's trajectory end or either end of NUTS's
trajectory is NaN (a NaN gradient spreads along the leapfrog path; NUTS stops at the
first NaN), and for MALA, whose kernel does not return its proposal, when the acceptance
probability is exactly 0 (a superset: it also flags a proposal outside the support or an
extreme rejection; :func:`fisherwalk.engine.gradient_checks.replay_step` tells them
apart).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
from blackjax.adaptation.step_size import DualAveragingAdaptationState

from ..base.meshes import chain_placement
from ..base.programs import batched, remembered
from ..theory.gradient import INTEGRATION_TIME
from .loop import ChainState  # the one chain state: here z, log density, ∇_z
from .metric import to_whitened, whitening_factor  # noqa: F401  (re-exported: older callers)

MAX_INTEGRATION_STEPS = 1024  # HMC: cap on leapfrog steps per transition (NUTS's 2^10)
# Dual averaging's gamma: Hoffman & Gelman (2014) use 0.05 with a step size from a doubling
# heuristic; started at the theory value, 0.2 explores less (measured: see the warm-up).
DUAL_AVERAGING_GAMMA = 0.2
_HIGHEST = jax.lax.Precision.HIGHEST


class StepControl(NamedTuple):
    """What a call does besides stepping; all traced data, so every call shares a program."""

    step_size: jax.Array  # () step size used when adapt is False
    adapt: jax.Array  # () bool: run dual averaging and step with its current iterate
    dual: DualAveragingAdaptationState  # BlackJAX's dual-averaging state (scalar fields)


class GradientChunk(NamedTuple):
    """What one call returns (draw axis first, chains second)."""

    state: ChainState  # after the last step
    control: StepControl  # after the last step (dual averaging advanced when adapting)
    position: jax.Array  # (draws, chains, d) kept positions, ORIGINAL coordinates
    logdensity: jax.Array  # (draws, chains)
    acceptance_rate: jax.Array  # (draws, chains) mean acceptance probability over thin steps
    divergent: jax.Array  # (draws, chains) int: divergent transitions (HMC, NUTS)
    gradients: jax.Array  # (draws, chains) int: gradient evaluations over the thin steps
    faults: jax.Array  # (draws, chains) int: flagged transitions (module docstring)
    step_size: jax.Array  # (draws,) step size used at the last step of each kept draw
    energy: jax.Array  # (draws, chains) Hamiltonian energy at the kept state (HMC, NUTS; MALA NaN)


class GradientEngine(NamedTuple):
    """A sampler's compiled loop and what it needs (build with :func:`make_gradient_engine`)."""

    sampler: str  # the family's name in the registry (fisherwalk.samplers)
    chains: int
    mode: np.ndarray  # (d,)
    whitening: np.ndarray  # (d, d) W, lower, W Wᵀ = H⁻¹
    target_acceptance: float  # what dual averaging aims for
    max_num_doublings: int  # NUTS tree depth cap
    logdensity_flat: Callable  # the user's log density on the ravelled position
    run: Callable  # (rng_key, first_step, state, control, draws, thin=1) -> GradientChunk
    evaluate: Callable  # (m, d) original positions -> (log density (m,), gradient (m, d))
    transition: Callable  # one chain's step (the family's kernel, see make_gradient_engine)
    placement: Any = None  # where the chains run (base.meshes.ChainPlacement; None: one device)


def whitened_logdensity(logdensity_flat: Callable, *, record: Callable | None = None):
    """``logp(z, mode, whitening)``: the guarded log density in whitened coordinates.

    Where the value is NaN or +inf, or the gradient is not finite, value and gradient
    are NaN (BlackJAX rejects the move; HMC and NUTS report it as divergent). The
    gradient is the chain rule Wᵀ ∇ log π, computed with one reverse pass of the user's
    function (a custom JVP). ``record(theta, value, gradient)``, if given, is called (a
    debug callback) at every evaluation: :func:`fisherwalk.engine.gradient_checks.replay_step`
    uses it.
    """
    value_and_grad = jax.value_and_grad(logdensity_flat)

    def evaluate(z, mode, whitening):
        theta = mode + jnp.dot(whitening, z, precision=_HIGHEST)
        value, grad = value_and_grad(theta)
        if record is not None:
            jax.debug.callback(record, theta, value, grad)
        fault = jnp.isnan(value) | (value == jnp.inf) | ~jnp.all(jnp.isfinite(grad))
        grad_z = jnp.dot(grad, whitening, precision=_HIGHEST)  # Wᵀ ∇, as a row vector
        return jnp.where(fault, jnp.nan, value), jnp.where(fault, jnp.nan, grad_z)

    @jax.custom_jvp
    def logp(z, mode, whitening):
        return evaluate(z, mode, whitening)[0]

    @logp.defjvp
    def _logp_jvp(primals, tangents):
        # mode and whitening are constants of a run: only z is ever differentiated
        value, grad_z = evaluate(*primals)
        return value, jnp.dot(grad_z, tangents[0], precision=_HIGHEST)

    return logp


def step_keys(rng_key: jax.Array, step, chains: int):
    """The keys of global step ``step``: (HMC's jitter key, one kernel key per chain)."""
    key_step = jax.random.fold_in(rng_key, step)
    key_jitter, key_chains = jax.random.split(key_step)
    return key_jitter, jax.vmap(lambda c: jax.random.fold_in(key_chains, c))(jnp.arange(chains))


def integration_steps(key_jitter, step_size):
    """HMC's leapfrog count n = max(1, ⌊t/ε + u⌋), t ~ U(INTEGRATION_TIME), u ~ U(0, 1).

    The integration time t is jittered around π/2, which decorrelates a unit Gaussian
    coordinate in one transition, so that no fixed time can resonate with a period of the
    target (jittering is common practice; no single source); u smooths the count, so the
    expected acceptance is smooth in ε and dual averaging can follow it
    (:func:`fisherwalk.theory.gradient.hmc_steps_law` is the exact law of n, and the
    theory's acceptance is computed under it). One count for all chains: vmapped chains
    advance in lockstep, so per-chain counts would make every step cost the longest; the
    chains stay independent given the counts, which do not depend on the states.
    """
    key_t, key_u = jax.random.split(key_jitter)
    dtype = jnp.result_type(step_size)
    t = jax.random.uniform(key_t, (), dtype, INTEGRATION_TIME[0], INTEGRATION_TIME[1])
    u = jax.random.uniform(key_u, (), dtype)
    n = jnp.floor(t / step_size + u)
    return jnp.clip(n, 1, MAX_INTEGRATION_STEPS).astype(jnp.int32)


def _compiled(transition: Callable, logdensity_flat: Callable, chains: int, target: float,
              gamma: float) -> Callable:
    whitened = whitened_logdensity(logdensity_flat)
    _, dual_update, _ = blackjax.adaptation.step_size.dual_averaging_adaptation(target, gamma=gamma)

    def run(rng_key, first_step, state, control, mode, whitening, draws, thin):
        def logp(z):
            return whitened(z, mode, whitening)

        vstep = jax.vmap(transition, in_axes=(0, 0, None, None, None))

        def one_step(carry, step):
            chain, ctrl, acc, div, grads, faults, _ = carry
            eps = jnp.where(ctrl.adapt, jnp.exp(ctrl.dual.log_step_size), ctrl.step_size)
            key_jitter, keys = step_keys(rng_key, step, chains)
            n_steps = integration_steps(key_jitter, eps)
            new, (rate, divergent, n_grad, fault, energy) = vstep(keys, tuple(chain), logp, eps,
                                                                   n_steps)
            updated = dual_update(ctrl.dual, jnp.mean(rate))
            dual = jax.tree.map(lambda a, b: jnp.where(ctrl.adapt, a, b).astype(b.dtype),
                                updated, ctrl.dual)
            carry = (ChainState(*new), ctrl._replace(dual=dual), acc + rate,
                     div + divergent.astype(jnp.int32), grads + n_grad,
                     faults + fault.astype(jnp.int32), energy.astype(acc.dtype))
            return carry, eps

        def kept(carry, index):
            chain, ctrl = carry
            zeros = jnp.zeros(chains, dtype=chain.logdensity.dtype)
            counts = jnp.zeros(chains, dtype=jnp.int32)
            inner = (chain, ctrl, zeros, counts, counts, counts, zeros)
            if thin == 1:  # no inner loop: one step per kept draw
                inner, eps = one_step(inner, first_step + index)
            else:
                steps = first_step + index * thin + jnp.arange(thin)
                inner, eps = jax.lax.scan(one_step, inner, steps)
                eps = eps[-1]
            chain, ctrl, acc, div, grads, faults, energy = inner
            theta = mode + jnp.dot(chain.position, whitening.T, precision=_HIGHEST)
            return (chain, ctrl), (theta, chain.logdensity, acc / thin, div, grads, faults,
                                   eps, energy)

        (final, ctrl), outs = jax.lax.scan(kept, (state, control), jnp.arange(draws))
        return GradientChunk(final, ctrl, *outs)

    return jax.jit(run, static_argnames=("draws", "thin"))


def value_and_gradient(logdensity_flat: Callable) -> Callable:
    """``(m, d) -> (log density (m,), gradient (m, d))``: one batched program per log
    density (remembered, the batch padded by :func:`fisherwalk.base.programs.batched`),
    shared by the gradient engines, "auto"'s timing and the start without a mode."""
    return remembered(logdensity_flat, "gradient evaluate", (),
                      lambda: batched(jax.value_and_grad(logdensity_flat)))


def make_gradient_engine(sampler: str, transition: Callable, logdensity_flat: Callable, mode,
                         whitening, chains: int, *, target_acceptance: float,
                         max_num_doublings: int = 10, gamma: float = DUAL_AVERAGING_GAMMA,
                         devices: Any = None) -> GradientEngine:
    """Build a gradient sampler's compiled loop (compiles once per (draws, thin) pair).

    Parameters
    ----------
    sampler
        The family's name (for messages and records).
    transition
        ``transition(max_num_doublings)`` returns one chain's step with the family's
        BlackJAX kernel: ``step(key, state, logp, step_size, n_steps) -> (new state
        fields, (acceptance rate, divergent, gradient evaluations, fault, energy))``, the
        energy being the Hamiltonian at the state kept (NaN for a kernel without one), ``n_steps``
        being HMC's jittered leapfrog count (:func:`integration_steps`; ignored by the
        kernels that do not take it). The families define theirs
        (:mod:`fisherwalk.samplers`).
    logdensity_flat
        The log posterior on the ravelled position, ``(d,) -> scalar``; pure JAX.
    mode, whitening
        The centre (d,) and the metric's whitening factor W (lower, W Wᵀ = the inverse
        mass matrix; :meth:`fisherwalk.engine.metric.Metric.factor`): theta = mode + W z.
    chains
        Number of chains.
    target_acceptance
        What dual averaging aims for (the family's Gaussian-limit value: MALA 0.574,
        Roberts & Rosenthal 1998; HMC 0.651, Beskos et al. 2013; BlackJAX's NUTS 0.8).
    max_num_doublings
        NUTS's cap on tree doublings (BlackJAX's default, 10).
    devices
        Where the chains run (:func:`fisherwalk.base.meshes.chain_mesh`; None: automatic,
        one device = no placement): the state's chain axis is split over the mesh and
        XLA partitions the vmapped kernels.

    Returns
    -------
    GradientEngine
        ``engine.run(rng_key, first_step, state, control, draws, thin=1)`` advances every
        chain ``draws * thin`` steps in one call, starting at global step ``first_step``
        (``rng_key`` a typed JAX key), and returns a :class:`GradientChunk`.
    """
    mode = np.asarray(mode)
    whitening = np.asarray(whitening).astype(mode.dtype)
    step = transition(int(max_num_doublings))
    compiled = remembered(logdensity_flat, "gradient loop", (  # compiled once per model
        sampler, transition, int(chains), float(target_acceptance), int(max_num_doublings),
        float(gamma)),
        lambda: _compiled(step, logdensity_flat, chains, float(target_acceptance),
                          float(gamma)))
    placement = chain_placement(chains, devices)
    mode_device, whitening_device = jax.device_put(mode), jax.device_put(whitening)

    def run(rng_key, first_step, state, control, draws: int, thin: int = 1) -> GradientChunk:
        if placement is None:
            return compiled(rng_key, np.int64(first_step), state, control, mode_device,
                            whitening_device, draws=int(draws), thin=int(thin))
        state = jax.tree.map(lambda x: placement.put(x, 0), state)
        control = jax.tree.map(lambda x: placement.put(x, None), control)
        out = compiled(rng_key, np.int64(first_step), state, control, mode_device,
                       whitening_device, draws=int(draws), thin=int(thin))
        return placement.gather(out)

    evaluate = value_and_gradient(logdensity_flat)
    return GradientEngine(sampler, int(chains), mode, whitening, float(target_acceptance),
                          int(max_num_doublings), logdensity_flat, run, evaluate, step,
                          placement)


def control(step_size: float, *, adapt: bool = False,
            dual: DualAveragingAdaptationState | None = None, dtype=np.float64) -> StepControl:
    """A :class:`StepControl` built on the host with fixed dtypes (one compilation).

    With no ``dual``, dual averaging starts as BlackJAX's
    ``dual_averaging_adaptation(target).init(step_size)`` does, except that it shrinks
    toward log ``step_size`` itself, not log(10 ``step_size``): Hoffman & Gelman (2014,
    section 3.2.1) shrink toward ten times a step found by a doubling heuristic, which
    errs small; a step from the Gaussian limit is the best guess already.
    """
    if dual is None:
        dual = DualAveragingAdaptationState(np.log(step_size), 0.0, 1.0, 0.0,
                                            np.log(step_size))
    dual = DualAveragingAdaptationState(*(np.asarray(v, dtype=dtype) for v in dual))
    return StepControl(np.asarray(step_size, dtype=dtype), np.asarray(bool(adapt)), dual)
