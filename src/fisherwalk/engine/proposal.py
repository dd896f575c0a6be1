"""The proposal: its square-root factor, and the Metropolis step that uses it.

The step is random-walk Metropolis with a Gaussian increment,

    theta' = theta + F z,    z ~ N(0, I_d),    F = (l / sqrt(d)) S,

accepted with probability min(1, pi(theta') / pi(theta)) (Metropolis, Rosenbluth,
Rosenbluth, Teller & Teller 1953, "Equation of state calculations by fast computing
machines", J. Chem. Phys. 21). For the matched proposal S Sᵀ = H⁻¹ (Roberts, Gelman &
Gilks 1997, Ann. Appl. Probab. 7(1), for the choice of l).

:func:`metropolis` is the kernel that warm-up and sampling run, on the ravelled
position and with its random numbers given. Fed with numbers drawn from a JAX key as
BlackJAX draws them (:func:`step`), it returns exactly what BlackJAX's
``additive_step_random_walk.normal_random_walk`` with ``sigma = F`` returns (tested
bit for bit); it also reports whether the proposal's log density was NaN or +inf
(such a proposal is rejected, never accepted). :func:`blackjax_algorithm` returns the
BlackJAX ``SamplingAlgorithm`` itself, for users who run their own loop.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import NamedTuple

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
from scipy.linalg import solve_triangular


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


def shape_from_cholesky(cholesky) -> np.ndarray:
    """The matched proposal shape S = L⁻ᵀ, with S Sᵀ = (L Lᵀ)⁻¹ = H⁻¹.

    Computed on the host by one triangular solve; H⁻¹ itself is never formed.
    S is upper triangular.
    """
    chol = np.asarray(cholesky)
    eye = np.eye(chol.shape[0], dtype=chol.dtype)
    return solve_triangular(chol, eye, lower=True).T


def proposal_factor(shape, scale: float) -> np.ndarray:
    """The factor F = (l / sqrt(d)) S that multiplies standard-normal noise."""
    shape = np.asarray(shape)
    return (scale / np.sqrt(shape.shape[0])) * shape


def metropolis(
    state: FlatState,
    noise: jax.Array,
    uniform: jax.Array,
    logdensity_flat: Callable,
    factor: jax.Array,
    multiplier: jax.Array | float = 1.0,
) -> tuple[FlatState, StepInfo]:
    """One random-walk Metropolis step on the ravelled position, given its random numbers.

    ``noise`` ~ N(0, I_d) makes the proposal ``position + multiplier * factor @ noise``;
    ``uniform`` ~ U(0, 1) accepts it when ``uniform < min(1, pi(proposal)/pi(position))``.
    A proposal whose log density is NaN or +inf is rejected and flagged. ``multiplier``
    rescales the step (the warm-up adapts it); at 1.0 it changes nothing, bit for bit.
    """
    proposed = state.position + multiplier * jnp.dot(factor, noise, precision="highest")
    raw = logdensity_flat(proposed)
    fault = jnp.isnan(raw) | (raw == jnp.inf)
    proposed_logdensity = jnp.where(fault, -jnp.inf, raw)
    log_ratio = proposed_logdensity - state.logdensity
    log_ratio = jnp.where(jnp.isnan(log_ratio), -jnp.inf, log_ratio)
    acceptance_rate = jnp.clip(jnp.exp(log_ratio), max=1)
    accepted = uniform < acceptance_rate
    new_state = FlatState(
        jnp.where(accepted, proposed, state.position),
        jnp.where(accepted, proposed_logdensity, state.logdensity),
    )
    return new_state, StepInfo(acceptance_rate, accepted, fault)


def step(
    rng_key: jax.Array,
    state: FlatState,
    logdensity_flat: Callable,
    factor: jax.Array,
    multiplier: jax.Array | float = 1.0,
) -> tuple[FlatState, StepInfo]:
    """:func:`metropolis` with its random numbers drawn from a JAX key as BlackJAX does.

    BlackJAX 1.7's additive-step random walk splits the key in two, draws the Gaussian
    noise from the first and a Bernoulli acceptance (a uniform below the acceptance
    probability) from the second; with the same key this returns the same state as
    ``blackjax.additive_step_random_walk.normal_random_walk(guard(f), factor).step``
    (tested bit for bit). So :func:`metropolis` is BlackJAX's step, fed with numbers
    from elsewhere.
    """
    key_proposal, key_accept = jax.random.split(rng_key, 2)
    dtype = state.position.dtype
    noise = jax.random.normal(key_proposal, shape=state.position.shape, dtype=dtype)
    uniform = jax.random.uniform(key_accept, (), dtype=jnp.result_type(state.logdensity))
    return metropolis(state, noise, uniform, logdensity_flat, factor, multiplier)


def blackjax_algorithm(logdensity_fn: Callable, factor: jax.Array):
    """BlackJAX's Gaussian additive-step random walk with this proposal.

    ``factor`` is passed as BlackJAX's ``sigma``: BlackJAX applies a 2-D ``sigma`` as
    ``sigma @ z`` (a square-root factor, not a covariance). The log density is guarded
    (:func:`guard`), so NaN and +inf proposals are rejected.
    """
    return blackjax.additive_step_random_walk.normal_random_walk(guard(logdensity_fn), factor)
