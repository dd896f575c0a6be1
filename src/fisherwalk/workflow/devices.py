"""Chains across devices: choose where a walker's chains run.

By default a walker's chains go over every visible device that they divide evenly
(:mod:`fisherwalk.base.meshes`); on one device nothing changes. :func:`spread_chains`
makes the choice explicit: a number of devices, a list of devices, or a
:class:`jax.sharding.Mesh` with a ``"chains"`` axis (its other axis may carry the data
rows of :func:`fisherwalk.sharded_logdensity`).

What a run on several devices promises against a run on one, with the same keys and
chains: the same random numbers per chain (they are made on the host, per chain and per
step), the same accept/reject decisions except in a vanishingly rare tie, and draws
that agree to about 1e-8 on unit-scale parameters. Not bit for bit: XLA may evaluate a
log density over a batch of 1 chain differently from a batch of 4 (another reduction
order, about 1e-12 apart), and the warm-up's pooled acceptance is a mean over chains
summed in another order; these last-bit differences then travel with the chains.
"""

from __future__ import annotations

from typing import Any

from ..base.meshes import chain_mesh
from ..tuned.walker import Walker, continuable_state, with_engine

__all__ = ["spread_chains", "chain_devices"]


def spread_chains(walker: Walker, devices: Any = None) -> Walker:
    """The same walker, its chains split over ``devices`` for refine() and walk().

    Parameters
    ----------
    walker
        From :func:`fisherwalk.start`, :func:`fisherwalk.refine` or a rebuilt tuning.
    devices
        ``None``: automatic (every visible device the chains divide over; one device =
        no placement); an int ``n``: the first ``n`` of ``jax.devices()`` (1 = back to
        one device); a sequence of ``jax.Device``; or a ``jax.sharding.Mesh`` with an
        axis named ``"chains"``.

    Returns
    -------
    Walker
        A new walker sharing the state, tuning and report; its engine (compiled anew on
        the first call) places the chain axis over the devices.

    Raises
    ------
    InputError
        The chains do not divide over the devices (no padding: each device runs the same
        number of chains), more devices than are visible, or a mesh without a
        ``"chains"`` axis.
    """
    continuable_state(walker, "spread_chains(walker=...)")
    chains = walker.chains
    chain_mesh(chains, devices)  # refuse bad input here, with this function's name
    model = with_engine(walker.model, walker.tuning, walker.report.laplace.mode_flat, chains,
                        devices)  # the walker's own family's loop, placed
    return walker._replace(model=model)


def chain_devices(walker: Walker) -> int:
    """How many devices the walker's chains run on (1: no placement)."""
    placement = walker.engine.placement
    return 1 if placement is None else placement.devices
