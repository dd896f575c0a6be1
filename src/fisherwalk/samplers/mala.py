"""The MALA family: BlackJAX's Metropolis-adjusted Langevin kernel on the whitened posterior.

Theory: the step h = 2·step_size that maximises the expected squared jump at this d, with
the exact finite-d acceptance (Roberts & Rosenthal 1998, "Optimal scaling of discrete
approximations to Langevin diffusions", JRSS B 60(1); :mod:`fisherwalk.theory.gradient`).

BlackJAX's MALA takes no mass matrix, so the Fisher metric reaches it only through the
whitening z = W⁻¹ (theta - mode). Its BlackJAX form (``walker.algorithm``) is therefore
``blackjax.mala`` on the whitened log density z -> log pi(mode + W z), and its states
(``walker.states``) are the whitened ravelled states: the tuned step size holds there,
not on the original coordinates.
"""

from __future__ import annotations

import blackjax
import jax.numpy as jnp
from blackjax.mcmc.mala import MALAState

from ..engine import gradient
from ..theory.gradient import step_acceptance
from .stepfamily import step_family

__all__ = ["FAMILY", "kernel"]


def kernel(max_num_doublings: int):
    """One chain's MALA step (flags a fault when the acceptance probability is exactly 0:
    BlackJAX's kernel does not return its proposal)."""
    build = blackjax.mala.build_kernel()

    def step(key, state, logp, step_size, n_steps):
        new, info = build(key, MALAState(*state), logp, step_size)
        fault = info.acceptance_rate == 0
        no_energy = jnp.full((), jnp.nan, new.logdensity.dtype)  # MALA has no Hamiltonian
        return tuple(new), (info.acceptance_rate, jnp.zeros((), bool), jnp.int32(1), fault,
                            no_energy)

    return step


def _whitened_density(engine):
    logp = gradient.whitened_logdensity(engine.logdensity_flat)
    mode, whitening = jnp.asarray(engine.mode), jnp.asarray(engine.whitening)
    return lambda z: logp(z, mode, whitening)


def _blackjax(logdensity_fn, tuning, engine):
    return blackjax.mala(_whitened_density(engine), tuning.step_size)


def _states(positions, logdensity, engine, state, unravel_many):
    return MALAState(*(jnp.asarray(part) for part in
                       (state.position, state.logdensity, state.logdensity_grad)))


FAMILY = step_family(
    name="mala",
    label="MALA (Metropolis-adjusted Langevin)",
    kernel=kernel,
    # measured on this project's 2-core benchmark machine (benchmarks/RESULTS.md, --quick)
    extra_compile_seconds=0.8,
    target_acceptance=lambda tuning: float(step_acceptance("mala", tuning.step_size,
                                                           tuning.dim)),
    blackjax=_blackjax,
    blackjax_states=_states,
    blackjax_parameters=lambda tuning: {"step_size": float(tuning.step_size)},
    blackjax_api=blackjax.mala,
    blackjax_takes_metric=False,
    energy=False,
    relies_on_limit=True,
)
