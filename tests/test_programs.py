"""One compilation per model: a second start/refine/walk of the same log density (same
function object, same shapes) compiles nothing new in the same process."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.base import programs

_BACKEND = "/jax/core/compile/backend_compile_duration"  # one event per XLA compilation
_COUNT: list[str] = []


def _on_span(event, start_time, end_time, **_):
    if event == _BACKEND:
        _COUNT.append(event)


jax.monitoring.register_event_time_span_listener(_on_span)


def _workflow(logdensity, sampler, seed):
    keys = jax.random.split(jax.random.key(seed), 3)
    before = len(_COUNT)
    walker = fisherwalk.start(logdensity, {"mu": 0.0, "log_sigma": 0.0}, keys[0], chains=3,
                              sampler=sampler, progress=False)
    walker = fisherwalk.refine(walker, keys[1], progress=False)
    trace = fisherwalk.walk(walker, keys[2], 300, progress=False)
    return len(_COUNT) - before, trace


def _model(data):
    y = jnp.asarray(data)

    def logdensity(p):
        sigma = jnp.exp(p["log_sigma"])
        return (jnp.sum(-0.5 * ((y - p["mu"]) / sigma) ** 2) - y.size * p["log_sigma"]
                - 0.5 * p["mu"] ** 2 / 100.0 - 0.5 * p["log_sigma"] ** 2)

    return logdensity


@pytest.mark.parametrize("sampler", ["rwm", pytest.param("nuts", marks=pytest.mark.slow)])
def test_second_run_of_the_same_model_compiles_nothing(sampler):
    data = np.random.default_rng(1).normal(2.0, 1.0, 25)  # invented demo data
    logdensity = _model(data)
    first, _ = _workflow(logdensity, sampler, 0)
    second, trace = _workflow(logdensity, sampler, 1)
    assert first > 0  # the monitor sees compilations at all
    assert second == 0
    assert np.isfinite(trace.flat).all() and trace.flat.shape == (3, 300, 2)
    # a new function object is a new model: it compiles again
    third, _ = _workflow(_model(data), sampler, 2)
    assert third > 0


def test_remembered_is_keyed_by_the_live_function_and_bounded():
    built = []

    def fn(x):
        return x

    def build():
        built.append(1)
        return object()

    one = programs.remembered(fn, "t", (1,), build)
    assert programs.remembered(fn, "t", (1,), build) is one and len(built) == 1
    programs.remembered(fn, "t", (2,), build)  # other static settings: another program
    assert len(built) == 2
    for k in range(programs.MEMO_SIZE + 1):  # the oldest entries are dropped first
        programs.remembered(fn, "fill", (k,), build)
    programs.remembered(fn, "t", (1,), build)
    assert len(built) == 2 + programs.MEMO_SIZE + 2


def test_batched_pads_small_batches_to_one_compilation_and_cuts_the_padding():
    # jax.vmap of the same function is the reference; batches of 1, 4, 5 and 8 points
    # share the 8-point program, and 9 points take the 16-point one
    def logdensity(x):
        return -0.5 * jnp.sum(x**2) + jnp.sin(x[0])

    evaluate = programs.batched(logdensity)
    points = np.random.default_rng(2).normal(size=(9, 3))
    first = len(_COUNT)
    outputs = {m: evaluate(points[:m]) for m in (1, 4, 5, 8)}
    after_small = len(_COUNT)
    ninth = evaluate(points)
    for m, out in outputs.items():
        assert out.shape == (m,)
        assert np.allclose(out, np.asarray(jax.vmap(logdensity)(jnp.asarray(points[:m]))))
    assert np.allclose(ninth, np.asarray(jax.vmap(logdensity)(jnp.asarray(points))))
    assert after_small - first == 1  # one program for the four small batches
    assert [programs.batch_size(m) for m in (0, 1, 4, 5, 8, 9, 1024, 1025)] == [
        8, 8, 8, 8, 8, 16, 1024, 1025]
