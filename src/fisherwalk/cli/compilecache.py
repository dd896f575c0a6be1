"""JAX's persistent compilation cache, switched on by the command line.

Compilation is the largest fixed cost of a short run; the cache keeps compiled code on
disk so that a repeated run of the same model compiles almost nothing
(``benchmarks/RESULTS.md`` measured it). The command is an application and may change
JAX's configuration for itself; the library never does. The folder is
``$XDG_CACHE_HOME/fisherwalk/jax`` (``~/.cache/fisherwalk/jax`` by default); the flag
``--no-compile-cache`` switches the cache off, and ``record.json`` says which applied.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

__all__ = ["cache_folder", "switch", "entries"]


def cache_folder() -> Path:
    """The user's cache folder for fisherwalk's compiled code."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(Path.home(), ".cache")
    return Path(base) / "fisherwalk" / "jax"


def entries(folder: Path | None) -> int:
    """Number of entries in the cache folder (0 when there is none)."""
    if folder is None or not folder.is_dir():
        return 0
    with os.scandir(folder) as listing:
        return sum(1 for _ in listing)


def switch(enabled: bool) -> dict:
    """Switch JAX's persistent compilation cache on (in :func:`cache_folder`) or off.

    Every compiled function is cached (no minimum compile time or size: the loop of a
    small model compiles in well under JAX's default threshold of one second). Returns
    the facts for ``record.json``; a folder that cannot be created leaves the cache off,
    with a note on standard error.
    """
    import jax

    if not enabled:
        jax.config.update("jax_compilation_cache_dir", None)
        return {"used": False, "reason": "--no-compile-cache"}
    folder = cache_folder()
    try:
        folder.mkdir(parents=True, exist_ok=True, mode=0o700)
    except OSError as err:
        print(f"fisherwalk: the compilation cache is off: {folder} cannot be created ({err})",
              file=sys.stderr)
        jax.config.update("jax_compilation_cache_dir", None)
        return {"used": False, "reason": f"{folder} cannot be created"}
    jax.config.update("jax_compilation_cache_dir", str(folder))
    jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.0)
    jax.config.update("jax_persistent_cache_min_entry_size_bytes", -1)
    return {"used": True, "folder": str(folder), "entries_before": entries(folder)}
