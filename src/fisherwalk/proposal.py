"""The proposal: its square-root factor, and the Metropolis step that uses it.

The step is random-walk Metropolis with a Gaussian increment,

    theta' = theta + F z,    z ~ N(0, I_d),    F = (l / sqrt(d)) S,

accepted with probability min(1, pi(theta') / pi(theta)) (Metropolis, Rosenbluth,
Rosenbluth, Teller & Teller 1953, "Equation of state calculations by fast computing
machines", J. Chem. Phys. 21). For the matched proposal S Sᵀ = H⁻¹ (Roberts, Gelman &
Gilks 1997, Ann. Appl. Probab. 7(1), for the choice of l).

:func:`step` is the kernel that warm-up and sampling run. It works on the ravelled
position, consumes random numbers exactly as BlackJAX's
``additive_step_random_walk.normal_random_walk`` does with ``sigma = F`` (tested
bit for bit), and reports in addition whether the proposal's log density was
NaN or +inf (such a proposal is rejected, never accepted). :func:`blackjax_algorithm`
returns the BlackJAX ``SamplingAlgorithm`` itself, for users who run their own loop.
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import blackjax
import jax
import jax.numpy as jnp
from jax.scipy.linalg import solve_triangular


class FlatState(NamedTuple):
    """A chain's state on the ravelled position (the internal twin of BlackJAX's RWState)."""

    position: jax.Array  # (d,) float
    logdensity: jax.Array  # () float, always finite or -inf


class StepInfo(NamedTuple):
    """What one Metropolis step did."""

    acceptance_rate: jax.Array  # () min(1, pi(proposal)/pi(current))
    is_accepted: jax.Array  # () bool
    fault: jax.Array  # () bool: the proposal's log density was NaN or +inf (rejected)


def guard(logdensity_fn: Callable) -> Callable:
    """Wrap a log density so that NaN and +inf become -inf (a proposal there is rejected).

    A +inf log density would otherwise be accepted with probability one and trap the
    chain; a NaN is rejected by BlackJAX but would hide a fault in the model.
    """

    def guarded(position):
        value = logdensity_fn(position)
        return jnp.where(jnp.isnan(value) | (value == jnp.inf), -jnp.inf, value)

    return guarded


def shape_from_cholesky(cholesky: jax.Array) -> jax.Array:
    """The matched proposal shape S = L⁻ᵀ, with S Sᵀ = (L Lᵀ)⁻¹ = H⁻¹.

    Computed by one triangular solve; H⁻¹ itself is never formed. S is upper triangular.
    """
    eye = jnp.eye(cholesky.shape[0], dtype=cholesky.dtype)
    return solve_triangular(cholesky, eye, lower=True).T


def proposal_factor(shape: jax.Array, scale: float) -> jax.Array:
    """The factor F = (l / sqrt(d)) S that multiplies standard-normal noise."""
    dim = shape.shape[0]
    return (scale / jnp.sqrt(dim)) * shape


def step(
    rng_key: jax.Array,
    state: FlatState,
    logdensity_flat: Callable,
    factor: jax.Array,
    multiplier: jax.Array | float = 1.0,
) -> tuple[FlatState, StepInfo]:
    """One random-walk Metropolis step on the ravelled position.

    Random numbers are drawn as in BlackJAX 1.7's additive-step random walk (split the
    key in two, Gaussian noise from the first, a Bernoulli acceptance from the second),
    so that with the same key this returns the same state as
    ``blackjax.additive_step_random_walk.normal_random_walk(guard(f), factor).step``.
    ``multiplier`` rescales the step (the warm-up adapts it); at 1.0 it changes nothing,
    bit for bit.
    """
    key_proposal, key_accept = jax.random.split(rng_key, 2)
    noise = jax.random.normal(key_proposal, shape=state.position.shape, dtype=state.position.dtype)
    proposed = state.position + multiplier * jnp.dot(factor, noise, precision="highest")
    raw = logdensity_flat(proposed)
    fault = jnp.isnan(raw) | (raw == jnp.inf)
    proposed_logdensity = jnp.where(fault, -jnp.inf, raw)
    log_ratio = proposed_logdensity - state.logdensity
    log_ratio = jnp.where(jnp.isnan(log_ratio), -jnp.inf, log_ratio)
    acceptance_rate = jnp.clip(jnp.exp(log_ratio), max=1)
    accepted = jax.random.bernoulli(key_accept, acceptance_rate)
    new_state = FlatState(
        jnp.where(accepted, proposed, state.position),
        jnp.where(accepted, proposed_logdensity, state.logdensity),
    )
    return new_state, StepInfo(acceptance_rate, accepted, fault)


def blackjax_algorithm(logdensity_fn: Callable, factor: jax.Array):
    """BlackJAX's Gaussian additive-step random walk with this proposal.

    ``factor`` is passed as BlackJAX's ``sigma``: BlackJAX applies a 2-D ``sigma`` as
    ``sigma @ z`` (a square-root factor, not a covariance). The log density is guarded
    (:func:`guard`), so NaN and +inf proposals are rejected.
    """
    return blackjax.additive_step_random_walk.normal_random_walk(guard(logdensity_fn), factor)
