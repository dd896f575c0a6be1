"""What a checkpoint's files hold and how big they may be: the arrays of a segment file
(the list :meth:`fisherwalk.persistence.checkpoint.Store.save` writes and the size bound a read
checks, computed from the same list), the size bound of ``state.json``, and the digests
of a gradient sampler's whitened state.

A segment ``segment-NNNNNN.npz`` of draws ``[start, stop)`` holds the collector's arrays
(:data:`ARRAYS`: positions, log densities, acceptance, acceptance rates and the three
int32 series faults, divergent, gradients; and :data:`OPTIONAL`: the Hamiltonian energy of
HMC and NUTS, NaN for the other families, absent from segments written before it was kept)
in that range, its start and stop, the run's
fingerprint and the SHA-256 digests of the whitened state saved with it (empty for the
random walk).
"""

from __future__ import annotations

import hashlib
import io
from typing import Any

import numpy as np

__all__ = ["ARRAYS", "OPTIONAL", "WHITENED_FIELDS", "segment_layout", "segment_data",
           "segment_bytes", "segment_text", "state_bytes", "whitened_digests", "changed_field",
           "digest"]

ARRAYS = ("flat", "logdensity", "accepted", "acceptance_rate", "faults", "divergent",
          "gradients")
OPTIONAL = ("energy",)  # written always, read when present (older segments lack it)
_NUMBER_BYTES = 32  # a number in JSON: at most 24 characters (-1.2345678901234567e-308)
# or a quoted non-finite token, a comma and a space; rounded up

_MEMBER_BYTES = 1024  # per .npz member: its .npy header (padded to 64 bytes, under 256
# for these shapes), the zip local header and central-directory entry with their zip64
# extras and the member's name (about 200 bytes); rounded up
_ZIP_END_BYTES = 1024  # the end-of-central-directory records (zip64 included)
_FINGERPRINT = np.dtype("<U64")  # the fingerprint member: 64 hexadecimal characters
_WHITENED = np.dtype("S240")  # ASCII digests of a gradient sampler's whitened state (at
# most 230 characters; b"" for the random walk, written as the 1-byte string it is)
WHITENED_FIELDS = ("position", "logdensity", "logdensity_grad")


def segment_layout(collector, start: int, stop: int) -> dict[str, tuple[tuple, np.dtype]]:
    """(shape, dtype) of every array a segment of draws ``[start, stop)`` holds: the
    collector's arrays in that range, and the start, stop and fingerprint members. The
    same list that :meth:`Store.save` writes, so the size bound cannot drift from it."""
    layout = {}
    for name in (*ARRAYS, *OPTIONAL):
        array = getattr(collector, name)
        layout[name] = ((array.shape[0], stop - start, *array.shape[2:]), array.dtype)
    layout.update(start=((), np.dtype(np.int64)), stop=((), np.dtype(np.int64)),
                  fingerprint=((), _FINGERPRINT), whitened=((), _WHITENED))
    return layout


def segment_data(collector, start: int, stop: int, fingerprint: str,
                 whitened: str = "") -> bytes:
    """The .npz file of a segment of draws ``[start, stop)``: the arrays of
    :func:`segment_layout`, uncompressed (``whitened``: :func:`whitened_digests` of the
    state saved with it, for a gradient sampler)."""
    arrays = {name: getattr(collector, name)[:, start:stop] for name in (*ARRAYS, *OPTIONAL)}
    arrays.update(start=np.int64(start), stop=np.int64(stop),
                  fingerprint=np.array(fingerprint, dtype=_FINGERPRINT),
                  whitened=np.array(whitened.encode("ascii"),
                                    dtype=f"S{max(len(whitened), 1)}"))
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def segment_bytes(layout: dict[str, tuple[tuple, np.dtype]]) -> int:
    """An upper bound on the size of the uncompressed .npz file of ``layout`` (from
    :func:`segment_layout`): each array's bytes, plus a bounded overhead per member and
    for the zip directory's end."""
    data = sum(int(np.prod(shape, dtype=np.int64)) * np.dtype(dtype).itemsize
               for shape, dtype in layout.values())
    return data + len(layout) * _MEMBER_BYTES + _ZIP_END_BYTES


def segment_text(value: np.ndarray) -> str:
    """A segment's short ASCII member as text ("" when it is not one)."""
    item = value.item() if value.shape == () else b""
    return item.decode("ascii", "replace") if isinstance(item, bytes) else ""



def whitened_digests(state) -> str:
    """``"position:<sha256>,logdensity:<sha256>,logdensity_grad:<sha256>"`` of a gradient
    sampler's whitened chain state, or "" for None (a family whose state is the kept draw)."""
    if state is None:  # a family whose checkpoints keep only the kept draw
        return ""
    return ",".join(f"{f}:{digest(getattr(state, f))}" for f in WHITENED_FIELDS)


def changed_field(recorded: str, state, prefix: str) -> str | None:
    """The first whitened field whose digest differs from ``recorded`` (None: same)."""
    here = dict(part.split(":", 1) for part in whitened_digests(state).split(",") if part)
    there = dict(part.split(":", 1) for part in recorded.split(",") if ":" in part)
    for field in WHITENED_FIELDS:
        if here.get(field) != there.get(field):
            return f"{prefix}{field}"
    return None


def state_bytes(chains: int, dim: int, draws: int, chunk: int) -> int:
    """An upper bound on the size of ``state.json`` of a run: the chains' position and
    log density, a gradient sampler's whitened position, log density and gradient
    (``3 chains d + 2 chains`` numbers), one digest per segment (at most one segment per
    chunk) and 64 KiB for the keys and layout. A padded file is refused by its size,
    before a byte of it is parsed."""
    segments = -(-draws // chunk)
    return (_NUMBER_BYTES * (3 * chains * dim + 2 * chains) + 72 * segments + 64 * 1024)


def digest(array: Any) -> str:
    a = np.ascontiguousarray(np.asarray(array))
    h = hashlib.sha256()
    h.update(a.dtype.str.encode())
    h.update(repr(a.shape).encode())
    h.update(a.tobytes())
    return h.hexdigest()
