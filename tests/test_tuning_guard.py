"""Tuning records are validated as start() validates its inputs (issue 13, item 6).

The trial saved a walker, edited its record and loaded it: an asymmetric or
negative-definite Fisher information, a negative scale and a target acceptance of 7.5
were all accepted, and resume() used them unchecked.
"""

import json

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk as fw
from fisherwalk.errors import CheckpointError, InputError
from fisherwalk.persistence.tuningfile import save_tuning, tuning_record


def logdensity(x):
    return -0.5 * jnp.sum(x**2 * jnp.array([1.0, 4.0, 9.0]))


@pytest.fixture(scope="module")
def walker():
    return fw.start(logdensity, jnp.zeros(3), jax.random.key(0), chains=2)


def _asymmetric(record):
    record["laplace"]["fisher"][0][1] += 0.5


def _negative_definite(record):
    record["laplace"]["fisher"] = (-np.asarray(record["laplace"]["fisher"])).tolist()


def _negative_scale(record):
    record["tuning"]["scale"] = -record["tuning"]["scale"]


def _acceptance(record):
    record["tuning"]["target_acceptance"] = 7.5


def _huge_dim(record):
    record["dim"] = 10**9


def _deep(record):
    nested = "deep"
    for _ in range(100):  # deeper than the 64 levels read_json allows
        nested = [nested]
    record["notes"] = nested


CASES = [
    (_asymmetric, "not symmetric"),
    (_negative_definite, "not positive definite"),
    (_negative_scale, "tuning.scale"),
    (_acceptance, "tuning.target_acceptance"),
    (_huge_dim, "dim"),
    (_deep, "deeper than"),
]


@pytest.mark.parametrize("edit, message", CASES)
def test_edited_tuning_file_is_refused(walker, tmp_path, edit, message):
    save_tuning(walker, tmp_path / "walker.json")
    record = json.loads((tmp_path / "walker.json").read_text())
    edit(record)
    (tmp_path / "walker.json").write_text(json.dumps(record))
    with pytest.raises(InputError, match=message):
        fw.load_tuning(tmp_path / "walker.json")


@pytest.mark.parametrize("edit, message", CASES[:4])
def test_resume_checks_the_stored_record(walker, tmp_path, edit, message):
    directory = tmp_path / "run.ckpt"
    fw.walk(walker, jax.random.key(1), 40, chunk=20, checkpoint=directory, progress=False)
    content = json.loads((directory / "run.json").read_text())
    edit(content["record"])
    (directory / "run.json").write_text(json.dumps(content))
    with pytest.raises(CheckpointError, match=message):
        fw.resume(directory, logdensity)


def test_record_round_trip_is_unchanged(walker, tmp_path):
    save_tuning(walker, tmp_path / "walker.json")
    saved = fw.load_tuning(tmp_path / "walker.json")
    assert np.array_equal(saved.tuning.shape, walker.tuning.shape)
    assert saved.tuning.scale == walker.tuning.scale
    assert saved.record == json.loads(json.dumps(tuning_record(walker)))
