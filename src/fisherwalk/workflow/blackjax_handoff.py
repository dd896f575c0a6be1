"""The one-import swap for BlackJAX users: a warmed-up start and parameters in BlackJAX's form.

``states, parameters = fisherwalk.handoff(blackjax.nuts, logdensity_fn, position, key)``
replaces BlackJAX's window adaptation: fisherwalk fits the Laplace approximation, tunes
the sampler from the Gaussian limit for this d and warms it up for at most 200 steps
(:func:`fisherwalk.start`, :func:`fisherwalk.refine`). ``blackjax.nuts(logdensity_fn,
**parameters)`` then runs in the user's own loop, with the Fisher metric as the dense
``inverse_mass_matrix`` (HMC and NUTS follow the same paths on the original coordinates
as fisherwalk's whitened loop; :mod:`fisherwalk.workflow.handoff`).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax

from ..base.keys import as_key
from ..errors import InputError, explain
from ..prepare.start import start
from ..prepare.warmup import refine
from ..samplers import registry

__all__ = ["handoff"]


def _family(algorithm):
    """The registered family whose BlackJAX constructor ``algorithm`` is."""
    for name in registry.names():
        family = registry.family(name)
        api = family.blackjax_api
        if algorithm is api or algorithm is getattr(api, "normal_random_walk", None):
            return family
    raise InputError(explain(
        f"algorithm={algorithm!r:.60} is not one of BlackJAX's samplers this hand-off knows.",
        "handoff(algorithm=...)",
        "pass blackjax.nuts, blackjax.hmc or blackjax.additive_step_random_walk."))


def handoff(algorithm, logdensity_fn: Callable, position: Any, rng_key, chains: int = 4,
            **start_options) -> tuple[Any, dict]:
    """Warmed-up BlackJAX states and the sampler's parameters in BlackJAX's own form.

    Parameters
    ----------
    algorithm
        ``blackjax.nuts``, ``blackjax.hmc`` or ``blackjax.additive_step_random_walk``
        (the random walk; ``parameters`` then holds ``sigma``, the square-root factor,
        for ``additive_step_random_walk.normal_random_walk``). ``blackjax.mala`` takes no
        metric, so it is refused: use ``fisherwalk.start(..., sampler="mala")``, which runs
        it on the whitened posterior.
    logdensity_fn, position, rng_key, chains
        As for :func:`fisherwalk.start`.
    **start_options
        Passed to :func:`fisherwalk.start` (e.g. ``fisher=``, ``restarts=``).

    Returns
    -------
    states
        One BlackJAX state per chain, batched along the first axis, at the end of the
        warm-up (``jax.vmap(kernel.step)`` takes them as they are). With ``chains=1``
        the one state, unbatched: ``kernel.step(key, state)`` takes it as it is.
    parameters
        ``{"step_size", "inverse_mass_matrix"}`` (NUTS; HMC adds
        ``"num_integration_steps"``, the rounded mean of the jittered count), or
        ``{"sigma"}`` for the random walk.

    Examples
    --------
    >>> states, parameters = fisherwalk.handoff(blackjax.nuts, logdensity, position, key)
    >>> kernel = blackjax.nuts(logdensity, **parameters)  # then your own loop
    """
    family = _family(algorithm)
    if not family.blackjax_takes_metric:
        raise InputError(explain(
            f"BlackJAX's {family.label} takes no metric, so the Fisher metric cannot be "
            "handed to it.", f"handoff(algorithm=blackjax.{family.name})",
            f'use fisherwalk.start(..., sampler="{family.name}") (it runs on the whitened '
            "posterior), or hand off blackjax.nuts or blackjax.hmc instead."))
    key = as_key(rng_key, where="handoff(rng_key=...)")
    key_start, key_warm = jax.random.split(key)
    walker = start(logdensity_fn, position, key_start, chains, sampler=family.name,
                   **start_options)
    walker = refine(walker, key_warm, steps=200)
    states = walker.states
    if walker.chains == 1:  # a single chain's loop takes an unbatched state
        states = jax.tree.map(lambda leaf: leaf[0], states)
    return states, family.blackjax_parameters(walker.tuning)
