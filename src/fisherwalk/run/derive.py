"""Functions of the kept draws, evaluated after sampling: a pointwise log likelihood and
derived quantities.

``walk(..., pointwise=fn)`` stores ``fn(position) -> (n_obs,)`` at every kept draw, the
per-observation log likelihood that leave-one-out cross-validation needs (Vehtari,
Gelman & Gabry 2017, "Practical Bayesian model evaluation using leave-one-out
cross-validation and WAIC", Statistics and Computing 27). ``walk(..., derived=fn)``
stores ``fn(position) -> pytree`` (e.g. ``{"k": exp(log_k)}``), summarised like the
parameters.

Both run on the host's ravelled draws ``(chains, draws, d)`` in chunks of a fixed number
of draws: each chunk is unravelled, passed through ``jit(vmap(fn))`` and written into a
preallocated array, so no more than one chunk's copy exists beside the result. The last
chunk is padded to the same size (by repeating its last draw, discarded after), so the
function compiles once.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import jax
import numpy as np

from ..errors import InputError, ModelError, explain
from ..results.export import leaf_variables
from ..results.trace import derived_names

__all__ = ["check_functions", "evaluate_draws", "evaluate_pointwise", "evaluate_derived",
           "attach", "CHUNK_VALUES"]

CHUNK_VALUES = 1 << 22  # output values per chunk (32 MiB in float64): bounds the memory


def _chunk_size(per_draw: int, total: int) -> int:
    return max(1, min(total, 4096, CHUNK_VALUES // max(per_draw, 1)))


def _shapes(fn: Callable, dim: int, dtype, unravel: Callable, where: str):
    """The output structure of ``fn`` at one position (traced, nothing computed)."""
    if not callable(fn):
        raise InputError(explain(f"Expected a function of the position, got "
                                 f"{type(fn).__name__}.", where,
                                 "pass a function position -> array (or pytree of arrays)."))
    try:
        shapes = jax.eval_shape(lambda vector: fn(unravel(vector)),
                                jax.ShapeDtypeStruct((dim,), dtype))
    except Exception as err:  # noqa: BLE001 - the user's function: report what it raised
        raise ModelError(explain(f"The function raised {type(err).__name__}: {err}", where,
                                 "make it accept one position of the model (the structure "
                                 "of initial_position) and use jax.numpy only.")) from err
    leaves = jax.tree_util.tree_leaves(shapes)
    if not leaves or not all(hasattr(leaf, "shape") for leaf in leaves):
        raise ModelError(explain("The function returned no array.", where,
                                 "return an array or a dict/tuple of arrays."))
    for leaf in leaves:
        if not (np.issubdtype(leaf.dtype, np.floating) or np.issubdtype(leaf.dtype, np.integer)
                or leaf.dtype == np.bool_):
            raise ModelError(explain(f"The function returned an array of dtype {leaf.dtype}.",
                                     where, "return real numbers."))
    return shapes


def check_functions(walker, *, pointwise: Callable | None, derived: Callable | None) -> None:
    """Before sampling: each given function must accept a position of the walker's model
    and return numeric arrays (the pointwise log likelihood a vector); traced, not run."""
    dim, dtype = walker.dim, np.asarray(walker.state.position).dtype
    if pointwise is not None:
        shapes = _shapes(pointwise, dim, dtype, walker.unravel, "walk(pointwise=...)")
        _check_vector(shapes)
    if derived is not None:
        _shapes(derived, dim, dtype, walker.unravel, "walk(derived=...)")


def _check_vector(shapes) -> None:
    if not hasattr(shapes, "shape") or len(shapes.shape) != 1:
        got = f"shape {shapes.shape}" if hasattr(shapes, "shape") else "a pytree"
        raise ModelError(explain(
            f"The pointwise log likelihood returned {got} per position, not a vector.",
            "walk(pointwise=...)",
            "return one log likelihood per observation, shape (n_obs,), e.g. "
            "jax.scipy.stats.poisson.logpmf(y, rate) without the sum."))


def evaluate_draws(fn: Callable, flat: np.ndarray, unravel: Callable, *, where: str) -> Any:
    """``fn`` at every draw of ``flat`` ``(chains, draws, d)``: a pytree of host arrays,
    each leaf with leading axes ``(chains, draws)``.

    ``unravel`` maps one ravelled position ``(d,)`` to the user's pytree. Raises
    :class:`~fisherwalk.errors.ModelError` when ``fn`` fails on a position, returns
    something that is not a pytree of numeric arrays, or returns non-finite values.
    """
    flat = np.asarray(flat)
    chains, count, dim = flat.shape
    total = chains * count
    rows = flat.reshape(total, dim)
    leaves, treedef = jax.tree_util.tree_flatten(_shapes(fn, dim, flat.dtype, unravel, where))

    def one(vector):
        return fn(unravel(vector))

    per_draw = sum(math.prod(leaf.shape) for leaf in leaves)
    size = _chunk_size(per_draw, total)
    out = [np.empty((total, *leaf.shape), dtype=np.result_type(leaf.dtype, flat.dtype))
           for leaf in leaves]
    batched = jax.jit(jax.vmap(one))
    for begin in range(0, total, size):
        stop = min(begin + size, total)
        block = rows[begin:stop]
        if stop - begin < size:  # pad to the compiled size; the padding is discarded
            block = np.concatenate([block, np.repeat(block[-1:], size - (stop - begin), 0)])
        values = jax.tree_util.tree_leaves(jax.device_get(batched(block)))
        for target, value in zip(out, values, strict=True):
            target[begin:stop] = value[: stop - begin]
    for index, array in enumerate(out):
        bad = np.flatnonzero(~np.isfinite(array.reshape(total, -1)).all(axis=1))
        if bad.size:
            c, s = divmod(int(bad[0]), count)
            raise ModelError(explain(
                f"The function returned a non-finite value (leaf {index}) at {bad.size} "
                f"draw(s), the first at chain {c}, draw {s}.", where,
                "guard the function where the parameters make it undefined (e.g. a log of "
                "a negative number), or transform the parameters."))
    leaves_out = [array.reshape(chains, count, *array.shape[1:]) for array in out]
    return jax.tree_util.tree_unflatten(treedef, leaves_out)


def evaluate_pointwise(fn: Callable, flat: np.ndarray, unravel: Callable) -> np.ndarray:
    """The pointwise log likelihood ``(chains, draws, n_obs)`` of ``fn(position)``."""
    flat = np.asarray(flat)
    _check_vector(_shapes(fn, flat.shape[2], flat.dtype, unravel, "walk(pointwise=...)"))
    return evaluate_draws(fn, flat, unravel, where="walk(pointwise=...)")


def evaluate_derived(fn: Callable, flat: np.ndarray, unravel: Callable,
                     names: tuple[str, ...]) -> Any:
    """The derived quantities (a pytree, leaves with leading (chains, draws) axes); their
    names must differ from the parameters' ``names``, and their leaves' names from the
    position's leaves (ArviZ keeps both as variables of one posterior)."""
    values = evaluate_draws(fn, flat, unravel, where="walk(derived=...)")
    leaves = set(leaf_variables(unravel(np.asarray(flat)[0, 0]), bare="x"))
    clash = sorted((set(derived_names(values)) & set(names))
                   | (set(leaf_variables(values, bare="derived")) & leaves))
    if clash:
        raise InputError(explain(
            f"Derived quantities {', '.join(clash[:6])} have the names of parameters.",
            "walk(derived=...)", "name the derived quantities differently, e.g. "
            "{'k': jnp.exp(p['log_k'])}."))
    return values


def attach(trace, *, pointwise: Callable | None = None, derived: Callable | None = None):
    """The trace with its pointwise log likelihood and/or derived quantities evaluated on
    its kept draws (the other fields unchanged)."""
    if trace.flat.shape[1] == 0:
        return trace
    unravel = trace.walker.unravel
    changes = {}
    if pointwise is not None:
        changes["pointwise"] = evaluate_pointwise(pointwise, trace.flat, unravel)
    if derived is not None:
        changes["derived"] = evaluate_derived(derived, trace.flat, unravel, trace.names)
    space = trace.space
    if space is not None:  # a model's own space (fisherwalk.models): its sites' values
        where = f"the map to the model's sites ({space.language})"
        changes["draws"] = space.ordered(evaluate_draws(space.constrain, trace.flat, unravel,
                                                        where=where))
        if pointwise is None and space.pointwise is not None:  # the observed sites'
            changes["pointwise"] = evaluate_draws(space.pointwise, trace.flat, unravel,
                                                  where="the observed sites' log likelihood")
    return trace._replace(**changes)

