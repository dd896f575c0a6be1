"""Positions as pytrees: validation, ravelling and parameter names.

fisherwalk does its linear algebra on one flat vector (ravelled with
``jax.flatten_util.ravel_pytree``, whose order is the order of
``jax.tree_util.tree_flatten``: dict keys sorted, arrays row-major) and hands
results back in the user's structure.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from jax.flatten_util import ravel_pytree

from ..errors import Float32Warning, InputError, explain, warn_user
from .precision import working_dtype


class Flat(NamedTuple):
    """A position ravelled to one vector."""

    vector: jax.Array  # (d,) float
    unravel: Callable[[jax.Array], Any]  # (d,) -> the user's pytree
    names: tuple[str, ...]  # d parameter names, e.g. "beta[3]", "sigma"


def path_parts(path, *, index: str = "[{}]") -> list[str]:
    """The entries of a pytree key path as text: dict keys and attribute names as they
    are, sequence indices through ``index`` (``"[{}]"`` gives ``beta[3]``-style names)."""
    parts = []
    for entry in path:
        if isinstance(entry, jax.tree_util.DictKey):
            parts.append(str(entry.key))
        elif isinstance(entry, jax.tree_util.GetAttrKey):
            parts.append(str(entry.name))
        elif isinstance(entry, jax.tree_util.SequenceKey):
            parts.append(index.format(entry.idx))
        else:  # pragma: no cover - other key types
            parts.append(str(entry))
    return parts


def _path_name(path) -> str:
    parts = path_parts(path)
    name = ""
    for part in parts:
        if part.startswith("["):
            name += part
        else:
            name += ("." if name else "") + part
    return name or "x"


def parameter_names(position: Any) -> tuple[str, ...]:
    """One name per scalar parameter, in ravelled order.

    A dict ``{"beta": (3,), "sigma": ()}`` gives ``beta[0]``, ``beta[1]``,
    ``beta[2]``, ``sigma``; a matrix leaf ``W`` of shape (2, 2) gives ``W[0,0]`` ...
    ``W[1,1]``; a bare vector gives ``x[0]``, ``x[1]``, ...
    """
    leaves, _ = jax.tree_util.tree_flatten_with_path(position)
    names: list[str] = []
    for path, leaf in leaves:
        base = _path_name(path)
        shape = np.shape(leaf)
        if shape == ():
            names.append(base)
            continue
        for index in np.ndindex(*shape):
            names.append(f"{base}[{','.join(str(i) for i in index)}]")
    return tuple(names)


def _to_working_dtype(position: Any, leaves: list, where: str) -> Any:
    """Floating leaves cast to the working dtype (one dtype for every leaf, so that the
    compiled loop's carry keeps its type); a narrower leaf is announced."""
    dtype = working_dtype()
    narrow = sorted({_path_name(path) for path, leaf in leaves
                     if jnp.asarray(leaf).dtype.itemsize < dtype.itemsize})
    if narrow:
        warn_user(
            f"Leaves {', '.join(narrow[:6])} of the position are narrower than {dtype.name}, "
            f"which JAX computes in here; fisherwalk casts them to {dtype.name} (the draws "
            f"and the log density are {dtype.name}).\n  where: {where}\n  what to do: "
            f"create the position in {dtype.name} (e.g. np.zeros(n)) to silence this.",
            Float32Warning,
        )
    return jax.tree.map(lambda leaf: jnp.asarray(leaf, dtype=dtype), position)


def flatten_position(position: Any, *, where: str = "position") -> Flat:
    """Validate a position and ravel it.

    Raises
    ------
    InputError
        If the position is empty, has a leaf that is not a floating-point array,
        or holds a non-finite value.
    """
    leaves, _ = jax.tree_util.tree_flatten_with_path(position)
    if not leaves:
        raise InputError(
            explain(
                "The position has no array in it.",
                where,
                "pass a floating-point array, or a dict/tuple of them, with one entry "
                "per parameter.",
            )
        )
    for path, leaf in leaves:
        name = _path_name(path)
        try:
            dtype = jnp.asarray(leaf).dtype
        except TypeError as err:
            raise InputError(
                explain(
                    f"Leaf '{name}' of the position is a {type(leaf).__name__}, "
                    "not an array.",
                    where,
                    "make every leaf a floating-point array, e.g. jnp.asarray(value, float).",
                )
            ) from err
        if not jnp.issubdtype(dtype, jnp.floating):
            raise InputError(
                explain(
                    f"Leaf '{name}' of the position has dtype {dtype}; fisherwalk "
                    "samples continuous parameters only.",
                    where,
                    "convert it with jnp.asarray(..., dtype=float); a discrete "
                    "parameter must be marginalised out of the log density.",
                )
            )
        if np.size(leaf) == 0:
            raise InputError(
                explain(
                    f"Leaf '{name}' of the position is empty (shape {np.shape(leaf)}).",
                    where,
                    "remove the empty leaf from the position (and from the log density), "
                    "or give it at least one entry.",
                )
            )
    position = _to_working_dtype(position, leaves, where)
    vector, unravel = ravel_pytree(position)
    names = parameter_names(position)
    bad = ~np.isfinite(np.asarray(vector))
    if bad.any():
        which = ", ".join(n for n, b in zip(names, bad, strict=True) if b)
        raise InputError(
            explain(
                f"The position holds non-finite values at {which}.",
                where,
                "start from finite values inside the support of the posterior.",
            )
        )
    return Flat(vector, unravel, names)


def ravel_batch(tree: Any, batch_dims: int = 1) -> np.ndarray:
    """Ravel a pytree whose leaves carry ``batch_dims`` leading axes: (..., d), on the host.

    Same parameter order as ``ravel_pytree`` (leaves in ``tree_flatten`` order, each
    row-major), without compiling anything.
    """
    leaves = [np.asarray(leaf) for leaf in jax.tree_util.tree_leaves(tree)]
    batch = leaves[0].shape[:batch_dims]
    return np.concatenate([leaf.reshape(*batch, -1) for leaf in leaves], axis=-1)


def unravel_batch(flat: np.ndarray, like: Any) -> Any:
    """Inverse of :func:`ravel_batch`: (..., d) -> the structure of ``like`` (unbatched),
    each leaf with the same leading axes. Host numpy; nothing is compiled."""
    flat = np.asarray(flat)
    leaves, treedef = jax.tree_util.tree_flatten(like)
    batch = flat.shape[:-1]
    out, start = [], 0
    for leaf in leaves:
        shape = np.shape(leaf)
        size = int(np.prod(shape, dtype=int))
        out.append(flat[..., start:start + size].reshape(*batch, *shape))
        start += size
    return jax.tree_util.tree_unflatten(treedef, out)


def name_difference(saved: tuple[str, ...], names: tuple[str, ...], *,
                     there: str = "the record", here: str = "this model") -> str:
    """The difference between two lists of parameter names, in words."""
    missing = [n for n in saved if n not in names]
    extra = [n for n in names if n not in saved]
    if missing or extra:
        parts = []
        if missing:
            parts.append(f"{there} has {', '.join(missing[:6])} which {here} lacks")
        if extra:
            parts.append(f"{here} has {', '.join(extra[:6])} which {there} lacks")
        return "; ".join(parts)
    k = next(i for i, (a, b) in enumerate(zip(saved, names, strict=True)) if a != b)
    return (f"same names in another order: position {k} is {saved[k]!r} in {there} and "
            f"{names[k]!r} in {here}")


def written_order(tree: Any) -> tuple[int, ...]:
    """The ravelled indices in the order the user wrote the pytree.

    ``ravel_pytree`` sorts dict keys; a person reads ``{"floor": .., "span": .., "log_half":
    ..}`` in the order written. Dicts are walked in insertion order, sequences in order,
    every other node in JAX's order; each leaf's entries stay row-major. The result ``p``
    puts ravelled values ``v`` in written order as ``v[..., p]`` (identity when nothing is
    out of order). Nothing is compiled.
    """
    leaves, treedef = jax.tree_util.tree_flatten(tree)
    sizes = [int(np.prod(np.shape(leaf), dtype=int)) for leaf in leaves]
    starts = np.cumsum([0, *sizes])
    index = jax.tree_util.tree_unflatten(
        treedef, [np.arange(starts[k], starts[k + 1]) for k in range(len(leaves))])
    out: list[int] = []

    def walk(node, ids) -> None:
        if isinstance(node, dict) and isinstance(ids, dict) and set(node) == set(ids):
            for key in node:
                walk(node[key], ids[key])
        elif (isinstance(node, list | tuple) and isinstance(ids, list | tuple)
              and len(node) == len(ids) and not hasattr(node, "_fields")):
            for part, part_ids in zip(node, ids, strict=True):
                walk(part, part_ids)
        else:
            for leaf in jax.tree_util.tree_leaves(ids):
                out.extend(int(i) for i in np.ravel(leaf))

    walk(tree, index)
    return tuple(out)
