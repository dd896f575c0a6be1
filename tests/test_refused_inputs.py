"""Every input the public API refuses, the error it raises and its message.

The table CASES is the single source: each row runs here as a test, and
docs/refused-inputs.md is rendered from the same rows with the messages the code
actually gives (regenerate with `python tests/test_refused_inputs.py`; a test fails
when the document is out of date).
"""

from __future__ import annotations

import io
import json
import os
import re
import socket
import sys
from pathlib import Path

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk
from fisherwalk.base.checks import parse_whole_number
from fisherwalk.base.files import check_output_folder
from fisherwalk.cli.parser import MAX_SEED
from fisherwalk.results import diagnostics

DOC = Path(__file__).resolve().parents[1] / "docs" / "refused-inputs.md"
KEY = jax.random.key(0)
ASYMMETRIC = np.array([[1.0, 0.5], [0.0, 1.0]])
INDEFINITE = np.array([[1.0, 2.0], [2.0, 1.0]])


def _normal(x):
    return -0.5 * jnp.sum(x**2)


def _walker():
    return fisherwalk.start(_normal, jnp.zeros(2), KEY, chains=2)


def _nan_data(x):
    data = jnp.asarray([1.0, jnp.nan, 2.0])
    return -0.5 * jnp.sum((data - x[0]) ** 2) - 0.5 * x[1] ** 2


def _separated(b):
    # complete separation (y = 1 exactly when x > 0) and a flat prior: no finite mode
    x = jnp.linspace(-2.0, 2.0, 20)
    y = (x > 0).astype(float)
    eta = b[0] + b[1] * x
    return jnp.sum(y * eta - jnp.logaddexp(0.0, eta))


def _unidentified(p):
    return -0.5 * (p[0] + p[1] - 1.0) ** 2


def _ill_conditioned(x):
    return -0.5 * (x[0] ** 2 + 1e4 * (x[1] - x[0] ** 2) ** 2)


def _damaged_checkpoint(tmp):
    w = _walker()
    path = tmp / "run.ckpt"
    fisherwalk.walk(w, KEY, draws=30, chunk=10, checkpoint=path, checkpoint_every=0.0,
                    progress=False)
    (path / "state.json").write_text("{ not json")
    return fisherwalk.walk(w, KEY, draws=30, chunk=10, checkpoint=path, progress=False)


def _other_model_checkpoint(tmp):
    path = tmp / "run.ckpt"
    fisherwalk.walk(_walker(), KEY, draws=30, chunk=10, checkpoint=path, progress=False)
    other = fisherwalk.start(_normal, jnp.zeros(3), KEY, chains=2)
    return fisherwalk.walk(other, KEY, draws=30, chunk=10, checkpoint=path, progress=False)


def _saved_other_names(tmp):
    path = tmp / "tuning.json"
    fisherwalk.save_tuning(_walker(), path)
    return fisherwalk.start(lambda p: _normal(p["a"]), {"a": jnp.zeros(2)}, KEY,
                            shape=fisherwalk.load_tuning(path))


def _model_file_missing_name(tmp):
    from fisherwalk.cli.modelfile import load_model

    path = tmp / "model.py"
    path.write_text("import jax.numpy as jnp\ninitial_position = jnp.zeros(2)\n")
    return load_model(path)


def _checkpoint(tmp):
    path = tmp / "run.ckpt"
    fisherwalk.walk(_walker(), KEY, draws=30, chunk=10, checkpoint=path, checkpoint_every=0.0,
                    progress=False)
    return path


def _locked(pid):
    def call(tmp):
        path = _checkpoint(tmp)
        (path / "writer.lock").write_text(json.dumps(
            {"pid": pid, "host": socket.gethostname(), "started": "2026-01-01T00:00:00+00:00",
             "token": "0" * 16}))
        return fisherwalk.walk(_walker(), KEY, draws=30, chunk=10, checkpoint=path,
                               progress=False)
    return call


def _link_in_checkpoint(tmp):
    path = _checkpoint(tmp)
    os.symlink(tmp / "elsewhere", path / ".state.json.1234.tmp")
    return fisherwalk.walk(_walker(), KEY, draws=30, chunk=10, checkpoint=path, progress=False)


def _segment_changed(tmp):
    path = _checkpoint(tmp)
    segment = path / "segment-000001.npz"
    with np.load(segment) as data:
        arrays = {name: data[name] for name in data.files}
    arrays["flat"] = arrays["flat"] + 1.0
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    segment.write_bytes(buffer.getvalue())
    return fisherwalk.resume(path, _normal)


def _run_file_edited(tmp):
    path = _checkpoint(tmp)
    content = json.loads((path / "run.json").read_text())
    content["identity"]["draws"] = 1e12
    (path / "run.json").write_text(json.dumps(content))
    return fisherwalk.resume(path, _normal)


def _tuning_edited(field, value):
    def call(tmp):
        path = tmp / "tuning.json"
        fisherwalk.save_tuning(_walker(), path)
        record = json.loads(path.read_text())
        record["tuning"][field] = value
        path.write_text(json.dumps(record))
        return fisherwalk.load_tuning(path)
    return call


def _tuning_asymmetric(tmp):
    path = tmp / "tuning.json"
    fisherwalk.save_tuning(_walker(), path)
    record = json.loads(path.read_text())
    record["laplace"]["fisher"][0][1] += 0.5
    path.write_text(json.dumps(record))
    return fisherwalk.load_tuning(path)


def _callback_model(x):
    return jax.pure_callback(lambda v: np.asarray(-0.5 * np.sum(v**2)),
                             jax.ShapeDtypeStruct((), jnp.float64), x)


def _out_is_a_file(tmp):
    (tmp / "afile").write_text("")
    return check_output_folder(tmp / "afile", 0)


def _output_link(tmp):
    from fisherwalk.cli.outputs import check_output_names

    (tmp / "out").mkdir()
    (tmp / "out" / "draws.npz").symlink_to(tmp / "elsewhere.npz")
    return check_output_names(tmp / "out", ["draws.npz"])


def _users_own_data(tmp):
    from fisherwalk.cli.outputs import check_demo_folder

    (tmp / "data.csv").write_text("my,own\n1,2\n")
    return check_demo_folder(tmp)


def _second_checkpointed_run(tmp):
    from fisherwalk.cli.resumable import claim_checkpoint

    (tmp / "checkpoint").mkdir()
    (tmp / "checkpoint" / "run.json").write_text("{}")
    return claim_checkpoint(tmp, model_file="model.py")


def _held_checkpoint(tmp):
    from fisherwalk.base.lock import acquire_lock

    path = _checkpoint(tmp)
    with acquire_lock(path):
        return fisherwalk.walk(_walker(), KEY, draws=30, chunk=10, checkpoint=path,
                               progress=False)


def _structure_huge(tmp):
    path = tmp / "run.ckpt"
    walker = fisherwalk.start(lambda p: _normal(p["a"]), {"a": jnp.zeros(2)}, KEY, chains=2)
    fisherwalk.walk(walker, KEY, draws=30, chunk=10, checkpoint=path, progress=False)
    content = json.loads((path / "run.json").read_text())
    content["record"]["structure"]["dict"]["a"]["array"]["shape"] = [20000, 20000]
    (path / "run.json").write_text(json.dumps(content))
    return fisherwalk.resume(path, lambda p: _normal(p["a"]), progress=False)


def _padded_state(tmp):
    path = _checkpoint(tmp)
    (path / "state.json").write_text((path / "state.json").read_text() + " " * 2**20)
    return fisherwalk.resume(path, _normal, progress=False)


def _whitened_edit(tmp):
    path = tmp / "run.ckpt"
    walker = fisherwalk.start(_normal, jnp.zeros(2), KEY, chains=2, sampler="mala",
                              progress=False)
    fisherwalk.walk(walker, KEY, draws=30, chunk=10, checkpoint=path, progress=False)
    content = json.loads((path / "state.json").read_text())
    content["whitened"]["logdensity_grad"]["values"][0] += 0.25
    (path / "state.json").write_text(json.dumps(content))
    return fisherwalk.resume(path, _normal, progress=False)


def _csv_other_digits(tmp):
    from fisherwalk.cli.datafile import read_table

    (tmp / "t.csv").write_text("count\n3\n1_000\n")
    return read_table(tmp / "t.csv")


def _model_file_exits(tmp):
    from fisherwalk.cli.modelfile import load_model

    (tmp / "model.py").write_text("import sys\nsys.exit(0)\n")
    return load_model(tmp / "model.py")


def _nan_gradient_band(x):  # finite; the gradient in x[0] is NaN wherever |x[0]| < 0.1
    return -0.5 * jnp.sum((x - 0.02) ** 2) + 0.0 * jnp.sqrt(
        jnp.maximum(jnp.abs(x[0]) - 0.1, 0.0))


def _funnel(p):  # Neal (2003), "Slice sampling", section 8, in d = 10
    return -0.5 * p[0] ** 2 / 9.0 - 0.5 * jnp.sum(p[1:] ** 2) * jnp.exp(-p[0]) - 4.5 * p[0]


# (where, what is refused, call(tmp_path), exception, words the message must contain)
def _kinked(x):  # finite everywhere; the gradient in x[1] is NaN wherever x[1] >= 1
    return -0.5 * jnp.sum(x**2) + 0.0 * jnp.sqrt(jnp.maximum(1.0 - x[1], 0.0))


def _half_line(x):  # finite only for x[0] < 1
    return jnp.where(x[0] < 1.0, -0.5 * jnp.sum(x**2), -jnp.inf)


def _unfinished_checkpoint(tmp):
    path = tmp / "run.ckpt"
    fisherwalk.walk(_walker(), KEY, draws=30, chunk=10, checkpoint=path, progress=False)
    state = json.loads((path / "state.json").read_text())
    state["done"] = 10
    (path / "state.json").write_text(json.dumps(state))
    return fisherwalk.reopen(path)


def _focus_nothing(tmp):
    trace = fisherwalk.walk(_walker(), KEY, draws=30, progress=False)
    return trace.summary(focus="sigma*")


def _numpyro_model(kind):
    """Models a NumPyro user could write that fisherwalk cannot use (demo data)."""
    import numpyro
    import numpyro.distributions as dist

    y = jnp.asarray([0.3, -1.2, 0.8, 2.1, 0.4, -0.5])

    def subsampled():
        mu = numpyro.sample("mu", dist.Normal(0.0, 1.0))
        with numpyro.plate("rows", 6, subsample_size=3) as idx:
            numpyro.sample("y", dist.Normal(mu, 1.0), obs=y[idx])

    def discrete():
        group = numpyro.sample("group", dist.Bernoulli(0.5))
        numpyro.sample("y", dist.Normal(2.0 * group, 1.0), obs=y)

    def no_latent():
        numpyro.sample("y", dist.Normal(0.0, 1.0), obs=y)

    class Unbounded(dist.Distribution):  # a support no transform maps
        support = dist.constraints.dependent

        def sample(self, key, sample_shape=()):
            return jnp.zeros(sample_shape)

        def log_prob(self, value):
            return -0.5 * value**2

    def no_transform():
        numpyro.sample("odd", Unbounded())

    return {"subsampled": subsampled, "discrete": discrete, "no_latent": no_latent,
            "no_transform": no_transform}[kind]


def _numpyro_refused(kind):
    return lambda t: fisherwalk.model_problem(_numpyro_model(kind))


def _pymc_discrete(tmp):
    import pymc as pm

    with pm.Model() as model:
        count = pm.Poisson("count", 3.0)
        pm.Normal("y", count, 1.0, observed=np.asarray([2.0, 4.0]))
    return fisherwalk.model_problem(model)


def _pymc_minibatch(tmp):
    import pymc as pm

    y = np.linspace(-1.0, 1.0, 40)
    with pm.Model() as model:
        mu = pm.Normal("mu", 0.0, 1.0)
        pm.Normal("y", mu, 1.0, observed=pm.Minibatch(y, batch_size=10), total_size=40)
    return fisherwalk.model_problem(model)


def _model_file_bad_args(tmp):
    from fisherwalk.cli.modelfile import load_model

    path = tmp / "model.py"
    path.write_text("import numpyro, numpyro.distributions as dist\n"
                    "def model(y):\n    numpyro.sample('m', dist.Normal(0, 1))\n"
                    "model_args = [1.0]\nmodel_kwargs = {}\n")
    return load_model(path)


CASES = [
    ("start", "an unknown sampler",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, sampler="slice"),
     fisherwalk.InputError, "sampler"),
    ("start", "target_acceptance= for a sampler without dual averaging",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, sampler="rwm",
                                target_acceptance=0.9),
     fisherwalk.InputError, "target_acceptance"),
    ("start", "target_acceptance= outside (0, 1)",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, sampler="nuts",
                                target_acceptance=1.0),
     fisherwalk.InputError, "target_acceptance"),
    ("start / refine", "a gradient that is not finite where a gradient sampler goes",
     lambda t: fisherwalk.refine(fisherwalk.start(_kinked, jnp.zeros(2), KEY, sampler="nuts",
                                                  progress=False), KEY, progress=False),
     fisherwalk.ModelError, 'sampler="rwm"'),
    ("handoff", "BlackJAX's MALA, which takes no metric",
     lambda t: fisherwalk.handoff(blackjax.mala, _normal, jnp.zeros(2), KEY),
     fisherwalk.InputError, "metric"),
    ("start / laplace", "a position leaf of integer dtype",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2, dtype=jnp.int32), KEY),
     fisherwalk.InputError, "dtype"),
    ("start / laplace", "an empty position",
     lambda t: fisherwalk.start(_normal, {}, KEY), fisherwalk.InputError, "no array"),
    ("start / laplace", "a position holding NaN",
     lambda t: fisherwalk.start(_normal, jnp.asarray([0.0, jnp.nan]), KEY),
     fisherwalk.InputError, "non-finite"),
    ("start / laplace", "a log density that returns a vector",
     lambda t: fisherwalk.start(lambda x: x**2, jnp.zeros(2), KEY),
     fisherwalk.ModelError, "scalar"),
    ("start / laplace", "NaN in the data the log density closes over",
     lambda t: fisherwalk.start(_nan_data, jnp.zeros(2), KEY), fisherwalk.ModelError, "NaN"),
    ("start / laplace", "a log density of -inf at the start",
     lambda t: fisherwalk.start(lambda x: jnp.where(x[0] < 1, -jnp.inf, 0.0) - x @ x,
                                jnp.zeros(2), KEY),
     fisherwalk.ModelError, "inf"),
    ("start / laplace", "an optimiser that stops before converging",
     lambda t: fisherwalk.start(_ill_conditioned, jnp.asarray([2.0, 3.0]), KEY,
                                max_iterations=2),
     fisherwalk.FitError, "gradient"),
    ("start / laplace", "a mode at infinity (complete separation)",
     lambda t: fisherwalk.start(_separated, jnp.zeros(2), KEY), fisherwalk.FitError, "separation"),
    ("start / laplace", "a Hessian that is not positive definite (unidentified parameters)",
     lambda t: fisherwalk.start(_unidentified, jnp.zeros(2), KEY), fisherwalk.FitError, "x[0]"),
    ("start / laplace", "a user Fisher information that is not symmetric",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, fisher=ASYMMETRIC),
     fisherwalk.InputError, "symmetric"),
    ("start / laplace", "a user Fisher information that is not positive definite",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, fisher=INDEFINITE),
     fisherwalk.InputError, "positive definite"),
    ("start / laplace", "a user Fisher information of the wrong size",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, fisher=np.eye(3)),
     fisherwalk.InputError, "(2, 2)"),
    ("start", "chains that are not a positive whole number",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, chains=0),
     fisherwalk.InputError, "chains"),
    ("start", "an unknown proposal shape",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, shape="round"),
     fisherwalk.InputError, "shape"),
    ("start", "a proposal covariance that is not positive definite",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, shape=INDEFINITE),
     fisherwalk.InputError, "positive definite"),
    ("start", "a saved tuning for other parameters",
     _saved_other_names, fisherwalk.InputError, "names"),
    ("start / walk / refine", "an integer where a random key belongs",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), 7),
     fisherwalk.InputError, "jax.random.key(7)"),
    ("refine", "steps that are not a positive whole number",
     lambda t: fisherwalk.refine(_walker(), KEY, steps=0), fisherwalk.InputError, "steps"),
    ("walk", "draws that are not a positive whole number",
     lambda t: fisherwalk.walk(_walker(), KEY, draws=0), fisherwalk.InputError, "draws"),
    ("walk", "a thinning that is not a whole number",
     lambda t: fisherwalk.walk(_walker(), KEY, draws=10, thin=1.5), fisherwalk.InputError, "thin"),
    ("walk", "a chain whose current log density is NaN",
     lambda t: fisherwalk.walk(_walker()._replace(state=_walker().state._replace(
         logdensity=np.asarray([0.0, np.nan]))), KEY, draws=10),
     fisherwalk.SamplingError, "chain 1"),
    ("walk(checkpoint=...)", "a damaged checkpoint", _damaged_checkpoint,
     fisherwalk.CheckpointError, "state.json"),
    ("walk(checkpoint=...)", "a checkpoint written for another model", _other_model_checkpoint,
     fisherwalk.CheckpointError, "dimension"),
    ("optimal_scale", "a dimension below 1",
     lambda t: fisherwalk.optimal_scale(0), fisherwalk.InputError, "dim"),
    ("optimal_scale", "a spectrum with a non-positive eigenvalue",
     lambda t: fisherwalk.optimal_scale(2, [1.0, -1.0]), fisherwalk.InputError, "spectrum"),
    ("diagnostics", "chains of fewer than 4 draws",
     lambda t: diagnostics.ess_bulk(np.zeros((2, 3))), fisherwalk.InputError, "draws"),
    ("fisherwalk run", "a model file without `logdensity`",
     _model_file_missing_name, fisherwalk.ModelFileError, "logdensity"),
    ("start / laplace", "a position leaf with no entries",
     lambda t: fisherwalk.start(lambda p: _normal(p["a"]), {"a": jnp.zeros(2), "b": jnp.zeros(0)},
                                KEY),
     fisherwalk.InputError, "empty"),
    ("start / laplace", "a log density that calls back to Python (jax.pure_callback)",
     lambda t: fisherwalk.start(_callback_model, jnp.zeros(2), KEY),
     fisherwalk.ModelError, "calls back to Python"),
    ("walk", "more kept draws than the memory this process can allocate",
     lambda t: fisherwalk.walk(_walker(), KEY, draws=10**13), fisherwalk.InputError,
     "need about"),
    ("walk(checkpoint=...)", "a checkpoint another running process writes",
     _locked(1), fisherwalk.CheckpointError, "in use by process 1"),
    ("walk(checkpoint=...)", "a checkpoint locked by a run that no longer runs (stale lock)",
     _locked(2**31 - 1), fisherwalk.CheckpointError, "checkpoint_reclaim=True"),
    ("walk(checkpoint=...)", "a checkpoint folder holding a symbolic link",
     _link_in_checkpoint, fisherwalk.CheckpointError, "not regular files"),
    ("resume", "a segment changed after it was written", _segment_changed,
     fisherwalk.CheckpointError, "SHA-256"),
    ("resume", "a run file whose draws are not a whole number", _run_file_edited,
     fisherwalk.CheckpointError, "draws"),
    ("load_tuning / resume", "a tuning record whose Fisher information is not symmetric",
     _tuning_asymmetric, fisherwalk.InputError, "not symmetric"),
    ("load_tuning / resume", "a tuning record with a scale that is not positive",
     _tuning_edited("scale", -1.0), fisherwalk.InputError, "tuning.scale"),
    ("load_tuning / resume", "a tuning record naming a sampler family that is not registered",
     _tuning_edited("sampler", "slice"), fisherwalk.InputError, "registered sampler family"),
    ("load_tuning / resume", "a tuning record with a target acceptance outside (0, 1)",
     _tuning_edited("target_acceptance", 7.5), fisherwalk.InputError,
     "tuning.target_acceptance"),
    ("fisherwalk run / demo", "--out naming a file (checked before the fit)",
     _out_is_a_file, fisherwalk.InputError, "is a file"),
    ("start(chain_starts=...)", "chain starts whose leading axis is not the number of chains",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, chains=2,
                                chain_starts=np.zeros((3, 2)), progress=False),
     fisherwalk.InputError, "must be (2, 2)"),
    ("start(chain_starts=...)", "a chain start holding NaN",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, chains=2,
                                chain_starts=np.array([[0.0, 0.0], [np.nan, 0.0]]),
                                progress=False),
     fisherwalk.InputError, "chain 1, parameter x[0]"),
    ("start(chain_starts=...)", "a chain start where the log density is -inf",
     lambda t: fisherwalk.start(_half_line, jnp.zeros(2), KEY, chains=2,
                                chain_starts=np.array([[0.0, 0.0], [2.0, 0.0]]),
                                progress=False),
     fisherwalk.ModelError, "start of chain 1"),
    ("walk(predict=...)", "a prediction function that takes no key",
     lambda t: fisherwalk.walk(_walker(), KEY, draws=10, progress=False,
                               predict=lambda x: x), fisherwalk.ModelError, "predict"),
    ("Trace.summary(focus=...)", "a focus that matches no parameter", _focus_nothing,
     fisherwalk.InputError, "matches no parameter"),
    ("reopen", "a folder that is neither a run folder nor a checkpoint",
     lambda t: fisherwalk.reopen(t), fisherwalk.InputError, "neither"),
    ("reopen", "a checkpoint whose run has not finished", _unfinished_checkpoint,
     fisherwalk.CheckpointError, "not finished"),
    ("fisherwalk run / demo", "--seed that is not plain digits (e.g. 1e23)",
     lambda t: parse_whole_number("1e23", "--seed", "option --seed", minimum=0,
                                  maximum=MAX_SEED),
     fisherwalk.InputError, "not a whole number"),
    ("walk(checkpoint=...)", "a checkpoint whose lock a live writer holds (the kernel's lock)",
     _held_checkpoint, fisherwalk.CheckpointError, "in use by process"),
    ("fisherwalk run / demo / resume", "an output name in --out that is a link or a folder "
     "(checked before the fit)", _output_link, fisherwalk.InputError, "symbolic link"),
    ("fisherwalk demo", "a data.csv or record.json in --out that no demo wrote",
     _users_own_data, fisherwalk.InputError, "did not write"),
    ("fisherwalk run --checkpoint", "an --out that holds a checkpointed run already (its "
     "command.json is kept)", _second_checkpointed_run, fisherwalk.InputError,
     "checkpointed run already"),
    ("walk", "a thinning that makes more than 2**50 steps per chain (thin=10**15)",
     lambda t: fisherwalk.walk(_walker(), KEY, draws=10, thin=10**15),
     fisherwalk.InputError, "steps per chain"),
    ("start", "more chains than this process can hold (chains=10**10), before allocating",
     lambda t: fisherwalk.start(_normal, jnp.zeros(2), KEY, chains=10**10),
     fisherwalk.InputError, "chains"),
    ("walk", "pointwise values that would not fit in memory (before sampling)",
     lambda t: fisherwalk.walk(_walker(), KEY, draws=10,
                               pointwise=lambda x: jnp.zeros(10**10) + x[0]),
     fisherwalk.InputError, "pointwise and derived values"),
    ("resume", "a run file whose record.structure declares a leaf larger than the run "
     "(refused before allocating it)", _structure_huge, fisherwalk.CheckpointError,
     "structure"),
    ("walk(checkpoint=...) / resume", "a state file larger than its contents can be "
     "(padded; refused before parsing)", _padded_state, fisherwalk.CheckpointError,
     "more than the"),
    ("resume", "an edited whitened state of a gradient sampler (state.json or run.json)",
     _whitened_edit, fisherwalk.CheckpointError, "whitened.logdensity_grad"),
    ("fisherwalk run --data", "a CSV cell that is not a plain ASCII decimal (1_000, "
     "Arabic-Indic or full-width digits)", _csv_other_digits, fisherwalk.InputError,
     "ASCII digits"),
    ("fisherwalk run", "a model file that calls sys.exit()", _model_file_exits,
     fisherwalk.ModelFileError, "sys.exit"),
    ("start / laplace", "a band of NaN gradient at the mode (the log density finite)",
     lambda t: fisherwalk.start(_nan_gradient_band, jnp.array([1.0, 1.0]), KEY),
     fisherwalk.FitError, "NaN"),
    ("start / laplace", "Neal's funnel: a curvature spread beyond float64 at the end point",
     lambda t: fisherwalk.start(_funnel, jnp.zeros(10), KEY), fisherwalk.FitError, "funnel"),

    ("model_problem", "a NumPyro plate with a subsample size",
     _numpyro_refused("subsampled"), fisherwalk.ModelError, "subsample"),
    ("model_problem", "a discrete latent site (NumPyro)",
     _numpyro_refused("discrete"), fisherwalk.ModelError, "marginalise"),
    ("model_problem", "a discrete free variable (PyMC)",
     _pymc_discrete, fisherwalk.ModelError, "marginalise"),
    ("model_problem", "a minibatch of the data (PyMC)",
     _pymc_minibatch, fisherwalk.ModelError, "all the data"),
    ("model_problem", "a NumPyro model with no latent sample site",
     _numpyro_refused("no_latent"), fisherwalk.ModelError, "no latent sample site"),
    ("model_problem", "a site whose support has no transform",
     _numpyro_refused("no_transform"), fisherwalk.ModelError, "no transform"),
    ("constrained_problem", "an unknown constraint",
     lambda t: fisherwalk.constrained_problem(_normal, {"s": 1.0}, {"s": "round"}),
     fisherwalk.InputError, "not a known constraint"),
    ("constrained_problem", "a constraint for a name the position lacks",
     lambda t: fisherwalk.constrained_problem(_normal, {"s": 1.0}, {"t": "positive"}),
     fisherwalk.InputError, "does not hold"),
    ("constrained_problem", "a starting value outside its constraint",
     lambda t: fisherwalk.constrained_problem(_normal, {"s": -1.0}, {"s": "positive"}),
     fisherwalk.InputError, "outside its constraint"),
    ("fisherwalk run", "a NumPyro model file whose model_args is not a tuple",
     _model_file_bad_args, fisherwalk.ModelFileError, "tuple"),
]


def _ids():
    return [f"{i:02d}-{case[1][:40]}" for i, case in enumerate(CASES)]


@pytest.mark.slow
@pytest.mark.parametrize("case", CASES, ids=_ids())
def test_refused(case, tmp_path):
    _, _, call, error, words = case
    with pytest.raises(error) as info:
        call(tmp_path)
    assert words in str(info.value)
    assert isinstance(info.value, fisherwalk.FisherwalkError)


def _message(case, tmp) -> str:
    try:
        case[2](tmp)
    except fisherwalk.FisherwalkError as err:
        return str(err)
    raise AssertionError(f"not refused: {case[1]}")


def render(tmp: Path) -> str:
    def cell(text: str) -> str:
        return text.replace("|", "\\|").replace("\n", "<br>")

    lines = [
        "# Inputs fisherwalk refuses",
        "",
        "Rendered by `python tests/test_refused_inputs.py` from the table that "
        "`tests/test_refused_inputs.py` runs; every row is a test. Messages say what went "
        "wrong, where, and what to do.",
        "",
        "| call | refused input | error | message |",
        "| --- | --- | --- | --- |",
    ]
    for i, case in enumerate(CASES):
        sub = tmp / f"case{i}"
        sub.mkdir(parents=True, exist_ok=True)
        message = re.sub(r"/\S*?(case\d+)", r"<tmp>/\1", _message(case, sub))
        lines.append(f"| {case[0]} | {case[1]} | `{case[3].__name__}` | {cell(message)} |")
    return "\n".join(lines) + "\n"


def _normalise(text: str) -> str:
    # Temporary directories and numbers printed to many digits differ between runs, and
    # the memory a machine has differs between machines.
    text = re.sub(r"/[^ |<`']*?(case\d+)", r"<tmp>/\1", text)
    text = re.sub(r"\d+(\.\d+)? (GiB|MiB)", r"# \2", text)
    text = re.sub(r"at most about \d+", "at most about #", text)
    text = re.sub(r"on host '[^']*'", "on host #", text)
    text = re.sub(r"by process \d{2,} on host #, since [0-9T:+-]+", "by process #", text)
    return re.sub(r"\d\.\d{3,}(e[-+]?\d+)?", "#", text)


@pytest.mark.slow
def test_document_is_up_to_date(tmp_path):
    assert DOC.exists(), "run `python tests/test_refused_inputs.py` to write the document"
    assert _normalise(DOC.read_text()) == _normalise(render(tmp_path))


if __name__ == "__main__":
    import tempfile

    jax.config.update("jax_enable_x64", True)
    with tempfile.TemporaryDirectory() as tmp:
        DOC.write_text(render(Path(tmp)))
    print(f"wrote {DOC}", file=sys.stderr)
