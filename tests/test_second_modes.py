"""Second modes: the default start() looks for them, spreads the chains over them, and the
summary names them and flags every row whose chains did not cross between them."""

from __future__ import annotations

import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk as fw
from fisherwalk.fit.modes import label_switching, laplace_masses


def _two_modes_each(x):
    # Product over coordinates of 0.5 N(x | 5, 1) + 0.5 N(x | -5, 1): four modes at (±5, ±5).
    return jnp.sum(jnp.logaddexp(-0.5 * (x - 5.0) ** 2, -0.5 * (x + 5.0) ** 2))


@pytest.mark.slow
def test_default_pipeline_on_a_two_mode_product_names_the_modes_and_flags_every_row():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        walker = fw.start(_two_modes_each, jnp.array([0.7, -0.4]), jax.random.key(0))
        fit = walker.report.laplace
        assert len(fit.modes_flat) >= 2
        # every mode found is one of the four true ones (±5 within the fit's tolerance)
        for point in fit.modes_flat:
            assert np.allclose(np.abs(point), 5.0, atol=1e-3)
        walker = fw.refine(walker, jax.random.key(1))
        trace = fw.walk(walker, jax.random.key(2))  # the default: planned length
    summary = trace.summary()
    named = [w for w in summary.warnings if "distinct modes" in w]
    assert named, summary.warnings
    for point in fit.modes_flat:  # the warning names every mode found, with its numbers
        assert f"x[0] {point[0]:.3g}, x[1] {point[1]:.3g}" in named[0]
    assert "Laplace mass" in named[0] and "log density" in named[0]
    # No row without a caveat while its chains have seen only one of its modes.
    for j, name in enumerate(summary.names):
        values = trace.flat[:, :, j]
        every_chain_both_sides = all((c > 0).mean() > 0.01 and (c < 0).mean() > 0.01
                                     for c in values)
        row = next(line for line in str(summary).splitlines() if line.strip().startswith(name))
        if not every_chain_both_sides:
            assert "R-hat" in row or "modes" in row, row
    assert named[0] in summary.to_dict()["warnings"]  # and so in record.json


def test_chains_start_spread_across_the_modes():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        walker = fw.start(_two_modes_each, jnp.array([0.7, -0.4]), jax.random.key(0))
    modes = np.asarray(walker.report.laplace.modes_flat)
    nearest = {int(np.argmin(np.sum((modes - p) ** 2, axis=1)))
               for p in walker.flat_positions()}
    assert len(nearest) == min(len(modes), walker.chains)


def test_scouts_can_be_switched_off():
    walker = fw.start(_two_modes_each, jnp.array([0.7, -0.4]), jax.random.key(0), scouts=0)
    assert len(walker.report.laplace.modes_flat) == 1


def _switching(x):
    # Two exchangeable components: modes at (2, -2) and (-2, 2), equal height.
    a = -2.0 * jnp.sum((x - jnp.array([2.0, -2.0])) ** 2)
    b = -2.0 * jnp.sum((x - jnp.array([-2.0, 2.0])) ** 2)
    return jnp.logaddexp(a, b)


def test_a_label_switching_pair_is_reported_as_such():
    with pytest.warns(fw.FisherwalkWarning, match="label-switching pair"):
        walker = fw.start(_switching, jnp.array([0.5, 0.1]), jax.random.key(3))
    assert any("x[0] <-> x[1]" in note for note in walker.report.notes)


def test_label_switching_needs_equal_heights_and_permuted_values():
    names = ("a", "b", "c")
    points = [np.array([1.0, 2.0, 3.0]), np.array([2.0, 1.0, 3.0]), np.array([5.0, 1.0, 3.0])]
    assert label_switching(points, [0.0, 0.0, 0.0], names) == [(0, 1, "a <-> b")]
    assert label_switching(points, [0.0, -1.0, 0.0], names) == []


def test_laplace_masses_of_gaussian_modes_are_their_weights():
    # Two Gaussian bumps w_k N(m_k, s_k²): height log(w_k / s_k) + const, Fisher 1/s_k²; the
    # Laplace integral exp(height) * sqrt(2 pi) s_k is exact for a Gaussian, so the masses
    # are the weights (Tierney & Kadane 1986).
    weights, sds = np.array([0.3, 0.7]), np.array([0.5, 2.0])
    heights = np.log(weights / sds)
    fishers = [np.array([[1 / s**2]]) for s in sds]
    assert np.allclose(laplace_masses(heights, fishers), weights)


def test_a_parameter_whose_chains_saw_one_of_its_modes_is_flagged():
    # Modes at (5, 5) and (5, -5); both chains sit at (5, 5): x[1] has seen one of its two
    # values and is flagged; x[0] has one value at the modes and is not.
    from fisherwalk.results.coverage import mode_caveats

    rng = np.random.default_rng(0)
    flat = np.array([5.0, 5.0]) + rng.normal(size=(2, 500, 2))
    points = [np.array([5.0, 5.0]), np.array([5.0, -5.0])]
    text, flags = mode_caveats(flat, ("x[0]", "x[1]"), points, [0.0, 0.0], [np.eye(2)] * 2)
    assert flags == ("", "modes")
    assert "No chain crossed between the modes of x[1]" in text
    # chains that visit both values of x[1] lift the flag
    flat[1, 250:, 1] -= 10.0
    flat[0, :250, 1] -= 10.0
    _, flags = mode_caveats(flat, ("x[0]", "x[1]"), points, [0.0, 0.0], [np.eye(2)] * 2)
    assert flags == ("", "")
