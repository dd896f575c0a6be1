"""A gradient sampler's whitened state in a checkpoint is digested (issue 21, item 4).

The probe: state.json's whitened.position, whitened.logdensity and
whitened.logdensity_grad, and run.json's start.whitened.* were neither digested nor
checked, and edited they resumed to other draws. Each edit is now refused with a
CheckpointError naming the field; an unedited checkpoint resumes bit for bit.
"""

from __future__ import annotations

import json

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.errors import CheckpointError

DRAWS, CHUNK = 40, 10


def _logdensity(x):
    return -0.5 * (x[0] ** 2 + 4.0 * x[1] ** 2)


@pytest.fixture(scope="module")
def checkpoint(tmp_path_factory):
    walker = fisherwalk.start(_logdensity, jnp.zeros(2), jax.random.key(0), chains=2,
                              sampler="mala", progress=False)
    path = tmp_path_factory.mktemp("whitened") / "run.ckpt"
    trace = fisherwalk.walk(walker, jax.random.key(1), DRAWS, chunk=CHUNK, checkpoint=path,
                            checkpoint_every=0, progress=False)
    return path, trace


def _copy(path, target):
    target.mkdir()
    for p in path.iterdir():
        (target / p.name).write_bytes(p.read_bytes())
    return target


def _edit(file, keys):
    content = json.loads(file.read_text())
    node = content
    for key in keys:
        node = node[key]
    node["values"][0] = node["values"][0] + 0.25
    file.write_text(json.dumps(content))


@pytest.mark.slow
def test_unedited_gradient_checkpoint_resumes_bit_for_bit(checkpoint, tmp_path):
    path, trace = checkpoint
    resumed = fisherwalk.resume(_copy(path, tmp_path / "c"), _logdensity, progress=False)
    assert np.array_equal(resumed.flat, trace.flat)


@pytest.mark.parametrize("field", ["position", "logdensity", "logdensity_grad"])
def test_edited_whitened_state_is_refused_naming_the_field(checkpoint, tmp_path, field):
    copy = _copy(checkpoint[0], tmp_path / "c")
    _edit(copy / "state.json", ["whitened", field])
    with pytest.raises(CheckpointError, match=f"'whitened.{field}'"):
        fisherwalk.resume(copy, _logdensity, progress=False)


@pytest.mark.parametrize("field", ["position", "logdensity", "logdensity_grad"])
def test_edited_whitened_start_is_refused_naming_the_field(checkpoint, tmp_path, field):
    copy = _copy(checkpoint[0], tmp_path / "c")
    _edit(copy / "run.json", ["start", "whitened", field])
    with pytest.raises(CheckpointError, match=f"'start.whitened.{field}'"):
        fisherwalk.resume(copy, _logdensity, progress=False)
