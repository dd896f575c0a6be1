"""The compiled loop: ``lax.scan`` over kept draws of ``vmap``-ed Metropolis steps.

One jitted function serves warm-up and sampling alike, so a run compiles it once:
the proposal factor, the scale multiplier, the adaptation gain and target and the
random numbers are all data, not constants. Only the shapes are static: kept draws per
call (the chunk), steps per kept draw (the thinning), chains and dimension.

The random numbers of step ``s`` come from a counter-based generator on the host
(:func:`fisherwalk.base.keys.step_noise`), so a run gives the same draws however it is
chunked or resumed. They are made in blocks of at most :data:`NOISE_BUDGET` numbers: a
call whose ``draws x thin`` steps need more is split into several compiled calls (fewer
kept draws each, or, when one kept draw alone needs more, a part of its ``thin`` steps
each), so memory follows the kept draws, not the steps taken. The split does not change
a single bit of the draws: each step reads its own numbers and does the same arithmetic.

Scale adaptation (warm-up only; ``rate = 0`` switches it off) is a Robbins-Monro
recursion on the log of the scale multiplier, driven by the acceptance probability
pooled over chains (Robbins & Monro 1951, "A stochastic approximation method",
Ann. Math. Statist. 22; Andrieu & Thoms 2008, "A tutorial on adaptive MCMC",
Statistics and Computing 18, section 4):

    log m_{t+1} = log m_t + rate * (t + 1)^(-0.6) * (mean_c alpha_c(t) - target).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from ..base.keys import step_noise
from ..base.meshes import chain_placement
from ..base.programs import remembered
from . import proposal

DEFAULT_CHUNK = 100  # kept draws per compiled call; warm-up uses the same, so one compile
NOISE_BUDGET = 2**22  # random numbers per compiled call (32 MiB in float64)
GAIN_EXPONENT = 0.6  # in (1/2, 1]: the Robbins-Monro conditions sum gain = inf, sum gain² < inf


class ChainState(NamedTuple):
    """All chains' states, ravelled: the carry between chunks, for every sampler family.

    The random walk carries position and log density; a gradient family (whose chains
    run on the whitened posterior, :mod:`fisherwalk.engine.gradient`) carries z, the log
    density and its gradient with respect to z.
    """

    position: jax.Array  # (chains, d): theta (random walk) or whitened z (gradient families)
    logdensity: jax.Array  # (chains,)
    logdensity_grad: jax.Array | None = None  # (chains, d) gradient w.r.t. z, or None


class Control(NamedTuple):
    """What a call of the engine does besides stepping (all traced data)."""

    log_multiplier: jax.Array  # () log of the factor's multiplier at the first step
    target: jax.Array  # () acceptance the adaptation aims for
    rate: jax.Array  # () adaptation gain constant; 0 = no adaptation
    adapt_step: jax.Array  # () int: adaptation steps already taken before this call


class Chunk(NamedTuple):
    """What one call of the engine returns (draw axis first; chains second)."""

    state: ChainState  # the chains' states after the last step
    log_multiplier: jax.Array  # () after the last step
    faults: jax.Array  # (draws, chains) int: NaN/+inf proposals (rejected) since the last kept draw
    position: jax.Array  # (draws, chains, d) kept positions
    logdensity: jax.Array  # (draws, chains)
    accepted: jax.Array  # (draws, chains) fraction of the thin steps accepted
    acceptance_rate: jax.Array  # (draws, chains) mean acceptance probability over them
    log_multiplier_path: jax.Array  # (draws,) log multiplier after each kept draw


class Partial(NamedTuple):
    """The accumulators of one kept draw whose ``thin`` steps span several calls."""

    state: ChainState
    log_multiplier: jax.Array  # ()
    faults: jax.Array  # (chains,) int
    accepted: jax.Array  # (chains,) count of accepted steps
    rate_sum: jax.Array  # (chains,) sum of acceptance probabilities


def _compiled(logdensity_flat: Callable) -> tuple[Callable, Callable]:
    vstep = jax.vmap(proposal.metropolis, in_axes=(0, 0, 0, None, None, None))

    def one_step(factor, control: Control):
        def step(carry, inputs):
            flat_state, log_m, faults, n_acc, rate_sum = carry
            z, u, t = inputs
            new_state, info = vstep(
                proposal.FlatState(flat_state.position, flat_state.logdensity), z, u,
                logdensity_flat, factor, jnp.exp(log_m))
            gain = control.rate * (control.adapt_step + t + 1.0) ** (-GAIN_EXPONENT)
            log_m = log_m + gain * (jnp.mean(info.acceptance_rate) - control.target)
            return (
                ChainState(*new_state),
                log_m,
                faults + info.fault.astype(faults.dtype),
                n_acc + info.is_accepted.astype(n_acc.dtype),
                rate_sum + info.acceptance_rate,
            ), None

        return step

    def advance(noise, uniform, state: ChainState, factor, control: Control):
        # noise: (draws, thin, chains, d); uniform: (draws, thin, chains)
        thin = noise.shape[1]
        step = one_step(factor, control)

        def kept(carry, inputs):
            flat_state, log_m = carry
            z, u, i = inputs
            zeros = jnp.zeros(z.shape[1], dtype=flat_state.logdensity.dtype)
            faults = jnp.zeros(z.shape[1], dtype=jnp.int32)
            carry = (flat_state, log_m, faults, zeros, zeros)
            if thin == 1:  # no inner loop: one step per kept draw
                carry, _ = step(carry, (z[0], u[0], i))
            else:
                steps = i * thin + jnp.arange(thin)
                carry, _ = jax.lax.scan(step, carry, (z, u, steps))
            flat_state, log_m, faults, n_acc, rate_sum = carry
            out = (faults, flat_state.position, flat_state.logdensity, n_acc / thin,
                   rate_sum / thin, log_m)
            return (flat_state, log_m), out

        draws = noise.shape[0]
        (final, log_m), outs = jax.lax.scan(
            kept, (state, control.log_multiplier), (noise, uniform, jnp.arange(draws))
        )
        return Chunk(final, log_m, *outs)

    def advance_part(noise, uniform, part: Partial, factor, control: Control, first):
        # noise: (steps, chains, d): steps first .. first + steps - 1 of one kept draw
        steps = first + jnp.arange(noise.shape[0])
        carry, _ = jax.lax.scan(one_step(factor, control), tuple(part), (noise, uniform, steps))
        return Partial(*carry)

    return jax.jit(advance), jax.jit(advance_part)


def _pieces(total: int, size: int, *, shortest: int = 1) -> Iterator[tuple[int, int]]:
    """(offset, length) pieces of ``range(total)``, each at most ``size`` long, except
    that a last piece shorter than ``shortest`` joins the one before it. Made one at a
    time: a long thinning has many pieces, never held in a list."""
    count = -(-total // size)
    merge = count > 1 and total - (count - 1) * size < shortest
    kept = count - 1 if merge else count
    for i in range(kept):
        offset = i * size
        yield offset, (total - offset if i == kept - 1 else min(size, total - offset))


def make_engine(logdensity_flat: Callable, chains: int, devices=None, *,
                budget: int | None = None) -> Callable:
    """Build ``engine(stream, first_step, state, factor, control, draws, thin=1) -> Chunk``.

    ``stream`` is a Philox key (:func:`fisherwalk.base.keys.stream`); ``first_step`` the global
    index of the first step this call takes. Compiles once per (draws, thin) pair. A call
    needing more than ``budget`` random numbers is split (see the module docstring), so
    its memory is bounded by the budget and the kept draws (default :data:`NOISE_BUDGET`).
    ``devices``: where the chains run (:func:`fisherwalk.base.meshes.chain_mesh`; None:
    automatic, one device = no placement).
    """
    compiled, compiled_part = remembered(  # compiled once per model
        logdensity_flat, "random-walk loop", (), lambda: _compiled(logdensity_flat))
    placement = chain_placement(chains, devices)  # [devices] None on one device
    budget = NOISE_BUDGET if budget is None else budget

    def noise_for(stream, first: int, steps: int, dim: int, dtype):
        return step_noise(stream, first, steps, chains, dim, dtype)

    def whole(stream, first_step, state, factor, ctrl, draws, thin, dim, dtype) -> Chunk:
        noise, uniform = noise_for(stream, first_step, draws * thin, dim, dtype)
        inputs = (noise.reshape(draws, thin, chains, dim), uniform.reshape(draws, thin, chains),
                  state, factor, ctrl)
        if placement is None:
            return compiled(*inputs)
        return placement.gather(compiled(*placement.engine_inputs(*inputs)))  # [devices]

    def by_parts(stream, first_step, state, factor, ctrl, thin, dim, dtype, size) -> Chunk:
        """One kept draw whose thin steps are taken ``size`` at a time."""
        zeros = np.zeros(chains, dtype=dtype)
        part = Partial(state, jnp.asarray(ctrl.log_multiplier), np.zeros(chains, np.int32),
                       zeros, zeros)
        # Pieces of at least two steps: XLA compiles a one-step loop without the loop, and
        # its rounding of the log density can then differ from the unsplit run's.
        for offset, length in _pieces(thin, max(size, 2), shortest=2):
            noise, uniform = noise_for(stream, first_step + offset, length, dim, dtype)
            part = compiled_part(noise, uniform, part, factor, ctrl,
                                 np.asarray(offset))
        final = part.state
        return Chunk(final, part.log_multiplier, part.faults[None], final.position[None],
                     final.logdensity[None], (part.accepted / thin)[None],
                     (part.rate_sum / thin)[None], part.log_multiplier[None])

    def engine(stream, first_step: int, state: ChainState, factor, control: Control,
               draws: int, thin: int = 1) -> Chunk:
        dim = np.shape(state.position)[1]
        dtype = np.asarray(state.logdensity).dtype
        per_step = chains * (dim + 1)
        if draws * thin * per_step <= budget:
            return whole(stream, first_step, state, factor, control, draws, thin, dim, dtype)
        per_call = budget // (thin * per_step)
        if thin == 1:  # one step per kept draw: nothing smaller to split into
            per_call = max(per_call, 1)
        outs = []
        ctrl = control
        for offset, length in _pieces(draws, max(per_call, 1)):
            first = first_step + offset * thin
            if per_call >= 1:
                out = whole(stream, first, state, factor, ctrl, length, thin, dim, dtype)
            else:
                out = by_parts(stream, first, state, factor, ctrl, thin, dim, dtype,
                               max(budget // per_step, 1))
            if outs:  # at most two calls in flight: on a busy machine the host would
                #       otherwise run ahead, each queued call holding its noise (budget)
                jax.block_until_ready(outs[-1].state)
            outs.append(out)
            state = out.state
            ctrl = ctrl._replace(log_multiplier=out.log_multiplier,
                                 adapt_step=ctrl.adapt_step + length * thin)
        joined = [jnp.concatenate(parts) for parts in zip(*(o[2:] for o in outs), strict=True)]
        return Chunk(outs[-1].state, outs[-1].log_multiplier, *joined)

    engine.compiled = compiled
    engine.placement = placement  # [devices]
    return engine


def control(*, log_multiplier=0.0, target=0.0, rate=0.0, adapt_step=0, dtype=np.float64):
    """A :class:`Control` with the right dtypes (so that calls share one compilation)."""
    return Control(
        np.asarray(log_multiplier, dtype=dtype),
        np.asarray(target, dtype=dtype),
        np.asarray(rate, dtype=dtype),
        np.asarray(adapt_step, dtype=np.int32),
    )


def chunk_loop(call: Callable, carry, draws: int, *, chunk: int = DEFAULT_CHUNK,
               thin: int = 1, done: int = 0) -> Iterator[tuple[int, object]]:
    """The one chunk loop of every family: kept draws ``done .. draws`` in calls of ``chunk``.

    ``call(first_step, carry, draws, thin) -> (output, carry)`` advances the chains by one
    compiled call starting at global step ``first_step`` (so that a family's random
    numbers can belong to the step alone); ``carry`` is what the next call continues from
    (the chains' state, and whatever adapts). Yields ``(keep, output)`` per call, ``keep``
    being how many of the call's draws belong to the run (the last call may overshoot).
    ``done`` must be a multiple of ``chunk``.
    """
    for k in range(-(-done // chunk), -(-draws // chunk)):
        out, carry = call(k * chunk * thin, carry, chunk, thin)
        yield min(chunk, draws - k * chunk), out


def run_chunks(engine: Callable, noise_key, state: ChainState, factor, ctrl: Control,
               draws: int, *, chunk: int = DEFAULT_CHUNK, thin: int = 1,
               done: int = 0) -> Iterator[tuple[int, Chunk]]:
    """The random walk's chunks (:func:`chunk_loop`): between calls the chains continue
    from the call's end and the adaptation from its multiplier and step count, all on the
    device."""
    def call(first, carry, n, steps_per_draw):
        state, ctrl = carry
        out = engine(noise_key, first, state, factor, ctrl, n, steps_per_draw)
        return out, (out.state, ctrl._replace(log_multiplier=out.log_multiplier,
                                              adapt_step=ctrl.adapt_step + n * steps_per_draw))

    return chunk_loop(call, (state, ctrl), draws, chunk=chunk, thin=thin, done=done)
