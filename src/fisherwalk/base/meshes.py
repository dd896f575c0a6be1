"""Where the chains run: a device mesh with a named chain axis, and the placement on it.

JAX's own runtime does the spreading: a :class:`jax.sharding.Mesh` with an axis named
``"chains"`` and a :class:`jax.sharding.NamedSharding` that splits the chain axis of the
engine's inputs over it. The engine is one jitted function, so XLA partitions the
``vmap``-ed step by itself (GSPMD); the only cross-device traffic is the pooled
acceptance of the scale adaptation (a mean over chains, one all-reduce per step).

Across processes (``jax.distributed``), the same mesh spans every process's devices;
each process computes its share of the chains, and the kept draws are gathered so that
every process holds the whole run (the host-side code after the loop is unchanged).

Rules (documented in README, "Larger than one machine"):

- One device visible: no placement at all; everything runs exactly as on one device.
- Several devices visible, no explicit choice: the chains go over the largest number of
  those devices that divides the chain count (4 chains, 8 devices: 4; 6 chains,
  4 devices: 3; 5 chains, 4 devices: 1, i.e. no placement). Nothing is padded.
- An explicit choice (:func:`fisherwalk.spread_chains`) whose device count does not
  divide the chains is refused (InputError), as is a multi-process run whose global
  device count does not divide the chains.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from typing import Any

import jax
import numpy as np
from jax.experimental import multihost_utils
from jax.sharding import Mesh, NamedSharding
from jax.sharding import PartitionSpec as P

from ..errors import InputError, ModelError, explain

__all__ = ["CHAINS", "ROWS", "automatic", "ChainPlacement", "chain_placement", "chain_mesh",
           "agree_across_processes", "failed_processes"]

CHAINS = "chains"  # the mesh axis the chains are split over
ROWS = "rows"  # the mesh axis the data rows are split over (fisherwalk.sharded_logdensity)


def automatic(mesh: Mesh) -> Mesh:
    """The same devices and axis names with automatic (GSPMD) axes: XLA partitions the
    engine and the log density; ``jax.make_mesh`` gives explicit axes by default, which
    ``vmap`` over a function argument does not accept."""
    return Mesh(mesh.devices, mesh.axis_names)


def _largest_divisor(chains: int, limit: int) -> int:
    return max(k for k in range(1, min(chains, limit) + 1) if chains % k == 0)


def chain_mesh(chains: int, devices: Any = None, *, where: str = "spread_chains(devices=...)"
               ) -> Mesh | None:
    """The mesh the chains go over, or None for "no placement" (one device).

    ``devices``: None (automatic, see the module docstring), an int (the first ``n`` of
    ``jax.devices()``), a sequence of devices, or a :class:`jax.sharding.Mesh` that has
    an axis named ``"chains"`` (its other axes, e.g. ``"rows"`` for data, are left to
    the log density).
    """
    if isinstance(devices, Mesh):
        if CHAINS not in devices.axis_names:
            raise InputError(explain(
                f"The mesh has axes {devices.axis_names}; none is named {CHAINS!r}.",
                where, f"build the mesh with an axis named {CHAINS!r} for the chains, e.g. "
                f"jax.make_mesh((2, 2), ({CHAINS!r}, {ROWS!r}))."))
        count = devices.shape[CHAINS]
        if chains % count:
            raise InputError(_indivisible(chains, count, where))
        return automatic(devices)
    multi = jax.process_count() > 1
    visible = jax.devices()
    if devices is None:
        if len(visible) == 1:
            return None
        if multi:
            if chains % len(visible):
                raise InputError(_indivisible(chains, len(visible),
                                              "start(chains=...) with jax.distributed"))
            count = len(visible)
        else:
            count = _largest_divisor(chains, len(visible))
        chosen: Sequence = visible[:count]
    elif isinstance(devices, int | np.integer) and not isinstance(devices, bool):
        if not 1 <= devices <= len(visible):
            raise InputError(explain(
                f"devices={devices} but {len(visible)} device(s) are visible.", where,
                f"ask for 1 to {len(visible)} devices (on CPU, more host devices come from "
                "XLA_FLAGS=--xla_force_host_platform_device_count=N set before jax is "
                "imported)."))
        chosen = visible[: int(devices)]
    else:
        chosen = list(devices)
        if not chosen or not all(isinstance(d, jax.Device) for d in chosen):
            raise InputError(explain(
                f"devices={devices!r} is not a device count, a list of jax devices or a Mesh.",
                where, "pass e.g. devices=4, jax.devices()[:4], or a jax.sharding.Mesh."))
    if chains % len(chosen):
        raise InputError(_indivisible(chains, len(chosen), where))
    if len(chosen) == 1 and not multi:
        return None
    return Mesh(np.asarray(chosen), (CHAINS,))


def _indivisible(chains: int, count: int, where: str) -> str:
    lower = _largest_divisor(chains, count)
    return explain(
        f"{chains} chains do not divide over {count} devices (each device runs the same "
        "number of chains; fisherwalk does not pad chains).", where,
        f"use a multiple of {count} chains (e.g. {count * max(1, -(-chains // count))}), or "
        f"{lower} device(s).")


class ChainPlacement:
    """Puts the engine's inputs on a mesh, chain axis split; gathers what it returns.

    ``chain_axes`` of each input says which axis holds the chains (None: replicated).
    """

    def __init__(self, mesh: Mesh):
        self.mesh = mesh
        self.devices = int(mesh.size)
        self.multiprocess = jax.process_count() > 1
        self.checked = not self.multiprocess  # across processes: compare shapes once

    def sharding(self, ndim: int, chain_axis: int | None) -> NamedSharding:
        spec = [None] * ndim
        if chain_axis is not None:
            spec[chain_axis] = CHAINS
        return NamedSharding(self.mesh, P(*spec))

    def put(self, value, chain_axis: int | None):
        """One array onto the mesh (chains split along ``chain_axis``)."""
        sharding = self.sharding(np.ndim(value), chain_axis)
        if isinstance(value, jax.Array) and value.sharding == sharding:
            return value  # already there (the carry between chunks)
        if not self.multiprocess:
            return jax.device_put(value, sharding)
        host = np.asarray(value)  # every process holds the same host value
        return jax.make_array_from_callback(host.shape, sharding, lambda index: host[index])

    def engine_inputs(self, noise, uniform, state, factor, control):
        """The engine's arguments placed: noise (draws, thin, chains, d) and uniforms
        (draws, thin, chains) split on axis 2, the state's arrays on axis 0, the factor
        and the control replicated. Across processes, the first call checks that every
        process runs the same chains, dimension and dtype (before any step)."""
        if not self.checked:
            agree_across_processes("chains, dimension and dtype",
                                   (np.shape(noise)[2:], str(np.asarray(noise).dtype)))
            self.checked = True
        return (self.put(noise, 2), self.put(uniform, 2),
                jax.tree.map(lambda x: self.put(x, 0), state), self.put(factor, None),
                type(control)(*(self.put(x, None) for x in control)))

    def gather(self, tree):
        """Every array of ``tree`` readable on this process (all chains)."""
        if not self.multiprocess:
            return tree  # one process addresses every device: nothing to gather

        def one(x):
            if isinstance(x, jax.Array) and not x.is_fully_addressable:
                if x.is_fully_replicated:
                    return np.asarray(x.addressable_data(0))
                return np.asarray(multihost_utils.process_allgather(x, tiled=True))
            return x

        return jax.tree.map(one, tree)


def chain_placement(chains: int, devices: Any = None) -> ChainPlacement | None:
    """The placement of ``chains`` chains (None: one device, no placement)."""
    mesh = chain_mesh(chains, devices)
    return None if mesh is None else ChainPlacement(mesh)


def agree_across_processes(what: str, description: Any) -> None:
    """Raise ModelError unless every process passes the same ``description``.

    Compares a 64-bit hash of ``repr(description)`` (e.g. shapes and dtypes) across the
    processes of a ``jax.distributed`` run with one tiny all-gather; a no-op with one
    process. Call it before any sampling, so that a mismatch is a clear error instead of
    a hang or a wrong sum.
    """
    if jax.process_count() == 1:
        return
    digest = hashlib.blake2b(repr(description).encode(), digest_size=8).digest()
    mine = np.frombuffer(digest, dtype=np.uint32).copy()
    every = np.asarray(multihost_utils.process_allgather(mine))  # (processes, 2)
    differ = [i for i in range(every.shape[0]) if not np.array_equal(every[i], every[0])]
    if differ:
        raise ModelError(explain(
            f"The processes disagree on the {what}: process {differ[0]} differs from "
            f"process 0 (this process, {jax.process_index()}, has {description!r}).",
            f"jax.distributed run, {what}",
            "start every process with the same model, the same data shapes and the same "
            "chain count (the same script and the same data files on every host)."))


def failed_processes(ok: bool) -> list[int]:
    """The indices of the processes of a ``jax.distributed`` run that report ``ok=False``
    (this one included), from one tiny all-gather that every process must call at the
    same point, whether its step succeeded or not. A process refused at that point (e.g.
    by a checkpoint's lock) thus tells the others, which stop too instead of waiting for
    it in a collective. With one process: ``[]`` or ``[0]``, no communication.
    """
    if jax.process_count() == 1:
        return [] if ok else [jax.process_index()]
    flags = np.asarray(multihost_utils.process_allgather(np.asarray([int(bool(ok))],
                                                                    dtype=np.int32)))
    return [int(i) for i in np.flatnonzero(flags.reshape(-1) == 0)]
