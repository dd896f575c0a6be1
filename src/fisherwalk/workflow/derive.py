"""Functions of the kept draws, evaluated after sampling: a pointwise log likelihood and
derived quantities.

``walk(..., pointwise=fn)`` stores ``fn(position) -> (n_obs,)`` at every kept draw, the
per-observation log likelihood that leave-one-out cross-validation needs (Vehtari,
Gelman & Gabry 2017, "Practical Bayesian model evaluation using leave-one-out
cross-validation and WAIC", Statistics and Computing 27). ``walk(..., derived=fn)``
stores ``fn(position) -> pytree`` (e.g. ``{"k": exp(log_k)}``), summarised like the
parameters. ``walk(..., predict=fn)`` stores ``fn(position, key) -> pytree`` at every kept
draw, each draw with its own key made from the run's key and the draw's index
(:func:`prediction_keys`): posterior predictive draws, summarised like the parameters and
exported to ArviZ as ``posterior_predictive``.

All three run on the host's ravelled draws ``(chains, draws, d)`` in chunks of a fixed number
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

from ..base.keys import as_key
from ..base.pytrees import written_order
from ..errors import FisherwalkWarning, InputError, ModelError, explain
from ..results.export import leaf_variables
from ..results.trace import derived_names

__all__ = ["check_functions", "evaluate_draws", "evaluate_pointwise", "evaluate_derived",
           "evaluate_predictions", "prediction_keys", "attach", "CHUNK_VALUES",
           "PREDICT_STREAM", "EvaluationFailure", "NonFiniteValues"]

PREDICT_STREAM = 0x5052  # folded into the run's key before the draws' indices: predictions
_KEY_SHAPE = (2,)  # key data of JAX's default threefry key

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


def _shapes(fn: Callable, dim: int, dtype, unravel: Callable, where: str, *,
            keyed: bool = False, written: list | None = None):
    """The output structure of ``fn`` at one position (traced, nothing computed). With
    ``keyed``, ``fn(position, key)`` gets a JAX key too. ``written`` (a list) receives the
    output's ravelled indices in the order the function wrote them."""
    if not callable(fn):
        raise InputError(explain(f"Expected a function of the position, got "
                                 f"{type(fn).__name__}.", where,
                                 "pass a function position -> array (or pytree of arrays)."))

    def probe(vector, *key):
        out = fn(unravel(vector), *(jax.random.wrap_key_data(k) for k in key))
        if written is not None:
            written[:] = written_order(out)
        return out

    args = [jax.ShapeDtypeStruct((dim,), dtype)]
    if keyed:
        args.append(jax.ShapeDtypeStruct(_KEY_SHAPE, np.uint32))
    try:
        shapes = jax.eval_shape(probe, *args)
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


def check_functions(walker, *, pointwise: Callable | None, derived: Callable | None,
                    predict: Callable | None = None) -> tuple[int, int]:
    """Before sampling: each given function must accept a position of the walker's model
    (``predict`` also a key) and return numeric arrays (the pointwise log likelihood a
    vector); traced, not run. Returns the values per draw stored (pointwise, derived and
    predictions together), for the memory check."""
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
    if predict is not None:
        shapes = _shapes(predict, dim, dtype, walker.unravel, "walk(predict=...)", keyed=True)
        counts[1] += sum(math.prod(leaf.shape) for leaf in jax.tree_util.tree_leaves(shapes))
    return counts[0], counts[1]


def _check_vector(shapes) -> None:
    if not hasattr(shapes, "shape") or len(shapes.shape) != 1:
        got = f"shape {shapes.shape}" if hasattr(shapes, "shape") else "a pytree"
        raise ModelError(explain(
            f"The pointwise log likelihood returned {got} per position, not a vector.",
            "walk(pointwise=...)",
            "return one log likelihood per observation, shape (n_obs,), e.g. "
            "jax.scipy.stats.poisson.logpmf(y, rate) without the sum."))


def evaluate_draws(fn: Callable, flat: np.ndarray, unravel: Callable, *, where: str,
                   keys: np.ndarray | None = None, written: list | None = None) -> Any:
    """``fn`` at every draw of ``flat`` ``(chains, draws, d)``: a pytree of host arrays,
    each leaf with leading axes ``(chains, draws)``.

    ``unravel`` maps one ravelled position ``(d,)`` to the user's pytree. With ``keys``
    (``(chains, draws, 2)`` key data, one key per draw) the function is called as
    ``fn(position, key)``. ``written`` (a list) receives the output's ravelled indices in
    the order the function wrote them. Raises :class:`~fisherwalk.errors.ModelError`
    when ``fn`` fails on a position, returns something that is not a pytree of numeric
    arrays, or returns non-finite values.
    """
    flat = np.asarray(flat)
    chains, count, dim = flat.shape
    total = chains * count
    rows = flat.reshape(total, dim)
    keyed = keys is not None
    key_rows = np.asarray(keys).reshape(total, -1) if keyed else np.zeros((total, 0), np.uint32)
    leaves, treedef = jax.tree_util.tree_flatten(
        _shapes(fn, dim, flat.dtype, unravel, where, keyed=keyed, written=written))

    def one(vector, key_data):
        if keyed:
            return fn(unravel(vector), jax.random.wrap_key_data(key_data))
        return fn(unravel(vector))

    per_draw = sum(math.prod(leaf.shape) for leaf in leaves)
    size = _chunk_size(per_draw, total)
    out = [np.empty((total, *leaf.shape), dtype=np.result_type(leaf.dtype, flat.dtype))
           for leaf in leaves]
    batched = jax.jit(jax.vmap(one))
    for begin in range(0, total, size):
        stop = min(begin + size, total)
        block, key_block = rows[begin:stop], key_rows[begin:stop]
        if stop - begin < size:  # pad to the compiled size; the padding is discarded
            pad = size - (stop - begin)
            block = np.concatenate([block, np.repeat(block[-1:], pad, 0)])
            key_block = np.concatenate([key_block, np.repeat(key_block[-1:], pad, 0)])
        values = jax.tree_util.tree_leaves(jax.device_get(batched(block, key_block)))
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
                     names: tuple[str, ...], written: list | None = None) -> Any:
    """The derived quantities (a pytree, leaves with leading (chains, draws) axes); their
    names must differ from the parameters' ``names``, and their leaves' names from the
    position's leaves (ArviZ keeps both as variables of one posterior)."""
    values = evaluate_draws(fn, flat, unravel, where="walk(derived=...)", written=written)
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


def prediction_keys(rng_key, chains: int, draws: int) -> np.ndarray:
    """Key data ``(chains, draws, 2)`` of each kept draw's prediction key:
    ``fold_in(fold_in(fold_in(run key, PREDICT_STREAM), chain), draw)``, the draw's global
    index within its chain. It depends on the run's key and the draw alone, so
    predictions are reproducible and do not depend on chunking, rounds or resumption."""
    base = jax.random.fold_in(as_key(rng_key, where="walk(predict=...)"), PREDICT_STREAM)

    def per_draw(chain, draw):
        return jax.random.key_data(jax.random.fold_in(jax.random.fold_in(base, chain), draw))

    grid = jax.vmap(jax.vmap(per_draw, (None, 0)), (0, None))
    return np.asarray(grid(np.arange(chains, dtype=np.uint32), np.arange(draws, dtype=np.uint32)))


def evaluate_predictions(fn: Callable, flat: np.ndarray, unravel: Callable, rng_key,
                         written: list | None = None) -> Any:
    """``fn(position, key)`` at every kept draw with the draw's own key
    (:func:`prediction_keys`): a pytree, leaves with leading (chains, draws) axes."""
    chains, count = np.shape(flat)[:2]
    return evaluate_draws(fn, flat, unravel, where="walk(predict=...)",
                          keys=prediction_keys(rng_key, chains, count), written=written)


def attach(trace, *, pointwise: Callable | None = None, derived: Callable | None = None,
           predict: Callable | None = None):
    """The trace with its pointwise log likelihood, derived quantities and/or predictions
    evaluated on its kept draws (the other fields unchanged).

    A function that fails (non-finite values at some draws, or an exception) does not
    lose the draws: its values are not stored, a warning says what happened, and
    ``trace.failures`` holds an :class:`EvaluationFailure` naming the function and the
    draws."""
    if trace.flat.shape[1] == 0:
        return trace
    unravel = trace.walker.unravel
    changes, failures = {}, list(trace.failures)
    orders: dict[str, list[int]] = {"derived": [], "predictions": []}

    def predictions(fn):
        key = jax.random.wrap_key_data(np.asarray(trace.rng_key, dtype=np.uint32))
        return evaluate_predictions(fn, trace.flat, unravel, key, orders["predictions"])

    jobs = [("pointwise", pointwise, lambda fn: evaluate_pointwise(fn, trace.flat, unravel)),
            ("derived", derived,
             lambda fn: evaluate_derived(fn, trace.flat, unravel, trace.names,
                                         orders["derived"])),
            ("predictions", predict, predictions)]
    for name, fn, evaluate in jobs:
        if fn is None:
            continue
        argument = "predict" if name == "predictions" else name
        try:
            changes[name] = evaluate(fn)
        except NonFiniteValues as err:
            failures.append(EvaluationFailure(argument, err.draws, err.count, str(err)))
        except Exception as err:  # noqa: BLE001 - the user's function: keep the draws
            message = str(err) if isinstance(err, InputError | ModelError) else explain(
                f"The function raised {type(err).__name__}: {err}", f"walk({argument}=...)",
                "fix the function; the draws are kept in the returned Trace (call "
                f"fisherwalk.workflow.derive.attach(trace, {argument}=fn) to evaluate it again).")
            failures.append(EvaluationFailure(argument, (), 0, message))
        else:
            if name in orders:
                changes[f"{name}_order"] = tuple(orders[name])
            continue
        warnings.warn(f"walk({argument}=...) failed after sampling; the draws are kept and "
                      f"trace.{name} is not set (trace.failures says where).\n"
                      f"{failures[-1].message}", FisherwalkWarning, stacklevel=3)
    space = trace.space
    if space is not None:  # a model's own space (fisherwalk.models): its sites' values
        where = f"the map to the model's sites ({space.language})"
        changes["draws"] = space.ordered(evaluate_draws(space.constrain, trace.flat, unravel,
                                                        where=where))
        if pointwise is None and space.pointwise is not None:  # the observed sites'
            changes["pointwise"] = evaluate_draws(space.pointwise, trace.flat, unravel,
                                                  where="the observed sites' log likelihood")
    return trace._replace(**changes, failures=tuple(failures))

