"""The one JSON convention (fisherwalk.base.jsonio): non-finite numbers as "NaN",
"Infinity", "-Infinity" in float fields; limits checked before parsing and allocating."""

import json
import math
import tracemalloc
from pathlib import Path
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from fisherwalk.base.checks import whole_number
from fisherwalk.base.jsonio import (
    decode_array,
    decode_number,
    dumps,
    encode_array,
    loads,
    read_json,
    to_plain,
    write_json_atomic,
)
from fisherwalk.errors import CheckpointError, InputError


def _strict(text):
    """Parse with the standard library, refusing the bare tokens RFC 8259 lacks."""
    def refuse(token):
        raise AssertionError(f"bare {token} in the output")
    return json.loads(text, parse_constant=refuse)


class Point(NamedTuple):
    x: float
    names: tuple


# ------------------------------------------------------------------------- writing


def test_to_plain_writes_non_finite_numbers_as_tagged_strings():
    content = {"nan": math.nan, "inf": np.float32(np.inf), "minus": -math.inf, "ok": 0.1,
               "array": np.array([[1.0, np.nan], [np.inf, -np.inf]]), "count": np.int64(3),
               "flag": np.bool_(True), "none": None, 7: "int key", "path": Path("a/b"),
               "point": Point(math.nan, ("NaN", "x")), "jax": jnp.asarray([0.5, jnp.inf])}
    text = dumps(content)
    assert text.isascii()
    back = _strict(text)
    assert back["nan"] == "NaN" and back["inf"] == "Infinity" and back["minus"] == "-Infinity"
    assert back["array"] == [[1.0, "NaN"], ["Infinity", "-Infinity"]]
    assert back["count"] == 3 and back["flag"] is True and back["none"] is None
    assert back["7"] == "int key" and back["path"] == "a/b"
    assert back["point"] == {"x": "NaN", "names": ["NaN", "x"]}
    assert back["jax"] == [0.5, "Infinity"]


def test_finite_content_gives_the_standard_librarys_text():
    content = {"b": [1.5, 2], "a": {"c": "x"}}
    assert dumps(content) == json.dumps(content, separators=(",", ":"))
    # the text checkpoint fingerprints are hashed from (so fingerprints stay the same)
    assert dumps(content, sort_keys=True) == json.dumps(content, sort_keys=True,
                                                        allow_nan=False, separators=(",", ":"))
    assert dumps(content, indent=1, sort_keys=True) == json.dumps(content, indent=1,
                                                                   sort_keys=True)


@pytest.mark.parametrize("value", [1 + 2j, object(), {(1, 2): 3}, {True: 1},
                                   jax.random.key(0), np.array(["a"])])
def test_to_plain_refuses_what_json_cannot_hold(value):
    with pytest.raises(InputError, match="cannot be"):
        to_plain(value)


# ------------------------------------------------------------------------- round trips


@pytest.mark.parametrize("dtype", ["float64", "float32"])
def test_sized_arrays_round_trip_bit_for_bit(dtype):
    rng = np.random.default_rng(1)
    values = (rng.standard_normal((3, 4)) * 10.0 ** rng.integers(-300, 30, (3, 4))
              ).astype(dtype)
    values[0, 1], values[1, 2], values[2, 3] = np.nan, np.inf, -np.inf
    text = dumps(encode_array(values))
    back = decode_array(_strict(text), "position", "state.json", max_size=100,
                        shape=(3, 4), dtype=dtype)
    assert back.dtype == np.dtype(dtype)
    finite = np.isfinite(values)
    assert back[finite].tobytes() == values[finite].tobytes()
    assert np.isnan(back[0, 1]) and back[1, 2] == np.inf and back[2, 3] == -np.inf


def test_nested_lists_round_trip_through_a_file(tmp_path):
    fisher = np.array([[2.0, 0.1], [0.1, np.inf]])
    path = write_json_atomic(tmp_path / "tuning.json", {"fisher": fisher, "scale": -math.inf})
    content = read_json(path, max_bytes=10_000)
    assert np.array_equal(decode_array(content["fisher"], "fisher", "w", max_size=4,
                                       shape=(2, 2)), fisher)
    assert decode_number(content["scale"], "scale", "w") == -math.inf
    with pytest.raises(InputError, match="not a finite number"):
        decode_number(content["scale"], "scale", "w", finite=True)
    with pytest.raises(InputError, match="'fisher' is 'Infinity', not a finite number"):
        decode_array(content["fisher"], "fisher", "w", max_size=4, shape=(2, 2), finite=True)


# ------------------------------------------------------------------------- hostile files


def test_deep_nesting_is_refused_without_recursion(tmp_path):
    path = tmp_path / "run.json"
    path.write_text("[" * 100_000 + "]" * 100_000)
    with pytest.raises(CheckpointError, match="deeper than 64 levels"):
        read_json(path, max_bytes=10**6, error=CheckpointError)
    path.write_text('{"a":' * 100_000 + "1" + "}" * 100_000)
    with pytest.raises(CheckpointError, match="deeper than 64 levels"):
        read_json(path, max_bytes=10**6, error=CheckpointError)


def test_brackets_inside_strings_do_not_count_towards_the_depth():
    text = json.dumps({"names": ["beta[" * 500, 'quote \\" [[[[', "]]]]"]})
    assert loads(text, max_depth=2)["names"][0] == "beta[" * 500
    with pytest.raises(InputError, match="deeper than 1 levels"):
        loads(text, max_depth=1)


def test_too_big_a_file_is_refused_before_reading(tmp_path):
    path = tmp_path / "state.json"
    with open(path, "wb") as handle:
        handle.truncate(2**30)  # sparse: 1 GiB claimed, nothing stored
    tracemalloc.start()
    try:
        with pytest.raises(CheckpointError, match="more than the 65536 allowed"):
            read_json(path, max_bytes=65536, error=CheckpointError)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 2**20


@pytest.mark.parametrize("text, reason", [
    ('{"x": NaN}', "bare token NaN"), ('{"x": -Infinity}', "bare token -Infinity"),
    ('{"a": 1, "a": 2}', "appears twice"), ('{"a": 1', "not valid JSON"),
    ('{"a": ' + "9" * 5000 + "}", "not valid JSON"), ("", "not valid JSON"),
])
def test_malformed_json_raises_the_callers_error(tmp_path, text, reason):
    path = tmp_path / "state.json"
    path.write_text(text)
    with pytest.raises(CheckpointError, match=reason) as info:
        read_json(path, max_bytes=10**5, error=CheckpointError)
    assert str(path) in str(info.value)


def test_invalid_utf8_is_refused(tmp_path):
    path = tmp_path / "run.json"
    path.write_bytes(b'{"a": "\xff"}')
    with pytest.raises(CheckpointError, match="not UTF-8"):
        read_json(path, max_bytes=100, error=CheckpointError)


def _sized(dtype="float64", shape=(2,), values=(1.0, 2.0)):
    return {"dtype": dtype, "shape": list(shape), "values": list(values)}


@pytest.mark.parametrize("content, reason", [
    (_sized(dtype="object"), "dtype 'object'"),
    (_sized(dtype="float128"), "dtype 'float128'"),
    (_sized(dtype="<f8"), "dtype '<f8'"),
    (_sized(dtype=["f8"]), "dtype"),
    (_sized(shape=[1e12]), "not a whole number"),
    (_sized(shape=[-2]), "out of range"),
    (_sized(shape=[True, 2]), "not a whole number"),
    (_sized(shape=[10**6, 10**6], values=()), "declares 1000000000000 values"),
    (_sized(shape=[3]), "must list 3 values"),
    (_sized(values=[1.0, True]), "True"),
    (_sized(values=[1.0, "nan"]), "'nan'"),
    (_sized(values=[1.0, None]), "None"),
    (_sized(values=[1.0, 10**400]), "not a number"),
    (_sized(dtype="float32", values=[1.0, 1e300]), "too large for float32"),
    ({"dtype": "float64", "shape": [2]}, "exactly 'dtype', 'shape' and 'values'"),
    ([1.0, 2.0, 3.0], "shape"),
    ("NaN", "must be an object"),
])
def test_malformed_arrays_raise_the_callers_error(content, reason):
    expected_shape = (2,) if isinstance(content, list) else None
    with pytest.raises(CheckpointError, match=reason):
        decode_array(content, "position", "state.json", max_size=10**6,
                     shape=expected_shape, error=CheckpointError)


def test_a_declared_size_is_refused_before_anything_is_allocated():
    content = _sized(shape=[10**6, 10**6], values=())
    tracemalloc.start()
    try:
        with pytest.raises(CheckpointError, match="declares"):
            decode_array(content, "draws", "state.json", max_size=10**7,
                         error=CheckpointError)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 2**20


def test_expected_shape_and_dtype_are_enforced():
    with pytest.raises(InputError, match=r"shape \(2,\); expected \(3,\)"):
        decode_array(_sized(), "mode", "w", max_size=10, shape=(3,))
    with pytest.raises(InputError, match="expected float32"):
        decode_array(_sized(), "mode", "w", max_size=10, dtype="float32")
    with pytest.raises(InputError, match=r"nested lists of shape \(2, 2\)"):
        decode_array([[1.0, 2.0], [3.0]], "fisher", "w", max_size=10, shape=(2, 2))


def test_a_count_written_as_a_float_is_refused():
    content = loads('{"draws": 1e12}')
    with pytest.raises(CheckpointError, match="not a whole number"):
        whole_number(content["draws"], "draws", "run.json", error=CheckpointError)
