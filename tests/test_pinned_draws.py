"""Pinned draws: start, warm-up, sampling, checkpoint/resume and saved tunings give the
same draws for the same keys as the commit that introduced this test (357b8bc, before
the package was regrouped into sub-packages).

The hashes were computed at that commit, on this project's CI machine kind (x86_64,
jax 0.10.2, blackjax 1.7.1, float64). Draws are rounded to 10 significant digits before
hashing, so that a last-bit difference in a library's floating-point reduction order does
not break the pin while any change to the random numbers, the proposal, the accept/reject
decisions or the warm-up does (each of those moves draws by far more than 1e-10).
"""

from __future__ import annotations

import hashlib

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk as fw

PRECISION = jnp.array([[2.0, 0.6, 0.0], [0.6, 1.0, 0.3], [0.0, 0.3, 0.5]])
MEAN = jnp.array([1.0, -2.0, 0.5])


def logdensity(p):
    x = jnp.concatenate([p["a"], p["b"][None]]) - MEAN
    return -0.5 * x @ PRECISION @ x


POSITION = {"a": jnp.zeros(2), "b": jnp.asarray(0.0)}


def _digest(*arrays) -> str:
    h = hashlib.sha256()
    for a in arrays:
        h.update(_rounded(np.asarray(a, dtype=np.float64)))
    return h.hexdigest()[:16]


def _rounded(a: np.ndarray) -> bytes:
    with np.errstate(all="ignore"):
        exponent = np.floor(np.log10(np.abs(np.where(a == 0, 1.0, a))))
        scale = 10.0 ** (9 - exponent)
        return (np.round(a * scale) / scale).tobytes()


def pipeline(tmp_path) -> dict[str, str]:
    out = {}
    walker = fw.start(logdensity, POSITION, jax.random.key(11), chains=3)
    out["start"] = _digest(walker.flat_positions(), walker.states.logdensity,
                           walker.tuning.factor)
    walker = fw.refine(walker, jax.random.key(12), steps=200)
    out["refine"] = _digest(walker.flat_positions(), walker.tuning.factor,
                            walker.tuning.scale)
    trace = fw.walk(walker, jax.random.key(13), draws=150, thin=2)
    out["walk"] = _digest(trace.flat, trace.logdensity, trace.accepted)
    ckpt = tmp_path / "run.ckpt"
    first = fw.walk(walker, jax.random.key(14), draws=250, chunk=50, checkpoint=ckpt)
    again = fw.resume(ckpt, logdensity)
    out["checkpoint"] = _digest(first.flat, again.flat)
    fw.save_tuning(walker, tmp_path / "tuning.json")
    saved = fw.load_tuning(tmp_path / "tuning.json")
    other = fw.start(logdensity, POSITION, jax.random.key(15), chains=2, shape=saved)
    out["saved"] = _digest(fw.walk(other, jax.random.key(16), draws=100).flat,
                           other.tuning.factor)
    diagonal = fw.start(logdensity, POSITION, jax.random.key(17), chains=2, shape="diagonal")
    out["diagonal"] = _digest(fw.walk(diagonal, jax.random.key(18), draws=100).flat,
                              diagonal.tuning.factor, diagonal.tuning.scale)
    return out


PINNED = {
    "start": "3cd16b28a608f74e",
    "refine": "ef2d575d216200a6",
    "walk": "d5a5896902acc10f",
    "checkpoint": "610348972478133f",
    "saved": "cd0cb55c31193906",
    "diagonal": "2e6c27f7ab060e77",
}


@pytest.mark.slow
def test_draws_match_the_pinned_run(tmp_path):
    assert pipeline(tmp_path) == PINNED


def gradient_pipeline(sampler: str, tmp_path, *, checkpoint: bool = False) -> dict[str, str]:
    """start, refine and walk of a gradient sampler (and a checkpoint/resume if asked)."""
    out = {}
    walker = fw.start(logdensity, POSITION, jax.random.key(21), chains=2, sampler=sampler)
    out["start"] = _digest(walker.flat_positions(), walker.states.logdensity,
                           walker.tuning.step_size)
    walker = fw.refine(walker, jax.random.key(22), steps=200)
    out["refine"] = _digest(walker.flat_positions(), walker.tuning.step_size)
    trace = fw.walk(walker, jax.random.key(23), draws=60, thin=2)
    out["walk"] = _digest(trace.flat, trace.logdensity)
    if checkpoint:
        ckpt = tmp_path / f"{sampler}.ckpt"
        first = fw.walk(walker, jax.random.key(24), draws=80, chunk=40, checkpoint=ckpt)
        again = fw.resume(ckpt, logdensity)
        out["checkpoint"] = _digest(first.flat, again.flat)
    return out


# Computed on commit 3b99e9f (before the samplers became one family in a registry), same
# machine kind and rounding as PINNED above.
PINNED_GRADIENT = {
    "mala": {"start": "9b8878e07dd99959", "refine": "e0666ef69d480469",
             "walk": "0fd9aafbfc1992e1"},
    "hmc": {"start": "e97ed7268ec4f0b7", "refine": "7785796ea20a5728",
            "walk": "d5a11999069865dd"},
    "nuts": {"start": "7d68e5f1684ac100", "refine": "f7c5d3bced7bd989",
             "walk": "24e87142041c5346", "checkpoint": "1fa8e2f532c3de31"},
}


@pytest.mark.slow
@pytest.mark.parametrize("sampler", sorted(PINNED_GRADIENT))
def test_gradient_draws_match_the_pinned_run(sampler, tmp_path):
    got = gradient_pipeline(sampler, tmp_path, checkpoint=sampler == "nuts")
    assert got == PINNED_GRADIENT[sampler]
