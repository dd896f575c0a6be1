"""walk(): reproducibility, compilation, thinning, faults; the summary of a Trace."""

import re

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk


def _model(counter=None):
    prec = jnp.asarray([[2.0, 0.6, 0.0], [0.6, 1.0, 0.2], [0.0, 0.2, 0.5]])

    def logdensity(x):
        if counter is not None:
            counter.append(1)  # runs only when JAX traces the function
        return -0.5 * x @ prec @ x

    return logdensity


@pytest.fixture(scope="module")
def walker():
    return fisherwalk.start(_model(), jnp.ones(3), jax.random.key(0), chains=4)


@pytest.mark.slow
def test_same_key_same_draws_whatever_the_chunking(walker):
    a = fisherwalk.walk(walker, jax.random.key(1), draws=230, progress=False)
    b = fisherwalk.walk(walker, jax.random.key(1), draws=230, progress=False)
    c = fisherwalk.walk(walker, jax.random.key(1), draws=230, chunk=37, progress=False)
    assert np.array_equal(a.flat, b.flat)
    assert np.array_equal(a.flat, c.flat)
    assert np.array_equal(a.logdensity, c.logdensity)
    d = fisherwalk.walk(walker, jax.random.key(2), draws=230, progress=False)
    assert not np.array_equal(a.flat, d.flat)


def test_thinning_keeps_every_kth_state(walker):
    full = fisherwalk.walk(walker, jax.random.key(4), draws=120, progress=False)
    thin = fisherwalk.walk(walker, jax.random.key(4), draws=40, thin=3, progress=False)
    # Step keys depend only on the global step index, so thinning picks states 3, 6, 9, ...
    assert np.array_equal(thin.flat, full.flat[:, 2::3])
    np.testing.assert_allclose(thin.accepted, full.accepted.reshape(4, 40, 3).mean(axis=2))
    assert thin.flat.shape == (4, 40, 3)


def test_walk_compiles_once():
    # Count how often JAX traces the log density: a second walk with a new key, and a walk
    # after refine() (same engine, same chunk), must not trace it again.
    counter = []
    w = fisherwalk.start(_model(counter), jnp.ones(3), jax.random.key(0), chains=4)
    w = fisherwalk.refine(w, jax.random.key(1), progress=False)
    after_refine = len(counter)
    fisherwalk.walk(w, jax.random.key(2), draws=200, progress=False)
    fisherwalk.walk(w, jax.random.key(3), draws=300, progress=False)
    assert len(counter) == after_refine


def test_trace_continues_from_its_last_state(walker):
    one = fisherwalk.walk(walker, jax.random.key(5), draws=50, progress=False)
    last = one.flat[:, -1]
    np.testing.assert_array_equal(np.asarray(one.walker.flat_positions()), last)


def test_nan_region_never_reaches_the_draws():
    # Standard normal in 2-D, but the model returns NaN for x0 > 1 (a numerical fault in
    # a corner of parameter space). No NaN may be accepted; every fault is counted.
    def logdensity(x):
        value = -0.5 * jnp.sum(x**2)
        return jnp.where(x[0] > 1.0, jnp.nan, value)

    walker = fisherwalk.start(logdensity, jnp.zeros(2), jax.random.key(0), chains=4)
    trace = fisherwalk.walk(walker, jax.random.key(1), draws=2000, progress=False)
    assert np.isfinite(trace.flat).all()
    assert (trace.flat[:, :, 0] <= 1.0).all()
    assert trace.faults.sum() > 0
    summary = trace.summary()
    assert any("NaN" in w or "fault" in w.lower() for w in summary.warnings)


def test_bad_arguments(walker):
    with pytest.raises(fisherwalk.InputError, match="draws"):
        fisherwalk.walk(walker, jax.random.key(0), draws=0)
    with pytest.raises(fisherwalk.InputError, match="thin"):
        fisherwalk.walk(walker, jax.random.key(0), draws=10, thin=1.5)
    with pytest.raises(fisherwalk.InputError, match="random key"):
        fisherwalk.walk(walker, "seed", draws=10)
    logdensity = np.array(walker.state.logdensity)
    logdensity[2] = np.nan
    broken = walker._replace(state=walker.state._replace(logdensity=logdensity))
    with pytest.raises(fisherwalk.SamplingError, match="chain 2"):
        fisherwalk.walk(broken, jax.random.key(0), draws=10)


def _student_t(nu=6.0):
    """Student-t in 3-D: its Laplace approximation is too narrow by (nu + 3) / (nu - 2) in
    variance (standard results for the multivariate t, e.g. Kotz & Nadarajah 2004,
    Multivariate t Distributions, ch. 1), so the chains accept more often than the
    Gaussian picture predicts."""
    prec = jnp.linalg.inv(jnp.asarray([[1.0, 0.3, 0.0], [0.3, 2.0, 0.5], [0.0, 0.5, 0.5]]))
    return lambda x: -0.5 * (nu + 3) * jnp.log1p(x @ prec @ x / nu)


@pytest.mark.parametrize("model, warns", [(_model(), False), (_student_t(), True)])
def test_summary_warnings_agree_with_the_header_after_the_scale_moved(model, warns):
    # As after an adapting warm-up: the scale moved (here x 1.5) while the target stays
    # the acceptance aimed for. The header shows that target at the scale used, and the
    # Gaussian picture's prediction at that scale, and the predicted jump at that scale.
    # On an exact Gaussian the chains accept as predicted at the scale used: no warning.
    # On the Student-t they accept more often than both numbers: the warning must cite
    # the header's target and scale (issue 12).
    from types import SimpleNamespace

    from fisherwalk.theory.randomwalk import expected_acceptance, expected_jump

    walker = fisherwalk.start(model, jnp.ones(3), jax.random.key(0), chains=4)
    tuning = walker.tuning
    aimed = SimpleNamespace(target_acceptance=tuning.target_acceptance,  # a warm-up's aim
                            tuned_start=tuning.scale, steps=0)
    moved = walker._replace(tuning=tuning._replace(scale=tuning.scale * 1.5),
                            report=walker.report._replace(warmup=aimed))
    trace = fisherwalk.walk(moved, jax.random.key(6), draws=2000, progress=False)
    summary = trace.summary()
    header = str(summary).split("parameter")[0]
    scale = f"{tuning.scale * 1.5:.4g}"
    gaussian = float(expected_acceptance(tuning.scale * 1.5, 3))
    # one figure per line: the scale, the target (the warm-up's aim), the prediction
    assert f"\n  scale       {scale}\n" in header
    assert f"\n  target      {tuning.target_acceptance:.3f} (the warm-up's aim" in header
    assert f"\n  predicted   {gaussian:.3f} (the Gaussian picture at scale {scale})" in header
    assert summary.predicted_jump == pytest.approx(float(expected_jump(tuning.scale * 1.5, 3)))
    assert f"predicted {summary.predicted_jump:.3g}" in header
    assert f"realised {summary.acceptance_pooled:.3f}" in header
    warned = [w for w in summary.warnings if "realised acceptance" in w]
    low, high = summary.acceptance_band
    tolerance = 4 * summary.acceptance_mcse + 0.005
    outside = not (low <= summary.acceptance_pooled + tolerance
                   and summary.acceptance_pooled - tolerance <= high)
    # the warning fires exactly when the departure is beyond the Monte Carlo error from
    # both numbers and outside the band the header shows as tolerated
    departs = (abs(summary.acceptance_pooled - tuning.target_acceptance) > tolerance
               and abs(summary.acceptance_pooled - gaussian) > tolerance)
    assert len(warned) == (departs and outside)
    assert departs == warns  # the Student-t chains accept differently from both numbers
    target = f"target {tuning.target_acceptance:.3f} at scale {scale}"
    if warned:
        assert target in warned[0] and f"{gaussian:.3f} that the Gaussian picture" in warned[0]
        assert f"acceptance {summary.acceptance_pooled:.3f} " in warned[0]
    if not warns:  # the Gaussian chains do accept as the Gaussian picture says at that scale
        assert abs(summary.acceptance_pooled - gaussian) < 4 * summary.acceptance_mcse + 0.005


def test_summary_of_a_thinned_trace_says_how_its_realised_jump_was_found(walker):
    trace = fisherwalk.walk(walker, jax.random.key(7), draws=40, thin=3, progress=False)
    summary = trace.summary(interval=0.8)
    assert summary.realised_jump is not None and summary.realised_jump > 0
    assert "converted from draws kept every 3" in str(summary)
    assert "10%" in str(summary) and "90%" in str(summary)
    assert summary.seconds == trace.seconds and summary.ess_bulk_per_second is not None


def _ridge(corr=-0.99):
    cov = jnp.asarray([[1.0, corr * 0.5, 0.0], [corr * 0.5, 0.25, 0.0], [0.0, 0.0, 1.0]])
    prec = jnp.linalg.inv(cov)
    return lambda x: -0.5 * x @ prec @ x


@pytest.mark.slow
@pytest.mark.parametrize("shape, fires", [("diagonal", True), ("fisher", False)])
def test_correlation_warning_fires_under_a_diagonal_proposal_only(shape, fires):
    # posterior correlation -0.99 between the first two coordinates (issue 14's case);
    # the chains start from the exact Gaussian, so the draws' correlation is near -0.99
    # even when they mix slowly
    w = fisherwalk.start(_ridge(), jnp.zeros(3), jax.random.key(0), chains=4, shape=shape)
    trace = fisherwalk.walk(w, jax.random.key(1), draws=1000, progress=False)
    warned = [x for x in trace.summary().warnings if "correlated beyond" in x]
    assert bool(warned) == fires
    if fires:
        first, second = trace.names[:2]
        found = re.search(re.escape(f"{first} and {second} (posterior ") + r"(-0\.\d+)",
                          warned[0])
        assert float(found.group(1)) < -0.95
        assert trace.names[2] not in warned[0].split("What to do")[0]
