"""BlackJAX's other warm-ups, as baselines beside ``window_adaptation`` (``baselines.py``).

* :class:`PathfinderNuts`: ``blackjax.pathfinder_adaptation(blackjax.nuts, logdensity_fn,
  num_chains=chains)`` at its defaults: one multi-path Pathfinder fit (Zhang, Carpenter,
  Gelman & Vehtari 2022, "Pathfinder: parallel quasi-Newton variational inference",
  JMLR 23) with one path per chain, a dense inverse mass matrix from the PSIS-weighted
  mixture of the paths' L-BFGS inverse Hessians, chain starts resampled by PSIS, then 400
  steps of dual averaging of each chain's step size (BlackJAX's default ``num_steps``),
  then ``blackjax.nuts`` with each chain's step size and the shared dense matrix.
* :class:`CheesHmc`: ``blackjax.chees_adaptation(logdensity_fn, num_chains)``: jittered
  HMC whose step size and trajectory length are tuned across all the chains by the
  ChEES criterion (Hoffman, Radul & Sountsov 2021, "An adaptive-MCMC scheme for setting
  trajectory lengths in Hamiltonian Monte Carlo", AISTATS), 1000 warm-up steps
  (BlackJAX's default ``num_steps``), then ``blackjax.dhmc`` with the returned
  parameters, as BlackJAX's docstring shows. Choices the library leaves to the user:
  the optimiser ``optax.adam(0.025)`` (the learning rate of the paper's experiments, as
  remembered, not re-checked), the initial step size 0.1 (common practice, no published
  source; the adaptation moves it), and ``mass_matrix_estimation="diagonal"`` (BlackJAX's
  opt-in ensemble-estimated diagonal metric, so that ChEES has a metric as the window
  adaptation does). ChEES is meant for many chains: it runs at 4 and at 64 chains.

Both are vmapped over chains inside a ``lax.scan`` and driven in chunks from the host,
like the other baselines. Evaluations are gradient evaluations: the warm-up's and the
sampling's ``num_integration_steps``, plus one per chain at initialisation. Pathfinder's
own L-BFGS evaluations are not returned by ``run()`` and are not counted; its ELBO/PSIS
draws (200 per path, BlackJAX's default) are counted as log-density evaluations.
"""

from __future__ import annotations

from collections.abc import Callable

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
import optax
from baselines import CHAINS, Advanced, Prepared, advance_counting_steps, start_points
from blackjax.adaptation.base import get_filter_adapt_info_fn

CHEES_LEARNING_RATE = 0.025  # Adam's rate in Hoffman, Radul & Sountsov (2021), from memory
CHEES_STEP_SIZE = 0.1  # initial step size (common practice, no published source)
CHEES_WARMUP = 1000  # chees_adaptation's run() default num_steps
PATHFINDER_WARMUP = 400  # pathfinder_adaptation's run() default num_steps
PATHFINDER_SAMPLES_PER_PATH = 200  # pathfinder_adaptation's default num_samples_per_path
_KEEP = get_filter_adapt_info_fn(info_keys={"num_integration_steps", "acceptance_rate"})


class PathfinderNuts:
    """NUTS after ``blackjax.pathfinder_adaptation`` (multi-path, one path per chain)."""

    name = "BlackJAX NUTS, Pathfinder warm-up"
    key = "pathfinder"
    chunk = 25
    first_round = 50
    warmup = PATHFINDER_WARMUP

    def __init__(self, logdensity_fn: Callable, dim: int, chains: int = CHAINS):
        self.logdensity_fn = logdensity_fn
        self.dim = dim
        self.chains = chains
        adaptation = blackjax.pathfinder_adaptation(blackjax.nuts, logdensity_fn,
                                                    num_chains=chains,
                                                    adaptation_info_fn=_KEEP)

        def adapt(key, position):
            (states, params), info = adaptation.run(key, position, self.warmup)
            return states, params, info.info.num_integration_steps, info.info.acceptance_rate

        self._adapt = jax.jit(adapt)
        self._sample = jax.jit(self._sample_fn, static_argnames="steps")

    def _sample_fn(self, key, first, carry, steps: int):
        states, step_sizes, imm = carry

        def one_chain(k, state, step_size):
            return blackjax.nuts(self.logdensity_fn, step_size, imm).step(k, state)

        def one(states, i):
            keys = jax.random.split(jax.random.fold_in(key, first + i), self.chains)
            states, info = jax.vmap(one_chain)(keys, states, step_sizes)
            return states, (states.position, info.acceptance_rate, info.num_integration_steps)

        states, out = jax.lax.scan(one, states, jnp.arange(steps))
        return (states, step_sizes, imm), out

    def prepare(self, initial: np.ndarray, key) -> Prepared:
        k_start, k_warm = jax.random.split(key)
        x0 = start_points(initial, k_start, self.chains)[0]  # run() takes one position
        states, params, steps, rates = self._adapt(k_warm, x0)
        steps = np.asarray(steps)
        info = {"burn_in": self.warmup,
                "acceptance_warmup": float(np.asarray(rates)[..., -self.warmup // 4:].mean()),
                "step_size": np.atleast_1d(np.asarray(params["step_size"])).tolist(),
                "integration_steps_warmup": int(steps.sum()),
                "pathfinder_draws": PATHFINDER_SAMPLES_PER_PATH * self.chains}
        carry = (states, jnp.broadcast_to(params["step_size"], (self.chains,)),
                 params["inverse_mass_matrix"])
        evaluations = self.chains + int(steps.sum()) + PATHFINDER_SAMPLES_PER_PATH * self.chains
        return Prepared(carry, evaluations, info)

    def advance(self, state, key, first: int, draws: int) -> Advanced:
        return advance_counting_steps(self._sample, state, key, first, draws, self.chunk)


class CheesHmc:
    """Jittered HMC after ``blackjax.chees_adaptation`` over all the chains."""

    chunk = 25
    first_round = 50
    warmup = CHEES_WARMUP

    def __init__(self, logdensity_fn: Callable, dim: int, chains: int = CHAINS):
        self.logdensity_fn = logdensity_fn
        self.dim = dim
        self.chains = chains
        self.key = "chees" if chains == CHAINS else f"chees-{chains}"
        self.name = f"BlackJAX ChEES-HMC ({chains} chains)"
        adaptation = blackjax.chees_adaptation(logdensity_fn, chains,
                                               mass_matrix_estimation="diagonal",
                                               adaptation_info_fn=_KEEP)

        def adapt(key, positions):
            # not wrapped in jax.jit: the parameters include the jitter functions, which
            # a jitted function cannot return; run()'s lax.scan is compiled all the same
            (states, params), info = adaptation.run(
                key, positions, CHEES_STEP_SIZE, optax.adam(CHEES_LEARNING_RATE), self.warmup,
                max_sampling_steps=1_000_000)
            return states, params, info.info.num_integration_steps, info.info.acceptance_rate

        self._adapt = adapt
        self._params = None
        self._sample = jax.jit(self._sample_fn, static_argnames="steps")

    def _sample_fn(self, key, first, states, steps: int):
        kernel = blackjax.dhmc(self.logdensity_fn, **self._params)

        def one(states, i):
            keys = jax.random.split(jax.random.fold_in(key, first + i), self.chains)
            states, info = jax.vmap(kernel.step)(keys, states)
            return states, (states.position, info.acceptance_rate, info.num_integration_steps)

        return jax.lax.scan(one, states, jnp.arange(steps))

    def prepare(self, initial: np.ndarray, key) -> Prepared:
        k_start, k_warm = jax.random.split(key)
        x0 = start_points(initial, k_start, self.chains)
        states, params, steps, rates = self._adapt(k_warm, x0)
        self._params = params  # closed over by the sampling program (compiled once)
        steps = np.asarray(steps)
        info = {"burn_in": self.warmup,
                "acceptance_warmup": float(np.asarray(rates)[-self.warmup // 4:].mean()),
                "step_size": float(params["step_size"]),
                "leapfrog_steps": float(params["integration_steps_params"][0]),
                "integration_steps_warmup": int(steps.sum())}
        return Prepared(states, self.chains + int(steps.sum()), info)

    def advance(self, state, key, first: int, draws: int) -> Advanced:
        return advance_counting_steps(self._sample, state, key, first, draws, self.chunk)


def chees_many(logdensity_fn: Callable, dim: int) -> CheesHmc:
    """ChEES at 64 chains, where a cross-chain criterion is meant to work."""
    return CheesHmc(logdensity_fn, dim, chains=64)


WARMUPS = {"pathfinder": PathfinderNuts, "chees": CheesHmc, "chees-64": chees_many}
