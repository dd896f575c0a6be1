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

from ..base.files import write_atomic
from ..base.jsonio import to_plain, write_json_atomic
from ..run import tuningfile

__all__ = ["RunResult", "build_record", "write_outputs", "sha256_file", "run_keys"]

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
    laplace["mode"] = dict(zip(fit.names, np.asarray(fit.mode_flat).tolist(), strict=True))
    sd = np.sqrt(np.diag(np.linalg.inv(np.asarray(fit.fisher))))
    laplace["sd"] = dict(zip(fit.names, sd.tolist(), strict=True))
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
    a space of its own); derived quantities follow them."""
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


def write_outputs(out: Path, result: RunResult, record: dict, labels) -> dict[str, Path]:
    """draws.npz, the plots and record.json (written last, listing the other files)."""
    from ..results import plots  # the optional extra 'plots' (matplotlib)

    trace = result.trace
    files = {}
    draws_path = out / "draws.npz"
    arrays = {"draws": np.asarray(trace.flat), "names": np.asarray(trace.names),
              "logdensity": np.asarray(trace.logdensity),
              "accepted": np.asarray(trace.accepted)}
    flat, names = trace.columns()
    shown = _parameter_columns(trace)
    if trace.space is not None:  # a model's own space: draws are the sites' values
        arrays.update(draws=flat[..., :shown], names=np.asarray(names[:shown]),
                      unconstrained=np.asarray(trace.flat),
                      unconstrained_names=np.asarray(trace.names))
    if trace.derived is not None:  # walk(derived=...): ravelled after the parameters
        arrays["derived"] = flat[..., shown:]
        arrays["derived_names"] = np.asarray(names[shown:])
    if trace.pointwise is not None:  # walk(pointwise=...): (chains, draws, n_obs)
        arrays["pointwise"] = np.asarray(trace.pointwise)
    write_atomic(draws_path, lambda handle: np.savez(handle, **arrays))
    files["draws"] = draws_path
    for path in plots.save_all(trace, out, labels=labels):
        files[path.stem] = path
    record["files"] = {name: {"path": path.name, "sha256": sha256_file(path)}
                       for name, path in files.items()}
    record_path = out / "record.json"
    write_json_atomic(record_path, record, indent=1)
    files["record"] = record_path
    return files
