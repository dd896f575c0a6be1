"""One compilation per model: a bounded memo of the programs built from a log density.

JAX caches a jitted function's compilations on the function object. fisherwalk builds
its programs (the mode search, the batched log density, the chains' loops) as closures
over the user's log density, and a new closure is a new function to JAX: a second
``start``/``refine``/``walk`` of the same model would compile everything again, seconds
each time. :func:`remembered` returns the program built the first time for the same
log density *object* and the same static settings (shapes, dtypes, sampler, chains), so
the second call reuses the first call's compilations.

The memo holds at most :data:`MEMO_SIZE` programs (least recently used dropped first).
An entry is keyed by the log density's identity and checked through a weak reference,
so a new function that happens to reuse a dead one's ``id`` never gets its programs.
As with ``jax.jit`` itself, a log density that reads mutable global state sees the
state of its first compilation; pass data as closed-over arrays, not globals you change.
"""

from __future__ import annotations

import weakref
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Any, TypeVar

import jax
import numpy as np

__all__ = ["remembered", "forget", "structure_key", "batched", "batch_size", "MEMO_SIZE"]

T = TypeVar("T")
MEMO_SIZE = 32  # programs kept; each holds compiled executables (a few MB at most)
BATCH_FLOOR = 8  # smallest padded batch (twice the default number of chains)
BATCH_CEILING = 1024  # larger batches are not padded (the padding would cost real work)
_MEMO: OrderedDict[tuple, tuple[Any, Any]] = OrderedDict()


def remembered(fn: Callable, what: str, static: Hashable, build: Callable[[], T]) -> T:
    """``build()``'s result for (``fn``, ``what``, ``static``), built once and kept.

    Parameters
    ----------
    fn : the log density (or the closure) the program is built from; its identity keys
        the memo. A function that cannot be weakly referenced is never remembered.
    what : which program ("laplace search", "model", ...).
    static : everything else the program depends on (shapes, dtypes, settings); hashable.
    build : makes the program; an exception propagates and nothing is kept.
    """
    try:
        ref = weakref.ref(fn)
    except TypeError:
        return build()
    key = (id(fn), what, static)
    entry = _MEMO.get(key)
    if entry is not None and entry[0]() is fn:
        _MEMO.move_to_end(key)
        return entry[1]
    value = build()
    _MEMO[key] = (ref, value)
    while len(_MEMO) > MEMO_SIZE:
        _MEMO.popitem(last=False)
    return value


def structure_key(tree: Any) -> tuple:
    """A hashable description of a pytree's structure, leaf shapes and dtypes."""
    leaves, treedef = jax.tree_util.tree_flatten(tree)
    return (treedef, tuple((np.shape(leaf), str(np.asarray(leaf).dtype)) for leaf in leaves))


def forget() -> None:
    """Drop every remembered program (the next call of each builds and compiles anew)."""
    _MEMO.clear()


def batch_size(points: int) -> int:
    """The padded size of a batch of ``points``: the next power of two, at least
    :data:`BATCH_FLOOR`; batches above :data:`BATCH_CEILING` keep their size."""
    points = int(points)
    if points > BATCH_CEILING:
        return points
    return max(BATCH_FLOOR, 1 << max(points - 1, 0).bit_length())


def batched(fn: Callable) -> Callable:
    """``jax.jit(jax.vmap(fn))`` over a leading batch axis padded to :func:`batch_size`.

    The chains' starts (4 points), a start's candidates (5), a centre (1) and a chain
    check (8) then share one compilation instead of one each (a tenth to a fifth of a
    second apiece at d = 10 to 50); the padding repeats the first point and is cut from
    every output. Called on the host with concrete arrays (not inside a trace); returns
    host (numpy) arrays, cut on the host so that no slicing program is compiled either.
    """
    compiled = jax.jit(jax.vmap(fn))

    def call(points):
        m = int(np.shape(points)[0])
        size = batch_size(m)
        host = np.asarray(points)
        if m > 0 and size > m:
            host = np.concatenate([host, np.broadcast_to(host[:1], (size - m,) + host.shape[1:])])
        return jax.tree.map(lambda out: np.asarray(out)[:m], compiled(host))

    return call
