"""The figures: written as PNG files, and drawing the numbers they claim to draw."""

import struct
import subprocess
import sys

import jax
import jax.numpy as jnp
import numpy as np
import pytest

pytest.importorskip("matplotlib")

import fisherwalk  # noqa: E402
from fisherwalk.errors import InputError  # noqa: E402
from fisherwalk.results import diagnostics, plots  # noqa: E402
from fisherwalk.theory import randomwalk as scaling  # noqa: E402

# A correlated 3-d Gaussian: small enough to compile and run in seconds.
_COV = np.array([[1.0, 0.6, 0.0], [0.6, 2.0, -0.3], [0.0, -0.3, 0.5]])
_PRECISION = np.linalg.inv(_COV)


def _logdensity(position):
    x = position["x"] - 1.0
    return -0.5 * x @ jnp.asarray(_PRECISION) @ x


@pytest.fixture(scope="module")
def trace():
    keys = jax.random.split(jax.random.key(11), 3)
    walker = fisherwalk.start(_logdensity, {"x": jnp.zeros(3)}, keys[0], chains=2)
    walker = fisherwalk.refine(walker, keys[1], 200, progress=False)
    return fisherwalk.walk(walker, keys[2], 150, progress=False)


def _png_size(path) -> tuple[int, int]:
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n", f"{path} is not a PNG file"
    width, height = struct.unpack(">II", data[16:24])  # the IHDR chunk comes first
    return width, height


@pytest.mark.slow
def test_save_all_writes_four_pngs(trace, tmp_path):
    paths = plots.save_all(trace, tmp_path / "figures", labels=["a", "b", "c"])
    assert [p.name for p in paths] == list(plots.FILE_NAMES.values())
    for path in paths:
        assert path.stat().st_size > 10_000
        width, height = _png_size(path)
        assert width >= 300 and height >= 300


def test_traces_draw_every_chain_of_every_parameter(trace):
    fig = plots.plot_traces(trace, labels=["first", "second", "third"])
    axes = [ax for ax in fig.axes if ax.get_visible()]
    assert len(axes) == 3
    assert axes[1].get_title() == "x[1]  (second)"
    for i, ax in enumerate(axes):
        for c in range(2):
            np.testing.assert_array_equal(ax.lines[c].get_ydata(), trace.flat[c, :, i])
        mode_line = ax.lines[2]  # dashed line at the Laplace mode
        assert mode_line.get_ydata()[0] == pytest.approx(
            float(trace.walker.report.laplace.mode_flat[i]))
    assert "2 chains x 150 draws" in fig.get_suptitle()


def test_marginals_compare_with_the_laplace_gaussian(trace):
    fig = plots.plot_marginals(trace)
    fit = trace.walker.report.laplace
    sd = np.sqrt(np.diag(np.linalg.inv(np.asarray(fit.fisher))))
    for i, ax in enumerate(fig.axes[:3]):
        laplace_line = ax.lines[-1]
        x, y = laplace_line.get_xdata(), laplace_line.get_ydata()
        # the dashed curve is the N(mode_i, (H⁻¹)_ii) density: its peak height is
        # 1/(sd sqrt(2 pi)) and its area over mode ± 4 sd or more is ~1
        assert y.max() == pytest.approx(1.0 / (sd[i] * np.sqrt(2 * np.pi)), rel=1e-3)
        assert np.trapezoid(y, x) == pytest.approx(1.0, abs=1e-3)
        # this target is Gaussian, so H⁻¹ is its covariance
        assert sd[i] == pytest.approx(np.sqrt(_COV[i, i]), rel=1e-6)


def test_tuning_curves_are_the_theory(trace):
    fig = plots.plot_tuning(trace)
    ax_acc, ax_jump = fig.axes[:2]
    curve = ax_acc.lines[0]
    grid = np.asarray(curve.get_xdata())
    expected = scaling.acceptance_curve(grid, 3).acceptance
    np.testing.assert_allclose(curve.get_ydata(), expected, rtol=1e-12)
    np.testing.assert_allclose(ax_jump.lines[0].get_ydata(),
                               scaling.acceptance_curve(grid, 3).jump_distance, rtol=1e-12)
    texts = [t.get_text() for t in ax_acc.get_legend().get_texts()]
    refined = trace.walker.tuning.scale
    realised = float(np.mean(trace.accepted))
    assert f"after warm-up: l = {refined:.3f}" in texts
    assert f"realised acceptance {realised:.3f}" in texts
    assert "d = 3" in fig.get_suptitle()


def test_autocorrelation_bars_are_the_diagnostic(trace):
    fig = plots.plot_autocorrelation(trace, max_lag=30)
    expected = diagnostics.autocorrelation(trace.flat, 30)
    for i, ax in enumerate(fig.axes[:3]):
        bars = ax.collections[-1]  # vlines: one segment per lag, from 0 to the value
        heights = np.array([segment[1, 1] for segment in bars.get_segments()])
        np.testing.assert_allclose(heights, expected[i], rtol=1e-12)


def test_long_chains_are_drawn_thinned_and_say_so(trace):
    fig = plots.plot_traces(trace, max_points=50)
    line = fig.axes[0].lines[1]
    np.testing.assert_array_equal(line.get_xdata(), np.arange(0, 150, 3))
    np.testing.assert_array_equal(line.get_ydata(), trace.flat[1, ::3, 0])
    assert "1 draw in 3 shown" in fig.get_suptitle()


def test_panel_cap_is_stated_in_the_title(trace):
    fig = plots.plot_traces(trace, max_panels=2)
    assert len([ax for ax in fig.axes if ax.get_visible()]) == 2
    assert "2 of 3 parameters: worst R-hat, lowest ESS" in fig.get_suptitle()


def test_focus_chooses_the_panels(trace):
    fig = plots.plot_marginals(trace, focus=["x[2]", "x[0]"])
    titles = [ax.get_title() for ax in fig.axes if ax.get_visible()]
    assert titles == ["x[0]", "x[2]"]  # in the run's order, not the order asked
    with pytest.raises(InputError, match="matches no parameter"):
        plots.plot_traces(trace, focus="sigma")


def test_without_focus_the_worst_mixing_parameters_are_drawn(trace):
    # 40 parameters: 39 copies of well-mixed chains and one (w[23]) whose chains sit apart
    # (R-hat far above 1.01) plus one spread-like name (tau): with 4 panels, both appear.
    from fisherwalk.results.facts import RunFacts

    rng = np.random.default_rng(5)
    flat = rng.normal(size=(2, 150, 40))
    flat[1, :, 23] += 3.0
    names = tuple(f"w[{i}]" for i in range(39)) + ("tau",)
    facts = trace.facts._replace(names=names, order=tuple(range(40)), mode=np.zeros(40),
                                 fisher_cholesky=np.eye(40))
    assert isinstance(facts, RunFacts)
    wide = trace._replace(flat=flat, facts=facts)
    chosen, note = plots.panels(wide, None, 4)
    assert 23 in chosen and 39 in chosen and len(chosen) == 4
    assert "worst R-hat" in note


def test_wrong_number_of_labels_is_refused(trace):
    with pytest.raises(InputError, match="2 labels were given for 3 parameters"):
        plots.plot_marginals(trace, labels=["a", "b"])


def test_the_core_never_imports_matplotlib():
    code = ("import sys, fisherwalk; "
            "print('matplotlib' in sys.modules, 'fisherwalk.plots' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.split() == ["False", "False"]


def test_tuning_figure_of_a_walker_that_never_warmed_up_says_so(trace):
    walker = fisherwalk.start(_logdensity, {"x": jnp.zeros(3)}, jax.random.key(3), chains=2)
    cold = fisherwalk.walk(walker, jax.random.key(4), 120, progress=False)
    fig = plots.plot_tuning(cold)
    texts = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert not any("after warm-up" in t for t in texts)
    assert f"chosen by start(), no warm-up: l = {walker.tuning.scale:.3f}" in texts
    traces = plots.plot_traces(cold)
    assert traces.axes[0].get_xlabel() == "step (no warm-up)"
