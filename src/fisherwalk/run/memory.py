"""How much memory a walk will need, and a refusal before allocating when the machine
does not have it.

The kept draws dominate: ``walk`` holds every kept position (chains x draws x d) and four
numbers per kept draw and chain, the Trace presents the positions as the user's pytree
(one more copy at most), and ``Trace.summary()`` works on float64 copies of them. The
random numbers and the chunk outputs of the engine are bounded
(:data:`fisherwalk.run.engine.NOISE_BUDGET`), whatever ``thin`` is.

What the machine has is the least of: the kernel's estimate of memory available to new
work (``MemAvailable`` in ``/proc/meminfo``, or free physical pages from ``os.sysconf``),
the room left under a control group's limit (``memory.max``) and under the process's
address-space limit (``RLIMIT_AS``). When none can be read, nothing is refused.
"""

from __future__ import annotations

import contextlib
import os
import resource

import numpy as np

from ..errors import FisherwalkError, InputError, explain
from .engine import DEFAULT_CHUNK, NOISE_BUDGET

__all__ = ["walk_bytes", "available_bytes", "check_walk_memory", "SUMMARY_COPIES"]

SUMMARY_COPIES = 3  # float64 copies of the positions Trace.summary() may hold at once


def walk_bytes(draws: int, chains: int, dim: int, *, itemsize: int = 8,
               chunk: int = DEFAULT_CHUNK) -> dict[str, int]:
    """Bytes a walk of ``draws`` kept draws needs, by part: ``draws`` (kept positions, log
    densities, acceptance, faults, and the Trace's pytree view), ``engine`` (random
    numbers of one call and one chunk of outputs) and ``summary`` (float64 copies
    :func:`Trace.summary` works on)."""
    positions = chains * draws * dim * itemsize
    per_draw = chains * draws * (3 * itemsize + 4)
    engine = 2 * NOISE_BUDGET * 8 + 2 * min(chunk, draws) * chains * (dim + 4) * itemsize
    return {"draws": 2 * positions + per_draw, "engine": engine,
            "summary": SUMMARY_COPIES * chains * draws * dim * 8}


def _meminfo_available() -> int | None:
    with contextlib.suppress(OSError, ValueError):
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    with contextlib.suppress(ValueError, OSError, AttributeError):
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    return None


def _cgroup_room() -> int | None:
    with contextlib.suppress(OSError, ValueError):
        with open("/sys/fs/cgroup/memory.max", encoding="ascii") as handle:
            limit = handle.read().strip()
        if limit == "max":
            return None
        with open("/sys/fs/cgroup/memory.current", encoding="ascii") as handle:
            return int(limit) - int(handle.read().strip())
    return None


def _address_space_room() -> int | None:
    with contextlib.suppress(OSError, ValueError):
        soft, _ = resource.getrlimit(resource.RLIMIT_AS)
        if soft == resource.RLIM_INFINITY:
            return None
        with open("/proc/self/status", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("VmSize:"):
                    return soft - int(line.split()[1]) * 1024
    return None


def available_bytes() -> int | None:
    """Bytes this process can still allocate (see the module docstring), or None when
    the system does not say."""
    known = [n for n in (_meminfo_available(), _cgroup_room(), _address_space_room())
             if n is not None]
    return max(min(known), 0) if known else None


def _size(n: float) -> str:
    return f"{n / 2**20:.0f} MiB" if n < 2**30 else f"{n / 2**30:.1f} GiB"


def check_walk_memory(draws: int, chains: int, dim: int, *, dtype=np.float64,
                      where: str = "walk(draws=...)", todo: str | None = None,
                      error: type[FisherwalkError] = InputError) -> int:
    """Refuse a walk whose kept draws and summary will not fit in the memory this
    process can still allocate; returns the estimated bytes.

    Raises
    ------
    error
        With the estimate by part, what is available, and what to do (``todo``, where
        ``{draws}`` stands for the draws that would fit, replaces the advice).
    """
    parts = walk_bytes(draws, chains, dim, itemsize=np.dtype(dtype).itemsize)
    need = sum(parts.values())
    have = available_bytes()
    if have is not None and need > have:
        fit_draws = int(draws * have / need)
        advice = todo or (
            "keep fewer draws (at most about {draws}): raise thin to take as many steps "
            "with fewer kept draws (thinning costs no memory), use fewer chains, or split "
            "the run into several walk() calls continued from trace.walker; nothing was "
            "sampled.")
        raise error(explain(
            f"{draws} draws x {chains} chains x {dim} parameters need about {_size(need)} "
            f"(kept draws {_size(parts['draws'])}, summary {_size(parts['summary'])}, "
            f"sampling {_size(parts['engine'])}); this process can allocate about "
            f"{_size(have)}.", where,
            advice.format(draws=fit_draws)))
    return need
