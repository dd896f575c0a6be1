"""Detect float32 computation and say what to do (never change JAX's configuration)."""

from __future__ import annotations

import jax
import numpy as np

from ..errors import Float32Warning, warn_user

_ENABLE_LINE = 'jax.config.update("jax_enable_x64", True)'
_warned = False


def x64_enabled() -> bool:
    """Whether JAX computes in float64 by default."""
    return bool(jax.config.read("jax_enable_x64"))


def warn_if_float32() -> None:
    """Warn once per process when JAX runs in float32.

    Log likelihoods summed over 10^4 or more observations, and their Hessians,
    lose most of their digits in float32: the mode and the Fisher information
    become unreliable. fisherwalk never flips the flag itself (that would change
    the user's other computations); it tells the user the line that does.
    """
    global _warned
    if _warned or x64_enabled():
        return
    _warned = True
    warn_user(
        "JAX is computing in float32. The Laplace fit (mode and Fisher information) "
        "loses precision on log densities summed over many observations.\n"
        f"  what to do: put `import jax; {_ENABLE_LINE}` at the top of your script, "
        "before any array is created (or set the environment variable JAX_ENABLE_X64=1).",
        Float32Warning,
    )


def working_dtype() -> np.dtype:
    """The floating type fisherwalk computes in: float64 with x64 enabled, else float32."""
    return np.dtype(np.float64 if x64_enabled() else np.float32)
