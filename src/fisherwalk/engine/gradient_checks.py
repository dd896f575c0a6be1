"""Refused input for the gradient samplers: non-finite gradients, found and named.

A gradient sampler needs a finite log density and gradient wherever its trajectories
go. :func:`check_gradients` looks at the mode and the chain starts eagerly, before any
compiled step; along a run, the compiled loop flags suspicious transitions
(:mod:`fisherwalk.engine.gradient`), and :func:`replay_step` re-runs one of them eagerly,
listing every point BlackJAX's kernel evaluated, so that the fault can be named by
parameter. Each failure raises :class:`fisherwalk.errors.ModelError` suggesting
``sampler="rwm"``, which needs no gradient.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import ModelError, explain
from .gradient import (
    ChainState,
    GradientEngine,
    StepControl,
    integration_steps,
    step_keys,
    whitened_logdensity,
)
from .metric import to_whitened


def _nonfinite_message(names, theta, value, grad) -> str:
    bad = [i for i in range(len(names)) if not np.isfinite(grad[i])]
    listed = ", ".join(f"{names[i]} ({grad[i]})" for i in bad[:6]) + (", ..." if len(bad) > 6
                                                                       else "")
    if bad:
        return (f"The gradient of the log density is not finite for {listed} "
                f"(log density {value:.6g}).")
    return f"The log density is {value} (its gradient cannot be used)."


def _todo() -> str:
    return ('make the log density and its gradient finite there (e.g. no sqrt or log at 0, '
            'no NaN in an unused jnp.where branch; transform constrained parameters), or use '
            'sampler="rwm", which needs no gradient.')


def check_gradients(engine: GradientEngine, positions, names=None) -> ChainState:
    """Check value and gradient at the mode and at the chain starts, eagerly; start states.

    Raises :class:`fisherwalk.errors.ModelError` naming the parameters whose gradient
    is not finite (or a log density that is NaN or infinite) at the mode or a start, and
    suggesting ``sampler="rwm"``. Returns the chains' whitened states.
    """
    positions = np.asarray(positions, dtype=engine.mode.dtype)
    d = engine.mode.shape[0]
    names = tuple(names) if names is not None else tuple(f"theta[{i}]" for i in range(d))
    points = np.concatenate([engine.mode[None], positions])
    value, grad = (np.asarray(a) for a in engine.evaluate(points))
    for k in range(points.shape[0]):
        if np.isfinite(value[k]) and np.isfinite(grad[k]).all():
            continue
        where = "the mode" if k == 0 else f"the starting point of chain {k - 1}"
        raise ModelError(explain(_nonfinite_message(names, points[k], value[k], grad[k]),
                                 f"{where} (sampler={engine.sampler!r})", _todo()))
    z = to_whitened(positions, engine.mode, engine.whitening)
    return ChainState(z, value[1:], grad[1:] @ engine.whitening)


def replay_step(engine: GradientEngine, rng_key: jax.Array, step: int, chain: int,
                position, control_at_step: StepControl, step_size: float):
    """Re-run one chain's transition eagerly and list every point it evaluated.

    ``position`` is the chain's ORIGINAL-coordinate position before global step ``step``;
    ``step_size`` the step size that step used. Returns a list of
    ``(theta, log density, gradient)`` (host arrays, raw, before the guard) in the order
    BlackJAX evaluated them; the first with a NaN/+inf value or a non-finite gradient at a
    finite theta is the model's fault. Only for explaining a flagged step: slow.
    """
    seen: list = []
    logp = whitened_logdensity(engine.logdensity_flat, record=lambda *a: seen.append(
        tuple(np.asarray(v) for v in a)))
    mode, whitening = jnp.asarray(engine.mode), jnp.asarray(engine.whitening)
    z = jnp.asarray(to_whitened(position, engine.mode, engine.whitening))
    value, grad_z = jax.value_and_grad(logp)(z, mode, whitening)
    seen.clear()  # the state's own evaluation is not part of the transition
    key_jitter, keys = step_keys(rng_key, step, engine.chains)
    eps = jnp.asarray(step_size, dtype=engine.mode.dtype)
    n_steps = integration_steps(key_jitter, eps)
    transition = engine.transition
    result = transition(keys[chain], (z, value, grad_z), lambda x: logp(x, mode, whitening),
                        eps, n_steps)
    jax.block_until_ready(result)
    jax.effects_barrier()  # every debug callback has run
    return seen


def first_fault(points) -> tuple | None:
    """The first ``(theta, value, gradient)`` with a fault at a finite theta, or None."""
    for theta, value, grad in points:
        if np.isfinite(theta).all() and (np.isnan(value) or value == np.inf
                                         or not np.isfinite(grad).all()):
            return theta, value, grad
    return None


def nonfinite_error(engine: GradientEngine, names, point, where: str) -> ModelError:
    """The :class:`ModelError` for a fault found by :func:`replay_step`."""
    theta, value, grad = point
    return ModelError(explain(_nonfinite_message(names, theta, value, grad),
                              f"{where} (sampler={engine.sampler!r})", _todo()))
