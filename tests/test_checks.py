"""The one validator of each kind (fisherwalk.base.checks)."""

import math

import jax.numpy as jnp
import numpy as np
import pytest
from scipy.stats import ortho_group

from fisherwalk.base.checks import (
    DEFINITENESS_RTOL,
    SYMMETRY_RTOL,
    finite_array,
    parse_whole_number,
    positive_number,
    probability,
    spd_matrix,
    whole_number,
)
from fisherwalk.errors import CheckpointError, InputError

# ------------------------------------------------------------------------- whole numbers


@pytest.mark.parametrize("value, expected", [
    (1, 1), (7, 7), (2**40, 2**40), (np.int64(3), 3), (np.int32(9), 9), (np.uint8(2), 2),
    (np.array(4), 4), (jnp.asarray(6), 6),
])
def test_whole_number_accepts_integers(value, expected):
    out = whole_number(value, "draws", "walk(draws=...)")
    assert out == expected and type(out) is int


@pytest.mark.parametrize("value", [
    True, False, np.bool_(True), 1.0, 2.5, np.float64(3.0), np.float32(2.0), "3", None,
    [1], np.array([2]), math.nan, 1e12, jnp.asarray(2.0), 3 + 0j,
])
def test_whole_number_refuses_other_types(value):
    with pytest.raises(InputError, match="draws=.* is not a whole number") as info:
        whole_number(value, "draws", "walk(draws=...)")
    message = str(info.value)
    assert "where: walk(draws=...)" in message and "pass draws as a whole number" in message


@pytest.mark.parametrize("value, minimum, maximum", [
    (0, 1, None), (-1, 1, None), (-1, 0, None), (11, 1, 10), (np.int64(2**33), 0, 2**32 - 1),
])
def test_whole_number_refuses_out_of_range(value, minimum, maximum):
    with pytest.raises(InputError, match="out of range"):
        whole_number(value, "chains", "start(chains=...)", minimum=minimum, maximum=maximum)


def test_whole_number_bounds_are_inclusive_and_error_class_and_advice_are_the_callers():
    assert whole_number(0, "restarts", "laplace()", minimum=0) == 0
    assert whole_number(10, "n", "w", maximum=10) == 10
    with pytest.raises(CheckpointError, match="use 4 chains"):
        whole_number(-3, "chains", "run.json", error=CheckpointError, todo="use 4 chains.")


@pytest.mark.parametrize("text, expected", [("12", 12), (" 7 ", 7), ("+3", 3), ("0007", 7)])
def test_parse_whole_number_reads_plain_digits(text, expected):
    assert parse_whole_number(text, "--seed", "command line") == expected


@pytest.mark.parametrize("text", ["1e23", "1.0", "1_000", "0x10", "10**3", "", "seven",
                                  "9" * 31, "-2"])
def test_parse_whole_number_refuses_everything_else(text):
    with pytest.raises(InputError, match="--draws"):
        parse_whole_number(text, "--draws", "command line")


def test_parse_whole_number_applies_the_range():
    with pytest.raises(InputError, match="out of range"):
        parse_whole_number("4294967296", "--seed", "command line", minimum=0,
                           maximum=2**32 - 1)


# ------------------------------------------------------------------------- real numbers


@pytest.mark.parametrize("value", [1, 0.5, np.float32(2.0), np.int64(3), jnp.asarray(0.1),
                                   np.array(1e-300)])
def test_positive_number_accepts(value):
    assert positive_number(value, "spread", "laplace()") == pytest.approx(float(value))


@pytest.mark.parametrize("value", [0, -1.0, math.nan, math.inf, True, "1", None, [1.0],
                                   np.array([1.0, 2.0]), 1j])
def test_positive_number_refuses(value):
    with pytest.raises(InputError, match="spread=.* is not a finite number > 0"):
        positive_number(value, "spread", "laplace()")


def test_positive_number_allow_zero():
    assert positive_number(0, "checkpoint_every", "walk()", allow_zero=True) == 0.0
    with pytest.raises(InputError, match=">= 0"):
        positive_number(-0.1, "checkpoint_every", "walk()", allow_zero=True)


@pytest.mark.parametrize("value, ok", [
    (0.234, True), (np.float32(0.25), True), (jnp.asarray(0.5), True), (1e-9, True),
    (0, False), (1, False), (7.5, False), (-0.2, False), (math.nan, False), (True, False),
    ("0.3", False), (None, False),
])
def test_probability_is_the_open_interval(value, ok):
    if ok:
        assert probability(value, "target_acceptance", "tuning file") == pytest.approx(
            float(value))
    else:
        with pytest.raises(InputError, match="strictly between 0 and 1"):
            probability(value, "target_acceptance", "tuning file")


def test_finite_array_checks_shape_and_names_the_first_bad_index():
    assert finite_array([[1, 2], [3, 4]], "positions", "w", shape=(2, 2)).dtype == np.float64
    with pytest.raises(InputError, match=r"shape \(3,\); expected \(2, 2\)"):
        finite_array([1.0, 2.0, 3.0], "positions", "w", shape=(2, 2))
    with pytest.raises(InputError, match=r"2 non-finite values, the first at index \(1, 0\)"):
        finite_array([[1.0, 2.0], [np.nan, np.inf]], "positions", "w")
    with pytest.raises(InputError, match="not an array of real numbers"):
        finite_array(["a", "b"], "positions", "w")


# ------------------------------------------------------------------------- matrices

NAMES = ("a", "b", "c")


def _with_eigenvalues(values, seed=0):
    """Q diag(values) Qᵀ for a fixed random rotation Q (scipy.stats.ortho_group)."""
    q = ortho_group.rvs(len(values), random_state=seed)
    return q @ np.diag(values) @ q.T


def test_spd_matrix_returns_the_symmetrised_matrix():
    m = _with_eigenvalues([1.0, 2.0, 5.0])
    nudged = m.copy()
    nudged[0, 2] += 0.4 * SYMMETRY_RTOL * np.max(np.abs(m))  # rounding-sized asymmetry
    out = spd_matrix(nudged, NAMES, "fisher")
    assert out.dtype == np.float64 and np.array_equal(out, out.T)
    assert np.allclose(out, m, rtol=0, atol=SYMMETRY_RTOL * np.max(np.abs(m)))
    np.linalg.cholesky(out)  # a Cholesky factor exists (numpy's own test)


@pytest.mark.parametrize("matrix, pattern", [
    (np.eye(2), r"shape \(2, 2\); expected \(3, 3\)"),
    (np.ones((3, 2)), r"shape \(3, 2\); expected \(3, 3\)"),
    (np.ones(3), r"shape \(3,\); expected \(3, 3\)"),
])
def test_spd_matrix_refuses_wrong_shapes_and_names_the_order(matrix, pattern):
    with pytest.raises(InputError, match=pattern) as info:
        spd_matrix(matrix, NAMES, "start(fisher=...)", what="Fisher information")
    assert "parameter order: a, b, c" in str(info.value)
    assert "The Fisher information has shape" in str(info.value)


def test_spd_matrix_refuses_non_finite_entries_by_name():
    m = np.eye(3)
    m[1, 2] = np.nan
    with pytest.raises(InputError, match=r"1 non-finite entries, e.g. \(b, c\)"):
        spd_matrix(m, NAMES, "w")


def test_spd_matrix_refuses_asymmetry_above_the_named_tolerance():
    m = _with_eigenvalues([1.0, 2.0, 5.0])
    m[0, 2] += 2 * SYMMETRY_RTOL * np.max(np.abs(m))
    with pytest.raises(InputError, match="not symmetric") as info:
        spd_matrix(m, NAMES, "start(shape=<matrix>)", what="proposal covariance")
    message = str(info.value)
    assert "(a, c)" in message and "(c, a)" in message and "proposal covariance" in message


def test_spd_matrix_refuses_an_indefinite_matrix_naming_the_direction():
    u = np.array([0.0, 0.6, -0.8])  # the offending direction involves b and c only
    m = np.eye(3) * 2.0 - 5.0 * np.outer(u, u)
    with pytest.raises(InputError, match="not positive definite") as info:
        spd_matrix(m, NAMES, "w")
    message = str(info.value)
    assert "b (" in message and "c (" in message and "a (" not in message


@pytest.mark.parametrize("smallest, ok", [
    (1e-6, True), (1e2 * DEFINITENESS_RTOL, True), (1e-2 * DEFINITENESS_RTOL, False),
    (0.0, False), (-1e-3, False),
])
def test_spd_matrix_definiteness_follows_the_eigenvalue_ratio(smallest, ok):
    # The matrix is built from known eigenvalues (largest 1), so the verdict must follow
    # smallest / largest against DEFINITENESS_RTOL, whatever the rotation.
    m = _with_eigenvalues([smallest, 0.5, 1.0], seed=3)
    m = 0.5 * (m + m.T)
    if ok:
        spd_matrix(m, NAMES, "w")
    else:
        with pytest.raises(InputError, match="not positive definite"):
            spd_matrix(m, NAMES, "w")


@pytest.mark.parametrize("matrix", [
    [["1", "0"], ["0", "1"]], np.eye(2) * (1 + 1j), [[1.0, 0.0], [0.0]], None, "eye",
    np.eye(2, dtype=bool),
])
def test_spd_matrix_refuses_non_numbers(matrix):
    with pytest.raises(CheckpointError, match="not an array of real numbers"):
        spd_matrix(matrix, ("x", "y"), "run.json", error=CheckpointError)
