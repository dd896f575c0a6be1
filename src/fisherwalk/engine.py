"""The compiled loop: ``lax.scan`` over kept draws of ``vmap``-ed Metropolis steps.

One jitted function serves warm-up and sampling alike, so a run compiles it once:
the proposal factor, the scale multiplier, the adaptation gain and target, the
thinning and the first step's index are all data, not constants. Only the number of
kept draws per call (the chunk) is static.

Per-step keys are ``split(fold_in(run_key, step_index), chains)``, so a run gives the
same draws however it is chunked, thinned at the boundaries, or resumed.

Scale adaptation (warm-up only; ``rate = 0`` switches it off) is a Robbins-Monro
recursion on the log of the scale multiplier, driven by the acceptance probability
pooled over chains (Robbins & Monro 1951, "A stochastic approximation method",
Ann. Math. Statist. 22; Andrieu & Thoms 2008, "A tutorial on adaptive MCMC",
Statistics and Computing 18, section 4):

    log m_{t+1} = log m_t + rate * (t + 1)^(-0.6) * (mean_c alpha_c(t) - target).
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp

from . import proposal
from .keys import chain_keys

GAIN_EXPONENT = 0.6  # in (1/2, 1]: the Robbins-Monro conditions sum gain = inf, sum gain² < inf


class ChainState(NamedTuple):
    """All chains' states, ravelled: the carry between chunks."""

    position: jax.Array  # (chains, d)
    logdensity: jax.Array  # (chains,)


class Control(NamedTuple):
    """What a call of the engine does besides stepping (all traced data)."""

    log_multiplier: jax.Array  # () log of the factor's multiplier at the first step
    target: jax.Array  # () acceptance the adaptation aims for
    rate: jax.Array  # () adaptation gain constant; 0 = no adaptation
    adapt_step: jax.Array  # () int: adaptation steps already taken before this call
    thin: jax.Array  # () int >= 1: steps per kept draw


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


def make_engine(logdensity_flat: Callable, chains: int) -> Callable:
    """Build the jitted engine ``advance(run_key, first_step, state, factor, control, draws)``.

    ``draws`` (kept draws per call) is static; everything else is traced.
    """
    vstep = jax.vmap(proposal.step, in_axes=(0, 0, None, None, None))

    def advance(run_key, first_step, state: ChainState, factor, control: Control, draws: int):
        def one_step(carry, index):
            flat_state, log_m, faults, n_acc, rate_sum = carry
            keys = chain_keys(run_key, first_step + index, chains)
            new_state, info = vstep(
                keys, proposal.FlatState(*flat_state), logdensity_flat, factor, jnp.exp(log_m)
            )
            t = control.adapt_step + index
            gain = control.rate * (t + 1.0) ** (-GAIN_EXPONENT)
            log_m = log_m + gain * (jnp.mean(info.acceptance_rate) - control.target)
            return (
                ChainState(*new_state),
                log_m,
                faults + info.fault.astype(faults.dtype),
                n_acc + info.is_accepted.astype(n_acc.dtype),
                rate_sum + info.acceptance_rate,
            )

        def kept(carry, i):
            flat_state, log_m = carry
            zeros = jnp.zeros(chains, dtype=flat_state.logdensity.dtype)
            faults = jnp.zeros(chains, dtype=jnp.int32)
            first = i * control.thin

            def body(j, c):
                return one_step(c, first + j)

            flat_state, log_m, faults, n_acc, rate_sum = jax.lax.fori_loop(
                0, control.thin, body, (flat_state, log_m, faults, zeros, zeros)
            )
            thin = control.thin.astype(zeros.dtype)
            out = (faults, flat_state.position, flat_state.logdensity, n_acc / thin,
                   rate_sum / thin, log_m)
            return (flat_state, log_m), out

        (final, log_m), outs = jax.lax.scan(
            kept, (state, control.log_multiplier), jnp.arange(draws)
        )
        return Chunk(final, log_m, *outs)

    return jax.jit(advance, static_argnames=("draws",))


def control(*, log_multiplier=0.0, target=0.0, rate=0.0, adapt_step=0, thin=1, dtype=jnp.float64):
    """A :class:`Control` with the right dtypes (so that calls share one compilation)."""
    return Control(
        jnp.asarray(log_multiplier, dtype=dtype),
        jnp.asarray(target, dtype=dtype),
        jnp.asarray(rate, dtype=dtype),
        jnp.asarray(adapt_step, dtype=jnp.int32),
        jnp.asarray(thin, dtype=jnp.int32),
    )
