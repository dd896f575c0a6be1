"""The metric learned from draws in windows on a gradient family's own engine
(fisherwalk.samplers.windows), and the dense-or-diagonal rule of BlackJAX's window
adaptation (fisherwalk.prepare.draws_warmup)."""

import jax
import numpy as np
import pytest

from fisherwalk.engine.gradient import control
from fisherwalk.prepare.draws_warmup import dense_enough
from fisherwalk.samplers import registry
from fisherwalk.samplers.windows import estimate_metric, learn_on_engine, schedule
from fisherwalk.tuned.tuning import Tuning

_BACKEND = "/jax/core/compile/backend_compile_duration"
_COUNT: list[str] = []
jax.monitoring.register_event_time_span_listener(
    lambda event, *a, **k: _COUNT.append(event) if event == _BACKEND else None)


def test_schedule_follows_stans_shape_in_whole_chunks():
    # Stan's default 1000 steps: fast 75 | slow 25, 50, 100, 200, 500 | fast 50
    # (Carpenter et al. 2017, J. Stat. Softw. 76(1)); ours in chunks of 100
    assert schedule(1000) == (100, (100, 200, 500), 100)
    burn, windows, final = schedule(2000)
    assert burn + sum(windows) + final == 2000
    assert all(b == 2 * a for a, b in zip(windows[:-2], windows[1:-1], strict=True))


def test_dense_metric_needs_ten_draws_per_parameter_in_the_last_window():
    # BlackJAX's schedule at 300 steps: last slow window 100 draws; at 1000: 500
    assert dense_enough(10, 300) and not dense_enough(11, 300)
    assert dense_enough(50, 1000) and not dense_enough(53, 300)
    assert not dense_enough(101, 100_000)  # beyond DENSE_LIMIT: diagonal


def test_estimate_is_regularised_toward_the_previous_metric():
    rng = np.random.default_rng(0)
    draws = rng.standard_normal((4, 50, 3)) * np.array([1.0, 2.0, 3.0])
    previous = np.eye(3) * 7.0
    metric, diagonal = estimate_metric(draws, previous)
    n, d = 200, 3
    cov = np.cov(draws.reshape(-1, 3), rowvar=False)
    shrunk = (1 - d / (d + n)) * cov + d / (d + n) * np.diag(np.diag(cov))
    assert not diagonal
    np.testing.assert_allclose(metric, (n * shrunk + 5 * previous) / (n + 5), rtol=1e-12)


def _gaussian(cov):
    precision = np.linalg.inv(cov)

    def logdensity(x):
        return -0.5 * x @ precision @ x

    return logdensity


@pytest.mark.slow
def test_windows_learn_a_correlated_gaussian_from_the_identity_and_compile_nothing_new():
    # N(0, Σ), Σ with scales 1..30 and correlation 0.9: from the identity metric the
    # learned M must whiten Σ. The last window's estimate pools 4 chains x 500 draws; its
    # eigenvalues relative to Σ spread as (1 ± sqrt(d/n_eff))² (Marchenko & Pastur 1967),
    # n_eff >= 500 for NUTS here gives (0.81, 1.21); we allow (0.6, 1.6), a wider band
    # for the autocorrelation of the draws (ESS of NUTS on a whitened target is about n).
    scales = np.array([1.0, 3.0, 10.0, 30.0])
    corr = np.full((4, 4), 0.9) + 0.1 * np.eye(4)
    cov = corr * np.outer(scales, scales)
    logdensity = _gaussian(cov)
    nuts = registry.family("nuts")
    eye = np.eye(4)
    tuning = nuts.initial(Tuning(eye, None, eye, "identity", sampler="nuts"))
    names = tuple(f"x[{i}]" for i in range(4))
    starts = np.random.default_rng(1).standard_normal((4, 4))
    # compile the engine's program once (what refine()'s phase 1 would have done)
    engine = nuts.engine(logdensity, tuning, np.zeros(4), 4, None)
    state = nuts.init(engine, starts, None, None, names)
    engine.run(jax.random.fold_in(jax.random.key(0), 1), 0, state,
               control(0.5, adapt=True), 100)  # and fold_in's own small programs
    before = len(_COUNT)
    learned = learn_on_engine(nuts, logdensity, tuning, np.zeros(4), 4, None, starts,
                              jax.random.key(2), names, burn=100, windows=(100, 200, 500),
                              final=100, started_from="identity")
    assert len(_COUNT) - before == 0, "learning the metric compiled a new program"
    root = np.linalg.cholesky(cov)
    spectrum = np.linalg.eigvalsh(np.linalg.solve(root, np.linalg.solve(
        root, learned.inverse_mass_matrix).T))
    assert 0.6 < spectrum.min() and spectrum.max() < 1.6, spectrum
    assert learned.steps == 1000 and not learned.diagonal
    assert abs(learned.acceptance - 0.8) < 0.1


@pytest.mark.parametrize("dim", [3])
def test_first_draws_give_the_first_estimate(dim):
    # with first_draws and no window to run, the metric is the regularised estimate of
    # those draws alone
    rng = np.random.default_rng(3)
    draws = rng.standard_normal((4, 100, dim)) * 2.0
    nuts = registry.family("nuts")
    eye = np.eye(dim)
    tuning = nuts.initial(Tuning(eye, None, eye, "identity", sampler="nuts"))
    learned = learn_on_engine(nuts, _gaussian(np.eye(dim)), tuning, np.zeros(dim), 4, None,
                              draws[:, -1], jax.random.key(0), ("a", "b", "c"),
                              first_draws=draws, windows=())
    np.testing.assert_allclose(learned.inverse_mass_matrix, estimate_metric(draws, eye)[0])
