"""The size bound of a checkpoint segment, and finished checkpoints that reopen.

The bound (persistence/segments.py, segment_bytes) is computed from the list of arrays a
segment holds (segment_layout), the same list save() writes; it is checked here against
the bytes numpy actually writes at several sizes, dtypes and dimensions, and a finished
run whose one segment holds thousands of draws must reopen (re-walk and resume) with
the same draws, bit for bit (np.array_equal: same key, same Philox counters).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.persistence.segments import segment_bytes, segment_data, segment_layout
from fisherwalk.workflow.sampling import _Collector

FIELDS = ("flat", "logdensity", "accepted", "acceptance_rate", "faults")
FINGERPRINT = "0" * 64


def _normal(x):
    return -0.5 * jnp.sum(x**2)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("chains,draws,dim", [(1, 1, 1), (4, 7, 3), (4, 3000, 3),
                                              (4, 20000, 2), (2, 500, 200), (64, 10, 1)])
def test_segment_size_bound_holds_at_several_sizes(chains, draws, dim, dtype):
    collector = _Collector(chains, draws, dim, dtype)
    for start in (0, draws // 2):
        data = segment_data(collector, start, draws, FINGERPRINT)
        layout = segment_layout(collector, start, draws)
        bound = segment_bytes(layout)
        assert len(data) <= bound
        # tight: the bound exceeds the file by the fixed overheads only (at most 1 KiB a
        # member and 1 KiB for the zip's end), never by a multiple of the draws
        assert bound - len(data) <= (len(layout) + 1) * 1024


@pytest.mark.slow
@pytest.mark.parametrize("draws,thin", [(3000, 1), (20000, 2)])
def test_finished_checkpoint_reopens_with_the_same_draws(draws, thin, tmp_path):
    # the first round's data-loss probe: a finished run whose last segment held more than
    # ~2,000 draws x 4 chains was declared damaged; d = 3 (4 chains) as in the probe
    walker = fisherwalk.start(_normal, jnp.zeros(3 if thin == 1 else 2), jax.random.key(0),
                              chains=4, progress=False)
    key = jax.random.key(1)
    path = tmp_path / "run.ckpt"
    first = fisherwalk.walk(walker, key, draws, thin, checkpoint=path, progress=False)
    again = fisherwalk.walk(walker, key, draws, thin, checkpoint=path, progress=False)
    resumed = fisherwalk.resume(path, _normal, progress=False)
    for trace in (again, resumed):
        assert all(np.array_equal(getattr(trace, f), getattr(first, f)) for f in FIELDS)
