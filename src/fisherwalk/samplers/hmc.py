"""The HMC family: BlackJAX's HMC kernel on the whitened posterior, jittered integration time.

Theory: the leapfrog step ε and the acceptance at this d under the jittered number of
leapfrog steps n = max(1, ⌊t/ε + u⌋), t ~ U(0.8, 1.2)·π/2, u ~ U(0, 1) (Beskos, Pillai,
Roberts, Sanz-Serna & Stuart 2013, "Optimal tuning of the hybrid Monte Carlo algorithm",
Bernoulli 19(5A), for the limit; :func:`fisherwalk.theory.gradient.hmc_steps_law` for the
exact law of n). The compiled loop draws n once per step for all chains
(:func:`fisherwalk.engine.gradient.integration_steps`).

One rule for a FIXED number of steps, wherever BlackJAX's own ``blackjax.hmc`` is handed
the tuning (``walker.algorithm``, :func:`fisherwalk.workflow.handoff.blackjax_parameters`,
:func:`fisherwalk.handoff`): :func:`fixed_integration_steps`, the expected jittered count
at the tuned step, rounded.
"""

from __future__ import annotations

import math

import blackjax
import jax.numpy as jnp
import numpy as np
from blackjax.mcmc.hmc import HMCState

from ..theory.gradient import INTEGRATION_TIME, hmc_steps_law, step_acceptance
from .stepfamily import hmc_like_states, step_family

__all__ = ["FAMILY", "kernel", "fixed_integration_steps"]


def kernel(max_num_doublings: int):
    """One chain's HMC step with the jittered count ``n_steps`` (fault: a NaN trajectory end)."""
    build = blackjax.hmc.build_kernel()

    def step(key, state, logp, step_size, n_steps):
        metric = jnp.ones_like(state[0])
        new, info = build(key, HMCState(*state), logp, step_size, metric, n_steps)
        fault = jnp.isnan(info.proposal.logdensity)
        # info.energy is the trajectory end's; a rejected step keeps the start's
        start = -state[1] + 0.5 * jnp.sum(info.momentum**2)
        energy = jnp.where(info.is_accepted, info.energy, start)
        return tuple(new), (info.acceptance_rate, info.is_divergent, n_steps, fault, energy)

    return step


def fixed_integration_steps(step_size: float) -> int:
    """The one rule: E[n] under the jittered law at ``step_size``, rounded (at least 1)."""
    values, probabilities = hmc_steps_law(float(step_size))
    return max(1, int(round(float(np.asarray(values) @ np.asarray(probabilities)))))


def _parameters(tuning) -> dict:
    return {"step_size": float(tuning.step_size),
            "inverse_mass_matrix": np.asarray(tuning.inverse_mass_matrix),
            "num_integration_steps": fixed_integration_steps(tuning.step_size)}


def _blackjax(logdensity_fn, tuning, engine):
    p = _parameters(tuning)
    return blackjax.hmc(logdensity_fn, p["step_size"], p["inverse_mass_matrix"],
                        p["num_integration_steps"])


def _words(tuning) -> str:
    lo, hi = INTEGRATION_TIME
    return (f"; integration time jittered in [{lo:.3f}, {hi:.3f}] "
            f"(about {math.ceil(lo / tuning.step_size)}-{math.ceil(hi / tuning.step_size)} "
            "leapfrog steps)")


FAMILY = step_family(
    name="hmc",
    label="HMC (Hamiltonian Monte Carlo, jittered integration time)",
    kernel=kernel,
    extra_compile_seconds=1.1,  # measured, see mala.py
    target_acceptance=lambda tuning: float(step_acceptance("hmc", tuning.step_size,
                                                           tuning.dim)),
    blackjax=_blackjax,
    blackjax_states=hmc_like_states(HMCState),
    blackjax_parameters=_parameters,
    blackjax_api=blackjax.hmc,
    words=_words,
    takes_target_acceptance=True,
)
