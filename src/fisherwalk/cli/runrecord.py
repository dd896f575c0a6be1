"""The files a run of the ``fisherwalk`` command leaves behind.

:func:`build_record` gathers every setting and result needed to reproduce and judge a
run (versions, platform, keys, options, the Laplace fit, the tuning, the warm-up, the
summary, wall times) as JSON-ready data; :func:`write_outputs` writes ``draws.npz``
(plain arrays, no pickle), the plots and ``record.json`` (last, listing the other files
with their SHA-256). Every file is written atomically (:mod:`fisherwalk.base.files`): a
full disk or a crash leaves the previous file or none, never a truncated one. The record
follows the package's JSON convention (:mod:`fisherwalk.base.jsonio`).
"""

from __future__ import annotations

import hashlib
import platform
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

from ..base.files import write_atomic, write_text_atomic
from ..base.jsonio import to_plain, write_json_atomic
from ..persistence import tuningfile
from ..results.facts import facts_record, in_written_order
from ..results.trace import derived_names

__all__ = ["RunResult", "build_record", "write_outputs", "sha256_file", "run_keys",
           "draws_arrays", "write_pointwise", "POINTWISE_FILE"]

POINTWISE_FILE = "pointwise.npz"

class RunResult(NamedTuple):
    """Everything one workflow run produced."""

    trace: Any  # fisherwalk.Trace
    summary: Any  # fisherwalk.results.report.Summary
    seconds: dict[str, float]  # wall time of each step
    keys: dict[str, list[int]]  # key data of each step's key


def run_keys(seed: int) -> tuple[tuple, dict[str, list[int]]]:
    """The keys of a command run, ``start, warmup, sampling = jax.random.split(
    jax.random.key(seed), 3)``, and their key data for the record."""
    import jax

    parts = tuple(jax.random.split(jax.random.key(seed), 3))
    data = {name: np.asarray(jax.random.key_data(k)).tolist()
            for name, k in zip(("start", "warmup", "sampling"), parts, strict=True)}
    return parts, data


PACKAGES = ("fisherwalk", "jax", "jaxlib", "blackjax", "optax", "numpy", "scipy")


def _versions() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    out = {}
    for name in PACKAGES:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = "not installed"
    out["python"] = platform.python_version()
    return out


def write_pointwise(out: Path, pointwise: np.ndarray, record: dict) -> Path:
    """The pointwise log likelihood ``(chains, draws, n_obs)`` in its own compressed file
    (``np.savez_compressed``, array ``pointwise``); its size goes into the record's
    ``sampling.pointwise``."""
    path = out / POINTWISE_FILE
    values = np.asarray(pointwise)
    write_atomic(path, lambda handle: np.savez_compressed(handle, pointwise=values))
    record.setdefault("sampling", {})["pointwise"] = {
        "file": path.name, "shape": list(values.shape), "bytes": path.stat().st_size,
        "uncompressed_bytes": int(values.nbytes), "compression": "zip deflate (numpy "
        "savez_compressed)"}
    return path


def sha256_file(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def build_record(command: str, argv: Sequence[str], options: dict, result: RunResult,
                 extra: dict) -> dict:
    """Every setting and result needed to reproduce and judge a run, JSON-ready."""
    trace = result.trace
    walker = trace.walker
    fit = walker.report.laplace
    laplace = {name: getattr(fit, name) for name in (
        "logdensity", "gradient_norm", "iterations", "evaluations",
        "fisher_source", "warnings", "seconds")}
    laplace["warnings"] = [str(w) for w in laplace["warnings"]]
    facts = trace.facts  # names (a model file's names= included), written order
    order = in_written_order(facts.order, facts.dim)
    sd = np.sqrt(np.diag(np.linalg.inv(np.asarray(fit.fisher))))
    laplace["mode"] = {facts.names[j]: float(facts.mode[j]) for j in order}
    laplace["sd"] = {facts.names[j]: float(sd[j]) for j in order}
    return to_plain({
        "format": "fisherwalk-run",
        "format_version": 1,
        "command": command,
        "argv": list(argv),
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "versions": _versions(),
        "platform": platform.platform(),
        "float64": True,
        "seed": options["seed"],
        "keys": {"derivation": "start, warmup, sampling = jax.random.split(jax.random.key("
                               "seed), 3)", **result.keys},
        "options": options,
        "laplace": laplace,
        "tuning": tuningfile.tuning_record(walker),
        "warmup": walker.report.warmup,
        "summary": result.summary.to_dict(),
        "facts": facts_record(facts),
        "sampling": {"seconds": trace.seconds, "complete": trace.complete, "thin": trace.thin,
                     "derived": list(trace.columns()[1][_parameter_columns(trace):]),
                     "space": _space_record(trace),
                     "pointwise_observations": None if trace.pointwise is None
                     else int(trace.pointwise.shape[-1]),
                     "draws": int(trace.flat.shape[1]),
                     "run_length": None if trace.length is None else trace.length._asdict()},
        "seconds": result.seconds,
        **extra,
    })


def _parameter_columns(trace) -> int:
    """How many of trace.columns() are parameters (the model's sites, for a model with
    a space of its own); derived quantities and predictions follow them."""
    return len(trace.space.names) if trace.space is not None else len(trace.names)


def _space_record(trace) -> dict | None:
    """The model's sites for the record (None for a plain log density)."""
    if trace.space is None:
        return None
    return {"language": trace.space.language,
            "note": "draws.npz 'draws' and summary.parameters hold the sites' values "
                    "(constrained); draws.npz 'unconstrained' and this record's laplace and "
                    "tuning are on the sampler's unconstrained coordinates (named after "
                    "their sites)",
            "sites": [{"name": s.name, "shape": list(s.shape), "kind": s.kind}
                      for s in trace.space.sites + trace.space.observed]}


def draws_arrays(trace) -> dict[str, np.ndarray]:
    """draws.npz's arrays: the parameters in the order the user wrote them (a model's
    sites, constrained, when it has a space of its own, with the sampler's coordinates as
    ``unconstrained``), under the same names as the summary and the record; derived
    quantities and predictions after them, under ``derived``/``predicted`` with their own
    names; the sampler's statistics."""
    flat, names = trace.columns()
    dim = _parameter_columns(trace)
    extra = names[dim:]
    arrays = {"draws": flat[..., :dim], "names": np.asarray(names[:dim]),
              "logdensity": np.asarray(trace.logdensity),
              "accepted": np.asarray(trace.accepted),
              "acceptance_rate": np.asarray(trace.acceptance_rate),
              "faults": np.asarray(trace.faults)}
    if trace.space is not None:
        arrays.update(unconstrained=np.asarray(trace.flat),
                      unconstrained_names=np.asarray(trace.names))
    for field in ("divergent", "energy", "gradients"):
        value = getattr(trace, field)
        if value is not None:
            arrays[field] = np.asarray(value)
    derived = 0 if trace.derived is None else len(derived_names(trace.derived))
    if derived:
        arrays["derived"] = flat[..., dim:dim + derived]
        arrays["derived_names"] = np.asarray(extra[:derived])
    if len(extra) > derived:
        arrays["predicted"] = flat[..., dim + derived:]
        arrays["predicted_names"] = np.asarray(extra[derived:])
    return arrays


def write_outputs(out: Path, result: RunResult, record: dict, labels=None, *,
                  focus=None) -> dict[str, Path]:
    """draws.npz, the pointwise log likelihood (compressed, its own file), summary.csv,
    the plots and record.json (written last, listing the other files)."""
    from ..results import plots  # the optional extra 'plots' (matplotlib)

    trace = result.trace
    files = {}
    draws_path = out / "draws.npz"
    arrays = draws_arrays(trace)
    write_atomic(draws_path, lambda handle: np.savez(handle, **arrays))
    files["draws"] = draws_path
    if trace.pointwise is not None:  # walk(pointwise=...): (chains, draws, n_obs)
        files["pointwise"] = write_pointwise(out, trace.pointwise, record)
    table = out / "summary.csv"
    write_text_atomic(table, result.summary.to_csv())
    files["summary"] = table
    for path in plots.save_all(trace, out, labels=labels, focus=focus):
        files[path.stem] = path
    record["files"] = {name: {"path": path.name, "sha256": sha256_file(path)}
                       for name, path in files.items()}
    record_path = out / "record.json"
    write_json_atomic(record_path, record, indent=1)
    files["record"] = record_path
    return files
