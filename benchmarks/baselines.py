"""The samplers fisherwalk is compared with, written for the benchmark (4 chains, vmapped).

Every baseline works on the ravelled position, runs its chains with ``jax.vmap`` inside a
``lax.scan``, and is driven from the host in chunks of draws, as fisherwalk's walk() is.
A baseline is a ``prepare`` step (everything before the first kept draw: warm-up,
adaptation) and an ``advance`` step (``draws`` more kept draws); both return plain
arrays so that the harness in ``harness.py`` measures them all the same way.

* :class:`TextbookWalk`: random-walk Metropolis with the identity proposal scaled by
  2.38/sqrt(d) (Roberts, Gelman & Gilks 1997, Ann. Appl. Probab. 7(1)), a burn-in,
  then sampling; BlackJAX's ``normal_random_walk`` does the steps.
* :class:`AdaptiveMetropolis`: Haario, Saksman & Tamminen (2001), "An adaptive
  Metropolis algorithm", Bernoulli 7(2): proposal N(x, 2.38²/d (Σ̂_t + ε I)) with Σ̂_t the
  chain's running covariance; adapting throughout, as in the paper.
* :class:`BlackjaxNuts`: BlackJAX NUTS with ``blackjax.window_adaptation`` at its
  defaults (diagonal inverse mass matrix, target acceptance 0.8, 1000 warm-up steps),
  one adaptation per chain, vmapped over chains.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any, NamedTuple

import blackjax
import jax
import jax.numpy as jnp
import numpy as np

CHAINS = 4
SCALE = 2.38  # Roberts, Gelman & Gilks (1997): l ~ 2.38 as d -> infinity
AM_EPSILON = 1e-8  # Haario et al.'s epsilon: keeps the proposal covariance positive definite
AM_GAIN_EXPONENT = 0.6  # Robbins-Monro gain (t + 1)^-0.6 for the first-phase scale


def warmup_steps(dim: int) -> int:
    """Warm-up (adaptive Metropolis) and burn-in (textbook walk) steps per chain.

    2000 + 400 d: a choice (common practice, no published source). For adaptive
    Metropolis it is the stretch whose draws are discarded; its adaptation goes on after
    it, so a short warm-up costs efficiency in the kept draws, not correctness.
    """
    return 2000 + 400 * dim


def start_points(initial: np.ndarray, key, chains: int = CHAINS, jitter: float = 0.1):
    """The baselines' starting points: the target's initial position plus N(0, jitter²)."""
    initial = jnp.asarray(initial)
    return initial + jitter * jax.random.normal(key, (chains, initial.shape[0]),
                                                dtype=initial.dtype)


class Prepared(NamedTuple):
    """What a sampler hands over at its first kept draw."""

    state: Any  # the chains' state, whatever the sampler needs
    evaluations: int  # log-density or gradient evaluations so far, all chains
    info: dict  # warm-up facts for the report (acceptance, step size, ...)


class Advanced(NamedTuple):
    """``draws`` more kept draws of every chain."""

    state: Any
    positions: np.ndarray  # (chains, draws, d)
    accepted: np.ndarray  # (chains, draws) acceptance indicator or NUTS acceptance rate
    evaluations: int  # evaluations in this call, all chains


# ----------------------------------------------------------------------------- textbook


class TextbookWalk:
    """Identity-proposal random-walk Metropolis, step (2.38/sqrt(d)) z (BlackJAX kernel)."""

    name = "textbook RW"
    key = "textbook"
    chunk = 100
    first_round = 500

    def __init__(self, logdensity_fn: Callable, dim: int, burn_in: int | None = None):
        self.dim = dim
        self.burn_in = warmup_steps(dim) if burn_in is None else burn_in
        sigma = jnp.full((dim,), SCALE / math.sqrt(dim))
        self.kernel = blackjax.additive_step_random_walk.normal_random_walk(logdensity_fn, sigma)
        self._scan = jax.jit(self._scan_fn, static_argnames="steps")

    def _scan_fn(self, key, first, states, steps: int):
        def one(states, i):
            keys = jax.random.split(jax.random.fold_in(key, first + i), CHAINS)
            states, info = jax.vmap(self.kernel.step)(keys, states)
            return states, (states.position, info.is_accepted)

        return jax.lax.scan(one, states, jnp.arange(steps))

    def prepare(self, initial: np.ndarray, key) -> Prepared:
        k_start, k_burn = jax.random.split(key)
        states = jax.vmap(self.kernel.init)(start_points(initial, k_start))
        done = 0
        acc = []
        while done < self.burn_in:  # burn-in in the same compiled chunks as sampling
            states, (_, accepted) = self._scan(k_burn, done, states, steps=self.chunk)
            acc.append(np.asarray(accepted))
            done += self.chunk
        info = {"burn_in": done, "acceptance_warmup": float(np.mean(acc))}
        return Prepared(states, CHAINS * (1 + done), info)

    def advance(self, state, key, first: int, draws: int) -> Advanced:
        pieces, acc = [], []
        for k in range(0, draws, self.chunk):
            state, (pos, accepted) = self._scan(key, first + k, state, steps=self.chunk)
            pieces.append(pos)
            acc.append(accepted)
        positions = np.swapaxes(np.concatenate(jax.device_get(pieces)), 0, 1)
        accepted = np.swapaxes(np.concatenate(jax.device_get(acc)), 0, 1).astype(float)
        return Advanced(state, positions, accepted, CHAINS * draws)


# ----------------------------------------------------------------------------- adaptive


class _AMState(NamedTuple):
    position: jax.Array  # (d,)
    logdensity: jax.Array  # ()
    mean: jax.Array  # (d,) running mean of the recorded history
    m2: jax.Array  # (d, d) running sum of centred outer products (Welford)
    count: jax.Array  # () history length
    log_scale: jax.Array  # () first-phase isotropic scale (log)
    factor: jax.Array  # (d, d) the proposal's square-root factor in use


class AdaptiveMetropolis:
    """Haario, Saksman & Tamminen (2001) adaptive Metropolis, one adaptation per chain.

    Steps t = 0, 1, ... of each chain: while t < t0 (a quarter of the warm-up) the
    proposal is isotropic with a scale adapted toward acceptance 0.234 (Robbins-Monro on
    the log scale, Andrieu & Thoms 2008, Statistics and Computing 18), so that the chain
    moves whatever the units (Haario et al. leave the initial covariance to prior
    knowledge); from t0 on, the proposal covariance is 2.38²/d (Σ̂_t + ε I), Σ̂_t the
    covariance of the chain's history from t0/2 on (Welford's recursion: the same
    estimate as the paper's recursive formula). As in the paper the adaptation never
    stops: the draws kept after the warm-up come from the still-adapting chain. The
    Cholesky factor of the proposal covariance is recomputed every ``REFRESH`` steps, not
    every step (a cost saving, common practice, no published source).
    """

    name = "adaptive Metropolis"
    key = "adaptive"
    chunk = 100
    first_round = 500
    REFRESH = 10

    def __init__(self, logdensity_fn: Callable, dim: int, warmup: int | None = None):
        self.logdensity_fn = logdensity_fn
        self.dim = dim
        self.warmup = warmup_steps(dim) if warmup is None else warmup
        self.warmup = int(math.ceil(self.warmup / self.chunk) * self.chunk)
        self.t0 = self.warmup // 4
        self._run = jax.jit(self._run_fn, static_argnames="steps")

    def _one(self, key, s: _AMState, t):
        """One step of one chain; ``t`` is the same for every chain (not vmapped)."""
        d = self.dim
        iso = jnp.exp(s.log_scale) * SCALE / math.sqrt(d)
        in_phase1 = t < self.t0
        k_noise, k_accept = jax.random.split(key)
        z = jax.random.normal(k_noise, s.position.shape, s.position.dtype)
        proposed = s.position + jnp.where(in_phase1, iso * z, s.factor @ z)
        new_logdensity = self.logdensity_fn(proposed)
        log_ratio = jnp.where(jnp.isnan(new_logdensity), -jnp.inf,
                              new_logdensity - s.logdensity)
        rate = jnp.minimum(1.0, jnp.exp(log_ratio))
        accept = jax.random.bernoulli(k_accept, rate)
        position = jnp.where(accept, proposed, s.position)
        logdensity = jnp.where(accept, new_logdensity, s.logdensity)
        gain = (t + 1.0) ** (-AM_GAIN_EXPONENT)
        log_scale = jnp.where(in_phase1, s.log_scale + gain * (rate - 0.234), s.log_scale)
        record = t >= self.t0 // 2
        count = s.count + record
        delta = position - s.mean
        mean = jnp.where(record, s.mean + delta / jnp.maximum(count, 1), s.mean)
        m2 = jnp.where(record, s.m2 + jnp.outer(delta, position - mean), s.m2)
        eye = jnp.eye(d, dtype=m2.dtype)

        def refreshed():
            cov = m2 / jnp.maximum(count - 1, 1) + AM_EPSILON * eye
            new = jnp.linalg.cholesky((SCALE**2 / d) * 0.5 * (cov + cov.T))
            ok = jnp.all(jnp.isfinite(new)) & (count > d + 1)
            # at the switch, without a usable estimate, carry on with the isotropic step
            return jnp.where(ok, new, jnp.where(t + 1 == self.t0, iso * eye, s.factor))

        refresh = (t + 1 >= self.t0) & ((t + 1 - self.t0) % self.REFRESH == 0)
        factor = jax.lax.cond(refresh, refreshed, lambda: s.factor)
        return _AMState(position, logdensity, mean, m2, count, log_scale, factor), accept

    def _run_fn(self, key, first, states, steps: int):
        def one(states, i):
            keys = jax.random.split(jax.random.fold_in(key, first + i), CHAINS)
            states, accept = jax.vmap(self._one, in_axes=(0, 0, None))(keys, states, first + i)
            return states, (states.position, accept)

        return jax.lax.scan(one, states, jnp.arange(steps))

    def prepare(self, initial: np.ndarray, key) -> Prepared:
        k_start, k_warm = jax.random.split(key)
        x0 = start_points(initial, k_start)
        d = self.dim
        dtype = x0.dtype
        logdens = jax.vmap(self.logdensity_fn)(x0)
        iso = SCALE / math.sqrt(d)
        states = _AMState(
            x0, logdens, jnp.zeros((CHAINS, d), dtype), jnp.zeros((CHAINS, d, d), dtype),
            jnp.zeros(CHAINS, jnp.int32), jnp.zeros(CHAINS, dtype),
            jnp.broadcast_to(iso * jnp.eye(d, dtype=dtype), (CHAINS, d, d)))
        acc = []
        for first in range(0, self.warmup, self.chunk):
            states, (_, accepted) = self._run(k_warm, first, states, steps=self.chunk)
            acc.append(np.asarray(accepted))
        acc = np.concatenate(acc)
        info = {"burn_in": self.warmup,
                "acceptance_warmup": float(acc[-self.warmup // 4:].mean()),
                "first_phase_scale": float(np.exp(np.mean(np.asarray(states.log_scale))))}
        return Prepared(states, CHAINS * (1 + self.warmup), info)

    def advance(self, state, key, first: int, draws: int) -> Advanced:
        pieces, acc = [], []
        for k in range(0, draws, self.chunk):
            # the step index runs on from the warm-up, so the adaptation carries on
            state, (pos, accepted) = self._run(key, self.warmup + first + k, state,
                                               steps=self.chunk)
            pieces.append(pos)
            acc.append(accepted)
        positions = np.swapaxes(np.concatenate(jax.device_get(pieces)), 0, 1)
        accepted = np.swapaxes(np.concatenate(jax.device_get(acc)), 0, 1).astype(float)
        return Advanced(state, positions, accepted, CHAINS * draws)


# ----------------------------------------------------------------------------- NUTS


class BlackjaxNuts:
    """BlackJAX NUTS after ``blackjax.window_adaptation(blackjax.nuts, logdensity_fn)``.

    The adaptation runs per chain (``jax.vmap`` of ``warmup.run`` over keys and starting
    points, 1000 steps: BlackJAX's default), so each chain has its own step size and
    diagonal inverse mass matrix, as four independent runs of the defaults would.
    """

    name = "BlackJAX NUTS"
    key = "nuts"
    chunk = 25
    first_round = 50
    warmup = 1000  # blackjax.window_adaptation's default num_steps

    def __init__(self, logdensity_fn: Callable, dim: int):
        self.logdensity_fn = logdensity_fn
        self.dim = dim
        adaptation = blackjax.window_adaptation(blackjax.nuts, logdensity_fn)

        def adapt_all(keys, positions):
            def one(k, x):
                (state, params), info = adaptation.run(k, x, self.warmup)
                return state, params, info.info.num_integration_steps, info.info.acceptance_rate

            return jax.vmap(one)(keys, positions)

        self._adapt = jax.jit(adapt_all)
        self._sample = jax.jit(self._sample_fn, static_argnames="steps")

    def _sample_fn(self, key, first, carry, steps: int):
        states, params = carry

        def one_chain(k, state, p):
            kernel = blackjax.nuts(self.logdensity_fn, p["step_size"], p["inverse_mass_matrix"])
            return kernel.step(k, state)

        def one(states, i):
            keys = jax.random.split(jax.random.fold_in(key, first + i), CHAINS)
            states, info = jax.vmap(one_chain)(keys, states, params)
            return states, (states.position, info.acceptance_rate, info.num_integration_steps)

        states, out = jax.lax.scan(one, states, jnp.arange(steps))
        return (states, params), out

    def prepare(self, initial: np.ndarray, key) -> Prepared:
        k_start, k_warm = jax.random.split(key)
        x0 = start_points(initial, k_start)
        states, params, steps, rates = self._adapt(jax.random.split(k_warm, CHAINS), x0)
        steps = np.asarray(steps)
        info = {"burn_in": self.warmup,
                "acceptance_warmup": float(np.asarray(rates)[:, -self.warmup // 4:].mean()),
                "step_size": np.asarray(params["step_size"]).tolist(),
                "integration_steps_warmup": int(steps.sum())}
        params = {"step_size": params["step_size"],
                  "inverse_mass_matrix": params["inverse_mass_matrix"]}
        return Prepared((states, params), int(CHAINS + steps.sum()), info)

    def advance(self, state, key, first: int, draws: int) -> Advanced:
        return advance_counting_steps(self._sample, state, key, first, draws, self.chunk)


BASELINES = {"textbook": TextbookWalk, "adaptive": AdaptiveMetropolis, "nuts": BlackjaxNuts}


def advance_counting_steps(sample: Callable, state, key, first: int, draws: int,
                           chunk: int) -> Advanced:
    """``draws`` kept draws in calls of ``sample(key, step, state, steps=chunk)``, which
    returns ``(state, (positions, acceptance, integration steps))``; the evaluations are
    the integration steps (one gradient each)."""
    pieces, acc, steps = [], [], []
    for k in range(0, draws, chunk):
        state, (pos, rate, n) = sample(key, first + k, state, steps=chunk)
        pieces.append(pos)
        acc.append(rate)
        steps.append(n)
    positions = np.swapaxes(np.concatenate(jax.device_get(pieces)), 0, 1)
    accepted = np.swapaxes(np.concatenate(jax.device_get(acc)), 0, 1)
    return Advanced(state, positions, accepted, int(np.sum(jax.device_get(steps))))
