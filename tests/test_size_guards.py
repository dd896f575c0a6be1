"""Structure and size checked before anything is expanded (issue 21, items 5 and 7).

Each probe of the adversarial round that allocated gigabytes from a small edit or an
extreme argument is refused here before the allocation: a record.structure declaring a
20,000 x 20,000 leaf, a padded state.json, walk(thin=10**15), start(chains=10**10), and
a pointwise log likelihood whose values would not fit (the memory estimate now counts
pointwise, derived and the working arrays of long thinning).
"""

from __future__ import annotations

import itertools
import json

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.engine import loop as engine
from fisherwalk.engine import memory
from fisherwalk.errors import CheckpointError, InputError
from fisherwalk.persistence import tuningfile

KEY = jax.random.key(0)


def _normal(p):
    return -0.5 * (jnp.sum(p["a"] ** 2) + p["b"] ** 2)


@pytest.fixture(scope="module")
def checkpoint(tmp_path_factory):
    walker = fisherwalk.start(_normal, {"a": jnp.zeros(2), "b": jnp.zeros(())}, KEY, chains=2,
                              progress=False)
    path = tmp_path_factory.mktemp("sizes") / "run.ckpt"
    fisherwalk.walk(walker, KEY, 30, chunk=10, checkpoint=path, progress=False)
    return walker, path


def _copy(path, target):
    target.mkdir()
    for p in path.iterdir():
        (target / p.name).write_bytes(p.read_bytes())
    return target


def test_huge_leaf_declared_in_record_structure_is_refused_before_allocation(
        checkpoint, tmp_path, monkeypatch):
    copy = _copy(checkpoint[1], tmp_path / "c")
    content = json.loads((copy / "run.json").read_text())
    content["record"]["structure"]["dict"]["a"]["array"]["shape"] = [20000, 20000]
    (copy / "run.json").write_text(json.dumps(content))
    asked = []
    real = tuningfile.jnp.zeros

    def zeros(shape, *args, **kwargs):
        asked.append(int(np.prod(shape)))
        return real(shape, *args, **kwargs)

    monkeypatch.setattr(tuningfile.jnp, "zeros", zeros)
    with pytest.raises(CheckpointError, match="structure"):
        fisherwalk.resume(copy, _normal, progress=False)
    assert max(asked, default=0) <= 3  # the 4e8-value leaf was never allocated


def test_padded_state_file_is_refused_by_size_before_parsing(checkpoint, tmp_path):
    copy = _copy(checkpoint[1], tmp_path / "c")
    state = copy / "state.json"
    state.write_text(state.read_text() + " " * 2**20)  # still valid JSON
    for call in (lambda: fisherwalk.resume(copy, _normal, progress=False),
                 lambda: fisherwalk.walk(checkpoint[0], KEY, 30, chunk=10, checkpoint=copy,
                                         progress=False)):
        with pytest.raises(CheckpointError, match="more than the"):
            call()


def test_huge_thin_is_refused_before_sampling(checkpoint):
    with pytest.raises(InputError, match="steps per chain"):
        fisherwalk.walk(checkpoint[0], KEY, 10, 10**15, progress=False)


def test_long_thinning_pieces_are_made_one_at_a_time():
    # the pieces of a kept draw's thin steps were a list: 10**15 / size entries
    pieces = engine._pieces(10**15, 10**5, shortest=2)
    assert list(itertools.islice(pieces, 2)) == [(0, 10**5), (10**5, 10**5)]


def test_ten_billion_chains_are_refused_before_allocation():
    with pytest.raises(InputError, match="chains"):
        fisherwalk.start(lambda x: -0.5 * jnp.sum(x**2), jnp.zeros(2), KEY, chains=10**10,
                         progress=False)


def test_memory_estimate_counts_pointwise_derived_and_thinning():
    base = memory.walk_bytes(1000, 4, 3)
    with_functions = memory.walk_bytes(1000, 4, 3, pointwise=10**5, derived=2)
    # the stored values alone: 4 chains x 1000 draws x (10**5 + 2) float64
    assert with_functions["functions"] >= 4 * 1000 * (10**5 + 2) * 8
    assert base["functions"] == 0
    thinned = memory.walk_bytes(10, 4, 3, thin=10**5)["engine"]
    assert thinned > memory.walk_bytes(10, 4, 3)["engine"]
    assert thinned <= memory.NOISE_COPIES * engine.NOISE_BUDGET * 8 + 2**20


def test_pointwise_that_would_not_fit_is_refused_before_sampling(checkpoint, monkeypatch):
    walker = checkpoint[0]
    calls = []
    counting = walker._replace(model=walker.model._replace(
        engine=lambda *a, **k: calls.append(1) or walker.engine(*a, **k)))
    need = sum(memory.walk_bytes(200, 2, 3).values())
    monkeypatch.setattr(memory, "available_bytes", lambda: 2 * need)
    y = jnp.zeros(10**5)
    with pytest.raises(InputError, match="pointwise and derived values"):
        fisherwalk.walk(counting, KEY, 200, progress=False,
                        pointwise=lambda p: -0.5 * (y - p["b"]) ** 2)
    assert not calls  # refused before the first step
