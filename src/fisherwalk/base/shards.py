"""Data across devices: a log density whose likelihood is summed over data shards.

The data rows are split over a mesh axis (``"rows"`` by default) with
:func:`jax.shard_map`; each device evaluates the log likelihood of its own rows and
one ``jax.lax.psum`` adds the shards' sums. The result is a plain
``position -> scalar`` log density, so the Laplace fit (its gradient and Hessian are
sums over shards as well: autodiff goes through ``shard_map`` and ``psum``),
:func:`fisherwalk.start`, :func:`fisherwalk.refine` and :func:`fisherwalk.walk` use it
unchanged.

Rows that do not divide over the devices are padded with copies of the first row whose
terms are masked to exactly zero (``jnp.where``, so that neither the value nor any
derivative sees them); the padding never reaches the user.

Against the unsharded sum the value differs only by the order of the additions: n
terms summed in another order, about n·eps·max|term| at worst, a few 1e-13 relative
in float64 for the sizes tested.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from jax.sharding import Mesh, NamedSharding
from jax.sharding import PartitionSpec as P

from ..errors import InputError, ModelError, explain
from .meshes import ROWS, agree_across_processes, automatic

__all__ = ["sharded_logdensity"]


def _rows_mesh(mesh: Mesh | None, axis: str) -> Mesh:
    if mesh is None:
        return Mesh(np.asarray(jax.devices()), (axis,))
    if not isinstance(mesh, Mesh) or axis not in mesh.axis_names:
        names = getattr(mesh, "axis_names", None)
        raise InputError(explain(
            f"mesh={mesh!r} is not a jax.sharding.Mesh with an axis named {axis!r} "
            f"(its axes: {names}).", "sharded_logdensity(mesh=..., axis=...)",
            f"pass a Mesh that has the axis {axis!r}, e.g. jax.make_mesh((4,), ({axis!r},)), "
            "or leave mesh=None to use every visible device."))
    return automatic(mesh)


def _leaves(data: Any) -> tuple[list[np.ndarray], Any, int]:
    leaves, treedef = jax.tree.flatten(data)
    where = "sharded_logdensity(data=...)"
    if not leaves:
        raise InputError(explain("data holds no arrays.", where,
                                 "pass an array or a pytree of arrays, one row per observation."))
    arrays = []
    for i, leaf in enumerate(leaves):
        a = leaf if isinstance(leaf, np.ndarray) else np.asarray(leaf)
        if a.ndim == 0:
            raise InputError(explain(f"data leaf {i} is a scalar; rows need a leading axis.",
                                     where, "give every data array a leading axis of rows."))
        arrays.append(a)
    lengths = {a.shape[0] for a in arrays}
    if len(lengths) != 1:
        raise InputError(explain(
            f"The data arrays have different numbers of rows: {sorted(lengths)}.", where,
            "give every data array the same leading axis (one row per observation)."))
    n = lengths.pop()
    if n == 0:
        raise InputError(explain("data has no rows.", where, "pass at least one row."))
    return arrays, treedef, n


def _place(host: np.ndarray, sharding: NamedSharding, n: int, padded: int):
    """Rows 0..n-1 of ``host``, then copies of row 0, split over the mesh; only the rows a
    process's own devices hold are read from ``host`` (a memory map reads only those)."""

    def rows(index):
        first = index[0]
        start, stop = first.start or 0, padded if first.stop is None else first.stop
        wanted = np.arange(start, stop)
        wanted = np.where(wanted < n, wanted, 0)
        return np.asarray(host[wanted])[(slice(None),) + tuple(index[1:])]

    return jax.make_array_from_callback((padded,) + host.shape[1:], sharding, rows)


def _process_rows(mesh: Mesh, axis: str, arrays, n: int, padded: int):
    """Across processes: each process keeps the rows of its own devices' shards on the host.

    A jitted function may not close over an array that spans other processes' devices
    (JAX refuses), and fisherwalk's compiled loops take the log density as a closure. So
    each process closes over its own rows only (a host constant of the same shape on every
    process) and each device picks its shard from them by its index on the mesh axis.
    """
    shards = int(mesh.shape[axis])
    per_shard = padded // shards
    me = jax.process_index()
    position = mesh.axis_names.index(axis)
    mine = sorted({int(np.unravel_index(k, mesh.devices.shape)[position])
                   for k, device in enumerate(mesh.devices.flat) if device.process_index == me})
    slot = np.zeros(shards, dtype=np.int32)  # shard index -> place in this process's rows
    slot[mine] = np.arange(len(mine), dtype=np.int32)
    wanted = np.concatenate([np.arange(i * per_shard, (i + 1) * per_shard) for i in mine])
    source = np.where(wanted < n, wanted, 0)
    local = [np.asarray(a[wanted]) if a.shape[0] == padded else np.asarray(a[source])
             for a in arrays]
    count = len(mine)
    agree_across_processes("shards per process", count)

    def rows_of(_leaves):
        k = jnp.asarray(slot)[jax.lax.axis_index(axis)]
        return [jax.lax.dynamic_slice_in_dim(jnp.asarray(a), k * per_shard, per_shard)
                for a in local]

    return (), (P(),), rows_of


def sharded_logdensity(
    loglik_fn: Callable[[Any, Any], jax.Array],
    data: Any,
    logprior_fn: Callable[[Any], jax.Array] | None = None,
    *,
    mesh: Mesh | None = None,
    axis: str = ROWS,
) -> Callable[[Any], jax.Array]:
    """A log density ``position -> log prior + sum over rows of the log likelihood``,
    with the rows split over the devices of a mesh.

    Parameters
    ----------
    loglik_fn
        ``loglik_fn(position, rows) -> (m,)``: the log likelihood of each of the ``m``
        rows it is given (``rows`` has the structure of ``data``, each array cut to
        ``m`` rows), written in JAX. It runs once per shard.
    data
        An array or a pytree of arrays sharing the leading axis of ``n`` rows (numpy
        arrays, memory-mapped ones included: each process reads only its own rows).
    logprior_fn
        ``logprior_fn(position) -> scalar``; None for a flat prior (0).
    mesh
        A :class:`jax.sharding.Mesh` with an axis named ``axis``; None: every visible
        device on one axis. A mesh with a ``"chains"`` axis as well serves both the chains
        (:func:`fisherwalk.spread_chains`) and the rows.
    axis
        The mesh axis the rows are split over.

    Returns
    -------
    Callable
        ``logdensity_fn(position) -> scalar``, usable wherever fisherwalk takes one.

    Raises
    ------
    InputError
        Data without rows, arrays of different lengths, a mesh without ``axis``.
    ModelError
        (when first evaluated) ``loglik_fn`` does not return one value per row; or, in a
        ``jax.distributed`` run, the processes' data shapes differ.

    Notes
    -----
    Rows that do not divide over the devices are padded with copies of row 0 whose terms
    are set to exactly zero with ``jnp.where`` (value and derivatives); nothing padded is
    ever shown. Every process of a ``jax.distributed`` run must pass the same data in the
    same row order (the sum does not depend on it beyond rounding, but which process
    reads which rows does).
    """
    mesh = _rows_mesh(mesh, axis)
    arrays, treedef, n = _leaves(data)
    shards = int(mesh.shape[axis])
    padded = -(-n // shards) * shards
    per_shard = padded // shards
    agree_across_processes("data shapes", [(a.shape, str(a.dtype)) for a in arrays])
    keep = np.arange(padded) < n  # the copies of row 0 do not count
    if jax.process_count() == 1:
        sharding = NamedSharding(mesh, P(axis))
        placed = [_place(keep, sharding, padded, padded)]
        placed += [_place(a, sharding, n, padded) for a in arrays]
        specs = (P(),) + (P(axis),) * len(placed)

        def rows_of(leaves):
            return leaves
    else:
        placed, specs, rows_of = _process_rows(mesh, axis, (keep, *arrays), n, padded)

    def shard_sum(position, *leaves):
        mask, *leaves = rows_of(leaves)
        terms = loglik_fn(position, jax.tree.unflatten(treedef, leaves))
        if jnp.shape(terms) != (per_shard,):
            raise ModelError(explain(
                f"loglik_fn returned shape {jnp.shape(terms)} for a shard of {per_shard} rows.",
                "sharded_logdensity(loglik_fn=...)",
                "return the log likelihood of each row, shape (rows,), not their sum."))
        return jax.lax.psum(jnp.sum(jnp.where(mask, terms, 0.0)), axis)

    summed = jax.shard_map(shard_sum, mesh=mesh, in_specs=specs, out_specs=P(),
                           axis_names=frozenset({axis}))

    def logdensity_fn(position):
        total = summed(position, *placed)
        return total if logprior_fn is None else total + logprior_fn(position)

    logdensity_fn.rows = n  # what was summed, for reading
    logdensity_fn.shards = shards
    return logdensity_fn
