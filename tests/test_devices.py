"""Chains and data across devices and processes (base/meshes.py, base/shards.py,
workflow/devices.py, examples/two_processes.py).

Several host devices exist only if XLA_FLAGS=--xla_force_host_platform_device_count=N is
set before jax is imported, so each multi-device check runs in a fresh Python process
started here; it prints one JSON line that the test reads.

Tolerances:
- draws, one device against four: 1e-8 absolute on unit-scale parameters. The random
  numbers per chain are the same (made on the host); a vmapped log density over 1 or 4
  chains may differ in the last bits (another reduction order), and such differences
  travel with the chain, growing by at most a few orders of magnitude over a short run.
- a log density summed over shards against the plain sum: 1e-12 relative. n terms of
  size O(1) summed in another order differ by about n·eps·max|term| ≈ 1e3 · 2.2e-16.
- the Laplace mode: 1e-9 absolute (a gradient difference of 1e-13 moves the mode by
  about 1e-13 / H, H ≈ n/4 here; the margin covers a line-search step landing differently);
  the Fisher information: 1e-11 relative (sums of n terms, as the value).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from processes import NO_GLOO, example, gloo_available, run_pair

ROOT = Path(__file__).resolve().parents[1]


def _run(code: str, devices: int = 4, timeout: float = 240.0) -> dict:
    env = dict(os.environ)
    env["XLA_FLAGS"] = f"--xla_force_host_platform_device_count={devices}"
    env["JAX_ENABLE_X64"] = "1"
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    done = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], env=env,
                          capture_output=True, text=True, timeout=timeout)
    assert done.returncode == 0, done.stderr[-4000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


LOGISTIC = """
import json
import jax, jax.numpy as jnp, numpy as np
import fisherwalk as fw
from fisherwalk.base.shards import sharded_logdensity
from fisherwalk.workflow.devices import spread_chains, chain_devices

rng = np.random.default_rng(7)
n, d = 1001, 3                      # 1001 rows over 4 devices: 3 padded rows
X = rng.normal(size=(n, d))
y = (rng.uniform(size=n) < 1 / (1 + np.exp(-X @ np.array([0.5, -1.0, 0.25])))).astype(float)

def loglik(b, rows):
    eta = rows["X"] @ b
    return rows["y"] * eta - jnp.logaddexp(0.0, eta)

def prior(b):
    return -0.5 * jnp.sum(b ** 2) / 100.0

def plain(b):
    return jnp.sum(loglik(b, {"X": X, "y": y})) + prior(b)
"""


@pytest.mark.slow
def test_chains_over_four_devices_agree_with_one_device():
    out = _run("""
        import json
        import jax, jax.numpy as jnp, numpy as np
        import fisherwalk as fw
        from fisherwalk.errors import InputError
        from fisherwalk.workflow.devices import spread_chains, chain_devices

        A = jnp.array([[2.0, 0.6, 0.0], [0.6, 1.0, 0.3], [0.0, 0.3, 0.5]])
        def ld(p):
            x = p - jnp.array([1.0, -2.0, 0.5])
            return -0.5 * x @ A @ x

        w = fw.start(ld, jnp.zeros(3), jax.random.key(1), chains=4)
        auto = chain_devices(w)
        r4 = fw.refine(w, jax.random.key(2), steps=200)
        r1 = fw.refine(spread_chains(w, 1), jax.random.key(2), steps=200)
        t4 = fw.walk(r4, jax.random.key(3), draws=150, thin=2)
        t1 = fw.walk(spread_chains(r1, 1), jax.random.key(3), draws=150, thin=2)
        from fisherwalk.engine import loop as engine
        out = r4.engine(np.array([1, 2], np.uint64), 0, r4.state, r4.tuning.factor,
                        engine.control(), 5)
        held = sorted(s.data.shape[1] for s in out.position.addressable_shards)
        six = fw.start(ld, jnp.zeros(3), jax.random.key(1), chains=6)
        try:
            spread_chains(six, 4)
            refused = ""
        except InputError as err:
            refused = str(err)
        print(json.dumps({
            "auto": auto, "auto_six": chain_devices(six),
            "draws": float(np.abs(t4.flat - t1.flat).max()),
            "accepted_same": bool((t4.accepted == t1.accepted).all()),
            "scale": abs(r4.tuning.scale - r1.tuning.scale),
            "held": held, "sharding": str(out.position.sharding.spec),
            "refused": refused}))
    """)
    assert out["auto"] == 4 and out["auto_six"] == 3  # 6 chains: the largest divisor, 3
    assert out["held"] == [1, 1, 1, 1]  # each device holds (and computes) one chain
    assert "chains" in out["sharding"]
    assert out["draws"] <= 1e-8 and out["accepted_same"]
    assert out["scale"] <= 1e-10
    assert "6 chains do not divide over 4 devices" in out["refused"]
    assert "where: spread_chains(devices=...)" in out["refused"]


@pytest.mark.slow
def test_sharded_logdensity_equals_the_plain_sum_and_its_fit():
    out = _run(LOGISTIC + """
sh = sharded_logdensity(loglik, {"X": X, "y": y}, prior)
flat = sharded_logdensity(loglik, {"X": X, "y": y})   # flat prior: the mode is the MLE
points = [np.zeros(d), np.array([0.3, -0.7, 1.1]), np.array([2.0, 1.0, -3.0])]
values = [(float(sh(jnp.asarray(p))), float(plain(jnp.asarray(p)))) for p in points]
grads = [float(np.abs(jax.grad(sh)(jnp.asarray(p)) - jax.grad(plain)(jnp.asarray(p))).max())
         for p in points]
f_sh, f_plain = fw.laplace(sh, jnp.zeros(d)), fw.laplace(plain, jnp.zeros(d))
mle = fw.laplace(flat, jnp.zeros(d))
b = np.asarray(f_sh.mode_flat)
p = 1 / (1 + np.exp(-X @ b))
closed = X.T @ (X * (p * (1 - p))[:, None]) + np.eye(d) / 100.0
import statsmodels.api as sm
reference = sm.Logit(y, X).fit(disp=0, tol=1e-12, maxiter=100).params
mesh = jax.sharding.Mesh(np.asarray(jax.devices()).reshape(2, 2), ("chains", "rows"))
two = sharded_logdensity(loglik, {"X": X, "y": y}, prior, mesh=mesh)
w = fw.start(plain, jnp.zeros(d), jax.random.key(1), chains=4)
t1 = fw.walk(spread_chains(w, 1), jax.random.key(2), draws=60)
w2 = spread_chains(fw.start(two, jnp.zeros(d), jax.random.key(1), chains=4), mesh)
t2 = fw.walk(w2, jax.random.key(2), draws=60)
from fisherwalk.errors import ModelError, InputError
msgs = []
try:
    sharded_logdensity(lambda b, r: jnp.sum(loglik(b, r)), {"X": X, "y": y})(jnp.zeros(d))
except ModelError as err:
    msgs.append(str(err))
try:
    sharded_logdensity(loglik, {"X": X, "y": y[:10]})
except InputError as err:
    msgs.append(str(err))
print(json.dumps({
    "rel": max(abs(a - b) / abs(b) for a, b in values), "grad": max(grads),
    "mode": float(np.abs(f_sh.mode_flat - f_plain.mode_flat).max()),
    "fisher": float(np.abs(f_sh.fisher - f_plain.fisher).max() / np.abs(f_plain.fisher).max()),
    "closed": float(np.abs(np.asarray(f_sh.fisher) - closed).max() / np.abs(closed).max()),
    "mle": float(np.abs(np.asarray(mle.mode_flat) - reference).max()),
    "two_axes": float(np.abs(t1.flat - t2.flat).max()), "shards": sh.shards,
    "messages": msgs}))
""")
    assert out["shards"] == 4
    assert out["rel"] <= 1e-12
    assert out["grad"] <= 1e-9  # gradients are sums of n terms of size |x| ~ 1: 1e3 · eps · n
    assert out["mode"] <= 1e-9 and out["fisher"] <= 1e-11
    # Observed = expected information for the canonical logit link: Xᵀ diag(p(1-p)) X
    # plus the prior precision (McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed.,
    # section 4.5); autodiff through shard_map + psum against the closed form, to rounding.
    assert out["closed"] <= 1e-10
    # The flat-prior mode is the maximum-likelihood estimate; statsmodels' Newton fit to
    # tol 1e-12 agrees to within the fit's own gradient tolerance (1.5e-8 x |log L|/H).
    assert out["mle"] <= 1e-6
    assert out["two_axes"] <= 1e-8  # chains on one mesh axis, rows on the other
    assert "returned shape ()" in out["messages"][0]
    assert "different numbers of rows: [10, 1001]" in out["messages"][1]


@pytest.mark.slow
@pytest.mark.skipif(not gloo_available(), reason=NO_GLOO)
def test_two_processes_match_one_process_with_checkpoint_and_resume(tmp_path):
    result = example().launch(rows=1001, draws=150, out=tmp_path, timeout=240.0)
    assert result["devices"] == 2 and result["shape"] == (4, 150, 3)
    assert result["complete"]  # the walk was interrupted at chunk 3; resume() finished it
    assert result["draws"] <= 1e-8
    assert result["mode"] <= 1e-9 and result["fisher_relative"] <= 1e-11


MISMATCH = """
import jax.numpy as jnp, numpy as np
from fisherwalk.base.shards import sharded_logdensity
from fisherwalk.errors import ModelError
try:
    sharded_logdensity(lambda b, r: r @ b, np.ones((100 + i, 3)))
    print("accepted")
except ModelError as err:
    print("refused:", str(err).splitlines()[0])
"""


@pytest.mark.slow
@pytest.mark.skipif(not gloo_available(), reason=NO_GLOO)
def test_processes_with_different_data_shapes_are_refused_before_sampling(tmp_path):
    for text in run_pair(MISMATCH, tmp_path, timeout=120):
        assert "refused: The processes disagree on the data shapes" in text, text


def test_one_device_is_left_alone():
    # With one device nothing is placed: the engine is the one-device engine of before
    # (tests/test_pinned_draws.py pins its draws).
    import jax

    from fisherwalk.base.meshes import chain_placement

    if len(jax.devices()) != 1:
        pytest.skip("this test process sees several devices")
    assert chain_placement(4) is None and chain_placement(3, 1) is None
