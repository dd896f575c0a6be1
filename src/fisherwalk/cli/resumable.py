"""Resumable command runs: ``fisherwalk run ... --checkpoint`` and ``fisherwalk resume DIR``.

``run --checkpoint`` writes ``DIR/command.json`` (the command line, the options, the keys,
the model and data files with their SHA-256) before it starts, and the sampling keeps its
progress in ``DIR/checkpoint/`` (:mod:`fisherwalk.persistence.checkpoint`). After an
interruption, ``fisherwalk resume DIR --model model.py`` rebuilds the walker from the
checkpoint, checks the model's log density against it, finishes the sampling with the
same draws an uninterrupted run would give, and writes the usual files into ``DIR``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..base.jsonio import read_json, write_json_atomic
from ..errors import InputError, explain
from .runrecord import sha256_file

__all__ = ["PLAN_FILE", "CHECKPOINT_FOLDER", "write_plan", "read_plan", "model_facts",
           "claim_checkpoint"]

PLAN_FILE = "command.json"
CHECKPOINT_FOLDER = "checkpoint"
_FORMAT = "fisherwalk-command"
_MAX_BYTES = 1 << 20


def model_facts(model) -> dict[str, Any]:
    """The model file and data file of a run, for the record and the plan."""
    facts: dict[str, Any] = {
        "model_file": {"path": str(model.path.resolve()), "sha256": sha256_file(model.path),
                       "labels": list(model.labels) if model.labels else None,
                       "fisher": "from the model file" if model.fisher is not None
                       else "autodiff Hessian"}}
    if model.data is not None:
        facts["data_file"] = {"path": str(model.data.path.resolve()),
                              "sha256": model.data.sha256, "rows": model.data.rows,
                              "columns": list(model.data.columns)}
    return facts


def claim_checkpoint(out: Path, *, model_file) -> Path:
    """The checkpoint folder of a new ``run --checkpoint`` in ``out``, refused when ``out``
    holds a checkpointed run already (its command.json and draws are kept: a second run
    there would replace the provenance of the first) or when the name is not a folder."""
    folder = out / CHECKPOINT_FOLDER
    where = f"fisherwalk run --out {out} --checkpoint"
    if folder.is_symlink() or (folder.exists() and not folder.is_dir()):
        raise InputError(explain(f"{folder} exists and is not a folder.", where,
                                 f"remove {folder} or pass another --out; nothing was "
                                 "fitted or sampled."))
    if (folder / "run.json").exists():
        raise InputError(explain(
            f"{out} holds a checkpointed run already ({folder}).", where,
            f"finish it with: fisherwalk resume {out} --model {model_file}; or pass another "
            "--out for a new run. Nothing was written: that run's command.json and "
            "checkpoint are left as they were."))
    return folder


def write_plan(folder: Path, *, argv, options: dict, keys: dict, model,
               pointwise: bool) -> Path:
    """``command.json``: what ``fisherwalk resume`` needs besides the checkpoint."""
    content = {"format": _FORMAT, "format_version": 1, "argv": list(argv),
               "options": options, "keys": keys, "pointwise": bool(pointwise),
               **model_facts(model)}
    return write_json_atomic(folder / PLAN_FILE, content, where=f"fisherwalk run --out {folder}")


def read_plan(folder: Path) -> dict:
    """The plan of a run started with ``--checkpoint`` in ``folder``."""
    path = folder / PLAN_FILE
    where = f"fisherwalk resume {folder}"
    if not path.is_file() or not (folder / CHECKPOINT_FOLDER).is_dir():
        raise InputError(explain(
            f"{folder} holds no resumable run (no {PLAN_FILE} or no {CHECKPOINT_FOLDER}/).",
            where, "give the --out folder of a 'fisherwalk run ... --checkpoint' that was "
                   "interrupted during sampling; a run stopped before sampling began has "
                   "nothing to resume: start it again."))
    plan = read_json(path, max_bytes=_MAX_BYTES, where=where)
    if not isinstance(plan, dict) or plan.get("format") != _FORMAT or not isinstance(
            plan.get("options"), dict) or not isinstance(plan.get("keys"), dict):
        raise InputError(explain(f"{path} is not a plan written by 'fisherwalk run'.", where,
                                 "give the --out folder of a 'fisherwalk run --checkpoint'."))
    return plan
