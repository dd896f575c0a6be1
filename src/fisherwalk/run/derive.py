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
import warnings
from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import numpy as np

from ..errors import FisherwalkWarning, InputError, ModelError, explain
from ..results.export import leaf_variables
from ..results.trace import derived_names

__all__ = ["check_functions", "evaluate_draws", "evaluate_pointwise", "evaluate_derived",
           "attach", "CHUNK_VALUES", "EvaluationFailure", "NonFiniteValues"]

CHUNK_VALUES = 1 << 22  # output values per chunk (32 MiB in float64): bounds the memory


class EvaluationFailure(NamedTuple):
    """A function of the draws that failed after sampling (``trace.failures``); the draws
    are kept, the function's values are not stored."""

    function: str  # "pointwise" or "derived"
    draws: tuple  # ((chain, draw), ...) with non-finite values (at most 20); () if it raised
    count: int  # kept draws with a non-finite value (0 when the function raised)
    message: str  # what happened, where, what to do


class NonFiniteValues(ModelError):
    """A function of the draws returned non-finite values; ``draws`` holds the
    (chain, draw) pairs (the first 20) and ``count`` how many."""

    def __init__(self, message: str, draws: tuple, count: int):
        super().__init__(message)
        self.draws, self.count = draws, count


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


def check_functions(walker, *, pointwise: Callable | None,
                    derived: Callable | None) -> tuple[int, int]:
    """Before sampling: each given function must accept a position of the walker's model
    and return numeric arrays (the pointwise log likelihood a vector); traced, not run.
    Returns the values per draw each stores (pointwise, derived), for the memory check."""
    dim, dtype = walker.dim, np.asarray(walker.state.position).dtype
    counts = [0, 0]
    if pointwise is not None:
        shapes = _shapes(pointwise, dim, dtype, walker.unravel, "walk(pointwise=...)")
        _check_vector(shapes)
        counts[0] = math.prod(shapes.shape)
    if derived is not None:
        shapes = _shapes(derived, dim, dtype, walker.unravel, "walk(derived=...)")
        counts[1] = sum(math.prod(leaf.shape) for leaf in jax.tree_util.tree_leaves(shapes))
        # the names clash check on zeros of the output's shapes (one draw of one chain)
        _check_names(jax.tree.map(lambda leaf: np.zeros((1, 1, *leaf.shape)), shapes),
                     walker.unravel(np.zeros(dim, dtype)), tuple(walker.names))
    return counts[0], counts[1]


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
            raise NonFiniteValues(explain(
                f"The function returned a non-finite value (leaf {index}) at {bad.size} "
                f"draw(s), the first at chain {c}, draw {s}.", where,
                "guard the function where the parameters make it undefined (e.g. a log of "
                "a negative number), or transform the parameters."),
                tuple(divmod(int(b), count) for b in bad[:20]), int(bad.size))
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
    _check_names(values, unravel(np.asarray(flat)[0, 0]), names)
    return values


def _check_names(values, position, names: tuple[str, ...]) -> None:
    leaves = set(leaf_variables(position, bare="x"))
    clash = sorted((set(derived_names(values)) & set(names))
                   | (set(leaf_variables(values, bare="derived")) & leaves))
    if clash:
        raise InputError(explain(
            f"Derived quantities {', '.join(clash[:6])} have the names of parameters.",
            "walk(derived=...)", "name the derived quantities differently, e.g. "
            "{'k': jnp.exp(p['log_k'])}."))


def attach(trace, *, pointwise: Callable | None = None, derived: Callable | None = None):
    """The trace with its pointwise log likelihood and/or derived quantities evaluated on
    its kept draws (the other fields unchanged).

    A function that fails (non-finite values at some draws, or an exception) does not
    lose the draws: its values are not stored, a warning says what happened, and
    ``trace.failures`` holds an :class:`EvaluationFailure` naming the function and the
    draws."""
    if trace.flat.shape[1] == 0:
        return trace
    unravel = trace.walker.unravel
    changes, failures = {}, list(trace.failures)
    jobs = [("pointwise", pointwise, lambda fn: evaluate_pointwise(fn, trace.flat, unravel)),
            ("derived", derived,
             lambda fn: evaluate_derived(fn, trace.flat, unravel, trace.names))]
    for name, fn, evaluate in jobs:
        if fn is None:
            continue
        try:
            changes[name] = evaluate(fn)
        except NonFiniteValues as err:
            failures.append(EvaluationFailure(name, err.draws, err.count, str(err)))
        except Exception as err:  # noqa: BLE001 - the user's function: keep the draws
            message = str(err) if isinstance(err, InputError | ModelError) else explain(
                f"The function raised {type(err).__name__}: {err}", f"walk({name}=...)",
                "fix the function; the draws are kept in the returned Trace (call "
                f"fisherwalk.run.derive.attach(trace, {name}=fn) to evaluate it again).")
            failures.append(EvaluationFailure(name, (), 0, message))
        else:
            continue
        warnings.warn(f"walk({name}=...) failed after sampling; the draws are kept and "
                      f"trace.{name} is not set (trace.failures says where).\n"
                      f"{failures[-1].message}", FisherwalkWarning, stacklevel=3)
    return trace._replace(**changes, failures=tuple(failures))

