"""Random keys: accept typed and old-style keys; derive per-step keys that do not
depend on how a run is chunked or resumed."""

from __future__ import annotations

import jax
import numpy as np

from .errors import InputError, explain


def as_key(rng_key, *, where: str = "rng_key") -> jax.Array:
    """Return a typed key from a typed key (``jax.random.key``) or an old-style
    uint32 key of shape (2,) (``jax.random.PRNGKey``)."""
    if isinstance(rng_key, int | np.integer):
        raise InputError(
            explain(
                f"Got the integer {rng_key} where a JAX random key was expected.",
                where,
                f"pass jax.random.key({rng_key}).",
            )
        )
    try:
        dtype = rng_key.dtype
    except AttributeError as err:
        raise InputError(
            explain(
                f"Got a {type(rng_key).__name__} where a JAX random key was expected.",
                where,
                "pass jax.random.key(seed) (or an old-style jax.random.PRNGKey(seed)).",
            )
        ) from err
    if jax.dtypes.issubdtype(dtype, jax.dtypes.prng_key):
        if rng_key.shape != ():
            raise InputError(
                explain(
                    f"Got a batch of keys with shape {rng_key.shape}; one key is expected.",
                    where,
                    "pass a single key; fisherwalk splits it across chains itself.",
                )
            )
        return rng_key
    if dtype == np.uint32 and np.shape(rng_key) == (2,):
        return jax.random.wrap_key_data(rng_key)
    raise InputError(
        explain(
            f"Got an array of dtype {dtype} and shape {np.shape(rng_key)} where a JAX random "
            "key was expected.",
            where,
            "pass jax.random.key(seed) (or an old-style jax.random.PRNGKey(seed)).",
        )
    )


def key_data(rng_key: jax.Array) -> np.ndarray:
    """The raw uint32 data of a typed key, for saving (typed keys are not plain arrays)."""
    return np.asarray(jax.random.key_data(rng_key))


def chain_keys(run_key: jax.Array, step_index, chains: int) -> jax.Array:
    """Keys for one step of every chain: ``split(fold_in(run_key, step_index), chains)``.

    Folding in the global step index makes a run's random numbers independent of
    chunking, thinning boundaries and resumption.
    """
    return jax.random.split(jax.random.fold_in(run_key, step_index), chains)
