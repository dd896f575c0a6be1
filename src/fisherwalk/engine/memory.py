"""How much memory a walk will need, and a refusal before allocating when the machine
does not have it.

The kept draws dominate: ``walk`` holds every kept position (chains x draws x d) and four
numbers per kept draw and chain, the Trace presents the positions as the user's pytree
(one more copy at most), and ``Trace.summary()`` works on float64 copies of them. The
random numbers and the chunk outputs of the engine are bounded
(:data:`fisherwalk.engine.loop.NOISE_BUDGET`), whatever ``thin`` is, but a call's working
arrays (Philox words, uniforms, normals, their casts and the device's copies) hold about
:data:`NOISE_COPIES` float64 copies of one block. ``pointwise`` and ``derived`` store
their values at every kept draw (float64), and the derived ones are summarised with the
parameters. Steps per chain are capped at :data:`MAX_STEPS`.

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
from .loop import DEFAULT_CHUNK, NOISE_BUDGET

__all__ = ["walk_bytes", "available_bytes", "check_walk_memory", "check_steps",
           "check_start_memory", "SUMMARY_COPIES", "NOISE_COPIES", "MAX_STEPS"]

SUMMARY_COPIES = 3  # float64 copies of the positions Trace.summary() may hold at once
# Working float64 copies of one block of random numbers in an engine call: measured, not
# published: walk(draws=10, thin=10**5) at d = 2 and 4 chains grew the peak resident
# memory by 0.68 GiB over thin=1 with one block of 2**22 numbers (32 MiB), about 20 copies
NOISE_COPIES = 20
# Steps per chain a walk may take (draws x thin): 2**50 is beyond any run's reach (13
# days at 10**9 steps a second), and refusing it keeps a mistyped thin from planning a
# loop of billions of pieces (rule of thumb, no published source)
MAX_STEPS = 2**50


def walk_bytes(draws: int, chains: int, dim: int, *, itemsize: int = 8,
               chunk: int = DEFAULT_CHUNK, thin: int = 1, pointwise: int = 0,
               derived: int = 0) -> dict[str, int]:
    """Bytes a walk of ``draws`` kept draws needs, by part: ``draws`` (kept positions, log
    densities, acceptance, the three int32 series, and the Trace's pytree view),
    ``engine`` (the working arrays of one call's random numbers, :data:`NOISE_COPIES`
    copies of at most one block, and one chunk of outputs), ``summary`` (float64 copies
    :func:`Trace.summary` works on) and ``functions`` (``pointwise`` and ``derived``
    values per draw, float64, with one chunk of work; derived values are summarised)."""
    positions = chains * draws * dim * itemsize
    per_draw = chains * draws * (3 * itemsize + 12)
    block = min(NOISE_BUDGET, min(chunk, draws) * thin * chains * (dim + 1))
    engine = NOISE_COPIES * block * 8 + 2 * min(chunk, draws) * chains * (dim + 4) * itemsize
    stored = chains * draws * (pointwise + derived) * 8
    functions = stored + (SUMMARY_COPIES * chains * draws * derived * 8
                          + 2 * min(chains * draws * (pointwise + derived), 1 << 22) * 8
                          if pointwise + derived else 0)
    return {"draws": 2 * positions + per_draw, "engine": engine,
            "summary": SUMMARY_COPIES * chains * draws * dim * 8, "functions": functions}


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


def check_steps(draws: int, thin: int, *, where: str = "walk(thin=...)",
                error: type[FisherwalkError] = InputError) -> None:
    """Refuse ``draws x thin`` steps per chain beyond :data:`MAX_STEPS`, before anything
    is planned or allocated."""
    if draws * thin > MAX_STEPS:
        raise error(explain(
            f"draws={draws} x thin={thin} = {draws * thin:.3g} steps per chain, more than "
            f"the {MAX_STEPS:.3g} a walk may take.", where,
            "check thin (steps per kept draw; e.g. 10 or 100); nothing was sampled."))


def check_start_memory(chains: int, dim: int, *, dtype=np.float64,
                       where: str = "start(chains=...)",
                       error: type[FisherwalkError] = InputError) -> int:
    """Refuse a number of chains whose states (positions, log densities, gradients and
    the start's draws, a few copies) will not fit in memory, before allocating them."""
    need = 8 * chains * (dim + 2) * np.dtype(dtype).itemsize
    have = available_bytes()
    if have is not None and need > have:
        raise error(explain(
            f"{chains} chains x {dim} parameters need about {_size(need)} for their states "
            f"alone; this process can allocate about {_size(have)}.", where,
            f"use fewer chains (at most about {max(int(chains * have / need), 1)}); nothing "
            "was allocated."))
    return need


def check_walk_memory(draws: int, chains: int, dim: int, *, dtype=np.float64,
                      where: str = "walk(draws=...)", todo: str | None = None,
                      error: type[FisherwalkError] = InputError, thin: int = 1,
                      pointwise: int = 0, derived: int = 0) -> int:
    """Refuse a walk whose kept draws and summary will not fit in the memory this
    process can still allocate; returns the estimated bytes.

    Raises
    ------
    error
        With the estimate by part, what is available, and what to do (``todo``, where
        ``{draws}`` stands for the draws that would fit, replaces the advice).
    """
    parts = walk_bytes(draws, chains, dim, itemsize=np.dtype(dtype).itemsize, thin=thin,
                       pointwise=pointwise, derived=derived)
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
            f"sampling {_size(parts['engine'])}"
            + (f", pointwise and derived values {_size(parts['functions'])}"
               if parts["functions"] else "")
            + f"); this process can allocate about "
            f"{_size(have)}.", where,
            advice.format(draws=fit_draws)))
    return need
