"""The hand-off to a user's own BlackJAX loop: tuned parameters in BlackJAX's own form.

HMC and NUTS take the Fisher metric as a dense ``inverse_mass_matrix = H⁻¹`` on the
original coordinates; the step size tuned on the whitened posterior carries over
unchanged (:mod:`fisherwalk.engine.gradient`: the two parametrisations follow the same
trajectory for the same key). MALA has no mass matrix in BlackJAX, so its user runs it
on the whitened log density that :func:`whitened_problem` returns.
"""

from __future__ import annotations

from collections.abc import Callable

import jax
import jax.numpy as jnp
import numpy as np
from scipy.linalg import solve_triangular

from ..engine.gradient import whitened_logdensity
from ..engine.metric import whitening_factor
from ..errors import InputError, explain
from ..samplers import registry
from ..tuned.tuning import Tuning

_HIGHEST = jax.lax.Precision.HIGHEST


def whitened_problem(logdensity_flat: Callable, mode, cholesky) -> tuple[Callable, Callable]:
    """For a user's own MALA loop: ``(logdensity of z, z -> theta)``, W Wᵀ = H⁻¹.

    ``blackjax.mala(logdensity_z, **blackjax_parameters("mala", ...))`` then runs with the
    Fisher metric; map its draws back with ``to_original`` (the Jacobian is constant,
    so the whitened density needs no correction). The density is guarded as in the
    compiled loop (:func:`whitened_logdensity`).
    """
    mode = jnp.asarray(mode)
    whitening = jnp.asarray(whitening_factor(cholesky), dtype=mode.dtype)
    guarded = whitened_logdensity(logdensity_flat)

    def logdensity_z(z):
        return guarded(z, mode, whitening)

    def to_original(z):
        return mode + jnp.dot(z, whitening.T, precision=_HIGHEST)

    return logdensity_z, to_original


def blackjax_parameters(sampler: str, step_size: float, cholesky, *,
                        max_num_doublings: int = 10) -> dict:
    """Tuned parameters in BlackJAX's own form, for a user's loop.

    ``blackjax.nuts(logdensity_fn, **parameters)`` and ``blackjax.hmc(logdensity_fn,
    **parameters)`` then run with the Fisher metric ``inverse_mass_matrix = H⁻¹`` (dense)
    on the ORIGINAL coordinates; the step size is the one tuned here (the same in both
    coordinates, see the module docstring). HMC gets a fixed ``num_integration_steps``
    by the HMC family's one rule (:func:`fisherwalk.samplers.hmc.fixed_integration_steps`:
    the expected jittered count at ``step_size``, rounded; for the jitter itself use
    ``blackjax.dynamic_hmc`` with ``integration_steps_fn``). ``blackjax.mala`` takes no
    mass matrix: its parameters hold for the WHITENED log density
    ``z -> log pi(mode + W z)`` (:func:`whitened_problem` returns it and the map back).
    """
    gradients = registry.gradient_names()
    if sampler not in gradients:
        raise InputError(explain(f"sampler={sampler!r} is not a gradient sampler.",
                                 "blackjax_parameters(sampler=...)",
                                 f"use one of {', '.join(map(repr, gradients))}."))
    family = registry.family(sampler)
    chol = np.asarray(cholesky)
    shape = solve_triangular(chol, np.eye(chol.shape[0], dtype=chol.dtype), lower=True).T
    tuning = Tuning(shape, None, chol, "fisher", sampler=sampler, step_size=float(step_size))
    parameters = family.blackjax_parameters(tuning)
    if "inverse_mass_matrix" in parameters:
        parameters["inverse_mass_matrix"] = jnp.asarray(parameters["inverse_mass_matrix"])
    if "max_num_doublings" in parameters:
        parameters["max_num_doublings"] = int(max_num_doublings)
    return parameters
