"""Randomness: accept typed and old-style JAX keys; derive the random numbers of a run.

A run's random numbers come from a counter-based generator (Philox4x64; Salmon, Moraes,
Dror & Shaw 2011, "Parallel random numbers: as easy as 1, 2, 3", SC11) keyed by the
user's JAX key. Step ``s`` of a run reads the block of counters that belongs to ``s``
and to nothing else, so the draws do not depend on how a run is chunked or resumed.
The numbers are made on the host with numpy and fed to the compiled loop as data:
generating them inside the loop would cost about a second of compilation per run.
"""

from __future__ import annotations

import math

import jax
import numpy as np
from scipy.special import ndtri

from ..errors import InputError, explain

_TWO_POW_53 = 2.0**-53


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


def stream(rng_key: jax.Array, *labels: int) -> np.ndarray:
    """A Philox key (two uint64) for one purpose of a run, from the JAX key and labels.

    Derived with numpy's SeedSequence (O'Neill's seed-sequence hashing), so different
    labels give statistically independent streams.
    """
    words = [int(w) for w in key_data(rng_key).ravel()] + [int(v) for v in labels]
    return np.random.SeedSequence(words).generate_state(2, np.uint64)


def _raw(philox_key: np.ndarray, first_block: int, count: int) -> np.ndarray:
    counter = np.array([first_block, 0, 0, 0], dtype=np.uint64)
    return np.random.Philox(key=philox_key, counter=counter).random_raw(count)


def _uniform(raw: np.ndarray) -> np.ndarray:
    """53-bit uniforms in the open interval (0, 1)."""
    return ((raw >> np.uint64(11)).astype(np.float64) + 0.5) * _TWO_POW_53


def normals(philox_key: np.ndarray, shape: tuple[int, ...], dtype=np.float64) -> np.ndarray:
    """Standard normals by inversion of 53-bit uniforms (stable across numpy versions)."""
    count = int(np.prod(shape))
    return ndtri(_uniform(_raw(philox_key, 0, count))).reshape(shape).astype(dtype)


def step_noise(philox_key: np.ndarray, first_step: int, steps: int, chains: int, dim: int,
               dtype=np.float64) -> tuple[np.ndarray, np.ndarray]:
    """The random numbers of steps ``first_step .. first_step + steps - 1``.

    Returns the Gaussian increments (steps, chains, dim) and the acceptance uniforms
    (steps, chains). Step ``s`` always reads counter blocks
    ``s * blocks .. (s + 1) * blocks - 1``, whatever ``first_step`` and ``steps`` are.
    """
    per_step = chains * (dim + 1)
    blocks = math.ceil(per_step / 4)  # Philox4x64 gives four words per counter value
    raw = _raw(philox_key, first_step * blocks, steps * blocks * 4).reshape(steps, blocks * 4)
    u = _uniform(raw[:, :per_step])
    noise = ndtri(u[:, : chains * dim]).reshape(steps, chains, dim)
    return noise.astype(dtype), u[:, chains * dim:].astype(dtype)
