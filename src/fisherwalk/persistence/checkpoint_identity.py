"""What a checkpoint was written by: the run's identity (draws, chains, key, the family's
own tuned parameter, digests of the proposal, the mode, the starting states and the tuning
record), its fingerprint, and the differences from another run in words."""

from __future__ import annotations

import hashlib

import jax
import numpy as np

from ..base.jsonio import dumps
from ..base.keys import key_data
from ..base.pytrees import name_difference
from .segments import digest, whitened_digests
from .tuningfile import tuning_record

__all__ = ["identity", "legacy_fingerprint", "record_digest", "fingerprint_of", "differences"]


def identity(walker, key, draws: int, thin: int, chunk: int) -> dict:
    positions = np.asarray(walker.flat_positions())
    logdensity = np.asarray(walker.state.logdensity)
    tuning = walker.tuning
    name, value = tuning.parameter
    return {
        "draws": int(draws),
        "thin": int(thin),
        "chunk": int(chunk),
        "chains": int(positions.shape[0]),
        "dim": int(positions.shape[1]),
        "names": list(walker.names),
        "dtype": str(logdensity.dtype),
        "key": {"impl": str(jax.random.key_impl(key)), "data": key_data(key).tolist()},
        # the family's own parameter by its own name (the record digest names the family)
        "tuning": {name: value,
                   "target_acceptance": float(tuning.target_acceptance),
                   "shape_kind": str(tuning.shape_kind)},
        "digests": {"factor": digest(np.asarray(tuning.shape) * value),
                    "mode": digest(walker.report.laplace.mode_flat),
                    "states": digest(positions) + digest(logdensity),
                    "record": record_digest(tuning_record(walker)),
                    **({"whitened": whitened_digests(walker.state)}
                       if walker.family.stores_state else {})},
    }


def legacy_fingerprint(identity: dict) -> str | None:
    """The fingerprint of ``identity`` as a fisherwalk before the whitened digests wrote
    it (None when there is nothing to drop)."""
    digests = identity.get("digests") or {}
    if "whitened" not in digests:
        return None
    return fingerprint_of({**identity, "digests": {k: v for k, v in digests.items()
                                                 if k != "whitened"}})


def record_digest(record: dict) -> str:
    """SHA-256 of every field of a tuning record a resume uses (all but the notes and
    the package version, which a rebuilt walker does not reproduce)."""
    kept = {k: v for k, v in record.items() if k not in ("notes", "package_version")}
    return hashlib.sha256(dumps(kept, sort_keys=True).encode("utf-8")).hexdigest()


def fingerprint_of(identity: dict) -> str:
    return hashlib.sha256(dumps(identity, sort_keys=True).encode("utf-8")).hexdigest()


def differences(there: dict, here: dict) -> list[str]:
    """What differs between a checkpoint's run and this one, in words."""
    out = []
    if there.get("dim") != here["dim"]:
        out.append(f"dimension {there.get('dim')} in the checkpoint, {here['dim']} here")
    elif there.get("names") != here["names"]:
        out.append("other parameters: " + name_difference(
            tuple(there.get("names") or ()), tuple(here["names"]),
            there="the checkpoint", here="this walker"))
    if there.get("dtype") != here["dtype"]:
        out.append(f"float type {there.get('dtype')} in the checkpoint, {here['dtype']} here "
                   "(set jax_enable_x64 as in the original run)")
    for field in ("chains", "draws", "thin", "chunk"):
        if there.get(field) != here[field]:
            out.append(f"{field}={there.get(field)} in the checkpoint, {field}={here[field]} here")
    if there.get("key") != here["key"]:
        out.append("another random key")
    digests = there.get("digests") or {}
    if there.get("tuning") != here["tuning"] or digests.get("factor") != here["digests"]["factor"]:
        old = there.get("tuning") or {}
        # the family's own tuned parameter, by its own name ("scale" or "step_size")
        name = next(k for k in here["tuning"] if k not in ("target_acceptance", "shape_kind"))
        shown = name.replace("_", " ")
        if old.get(name) == here["tuning"][name]:
            out.append(f"another proposal (the same {shown}; the shape, the whitening or the "
                       "target acceptance differs: another walker, or an edited run.json)")
        else:
            out.append(f"another proposal ({shown} {old.get(name)} in the checkpoint, "
                       f"{here['tuning'][name]} here)")
    if digests.get("mode") != here["digests"]["mode"]:
        out.append("another Laplace mode (another model or data set?)")
    if (digests.get("record") != here["digests"]["record"] and not out
            and digests.get("factor") == here["digests"]["factor"]):
        out.append("another tuning record (whitening, Fisher information, Cholesky factor or "
                   "another field differs from this walker's)")
    if digests.get("states") != here["digests"]["states"]:
        out.append("other starting states of the chains (another start() or refine() call)")
    return out
