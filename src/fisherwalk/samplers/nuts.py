"""The NUTS family: BlackJAX's No-U-Turn kernel on the whitened posterior.

Theory: the step ε at which jittered HMC's acceptance model meets BlackJAX's dual-averaging
target 0.8 at this d (Hoffman & Gelman 2014, "The No-U-Turn sampler", JMLR 15;
:mod:`fisherwalk.theory.gradient`, whose circle model of the tree is a rough guide); dual
averaging then settles the step. The target acceptance is BlackJAX's default, 0.8.
"""

from __future__ import annotations

import blackjax
import jax.numpy as jnp
import numpy as np
from blackjax.mcmc.hmc import HMCState

from ..theory.gradient import NUTS_TARGET_ACCEPTANCE
from .stepfamily import hmc_like_states, step_family

__all__ = ["FAMILY", "kernel", "MAX_NUM_DOUBLINGS"]

MAX_NUM_DOUBLINGS = 10  # BlackJAX's default tree depth cap, which the compiled loop uses


def kernel(max_num_doublings: int):
    """One chain's NUTS step (fault: either end of the trajectory is NaN; NUTS stops there)."""
    build = blackjax.nuts.build_kernel()

    def step(key, state, logp, step_size, n_steps):
        metric = jnp.ones_like(state[0])
        new, info = build(key, HMCState(*state), logp, step_size, metric, max_num_doublings)
        fault = (jnp.isnan(info.trajectory_leftmost_state.logdensity)
                 | jnp.isnan(info.trajectory_rightmost_state.logdensity))
        return tuple(new), (info.acceptance_rate, info.is_divergent,
                            info.num_integration_steps.astype(jnp.int32), fault, info.energy)

    return step


def _parameters(tuning) -> dict:
    return {"step_size": float(tuning.step_size),
            "inverse_mass_matrix": np.asarray(tuning.inverse_mass_matrix),
            "max_num_doublings": MAX_NUM_DOUBLINGS}


def _blackjax(logdensity_fn, tuning, engine):
    p = _parameters(tuning)
    return blackjax.nuts(logdensity_fn, p["step_size"], p["inverse_mass_matrix"],
                         max_num_doublings=p["max_num_doublings"])


FAMILY = step_family(
    name="nuts",
    label="NUTS (No-U-Turn sampler)",
    kernel=kernel,
    extra_compile_seconds=2.3,  # measured, see mala.py
    target_acceptance=lambda tuning: NUTS_TARGET_ACCEPTANCE,
    blackjax=_blackjax,
    blackjax_states=hmc_like_states(HMCState),
    blackjax_parameters=_parameters,
    blackjax_api=blackjax.nuts,
    takes_target_acceptance=True,
)
