"""How far an acceptance rate may sit from its target before it costs anything.

The expected squared jump of a Metropolis sampler is flat near its optimum: a scale a
little off the best one loses little. So a realised acceptance that differs from the
target is worth a warning only when it also lies where the jump has fallen well below its
best. :func:`acceptance_band` gives that range of acceptance rates: the acceptances of
the scales (or steps) at which the Gaussian limit's jump stays at or above ``keep`` (80%
by default) of its maximum, for this dimension and proposal shape.

- Random walk: the jump J(l) and acceptance a(l) of :func:`fisherwalk.theory.randomwalk.
  acceptance_curve` (Roberts, Gelman & Gilks 1997, "Weak convergence and optimal scaling
  of random walk Metropolis algorithms", Annals of Applied Probability 7(1)); for a shape
  that does not match the posterior, the slowest direction's jump (the criterion the
  scale was chosen by).
- MALA: the jump and acceptance of :func:`fisherwalk.theory.gradient.mala_jump` (Roberts &
  Rosenthal 1998, "Optimal scaling of discrete approximations to Langevin diffusions",
  JRSS B 60(1)).
- HMC and NUTS: no per-step jump is used here. Beskos, Pillai, Roberts, Sanz-Serna &
  Stuart (2013), "Optimal tuning of the hybrid Monte Carlo algorithm", Bernoulli 19(5A),
  show HMC's efficiency flat for acceptances between about 0.6 and 0.9 (read from their
  efficiency curve, recalled from memory); NUTS is given the same band around its
  dual-averaging target 0.8 (common practice, no published source).

The 80% is fisherwalk's own threshold (no published source): a fifth of the jump lost is
about a fifth of the ESS per step lost, the size of difference a user would act on.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .gradient import mala_acceptance, mala_jump
from .randomwalk import acceptance_curve, is_matched

__all__ = ["acceptance_band", "KEEP", "STEEP_BAND"]

KEEP = 0.8  # the band keeps this fraction of the best jump
STEEP_BAND = (0.6, 0.9)  # HMC (Beskos et al. 2013, recalled) and NUTS (no published source)


def _band(acceptance: np.ndarray, jump: np.ndarray, keep: float) -> tuple[float, float]:
    good = jump >= keep * np.max(jump)
    return float(np.min(acceptance[good])), float(np.max(acceptance[good]))


def acceptance_band(sampler: str, dim: int, spectrum: Any = None, *,
                    keep: float = KEEP) -> tuple[float, float]:
    """The acceptances at which the Gaussian limit keeps ``keep`` of the best jump.

    Parameters
    ----------
    sampler : "rwm", "mala", "hmc" or "nuts".
    dim : the number of parameters d.
    spectrum : eigenvalues of A = Sᵀ H S (random walk only; None or all ones: matched).
    keep : fraction of the maximal expected squared jump the band keeps (0 < keep < 1).

    Returns
    -------
    (lowest, highest) acceptance rate inside the band.
    """
    if sampler in ("hmc", "nuts"):
        return STEEP_BAND
    if sampler == "mala":
        grid = np.geomspace(0.05, 4.0, 160)
        return _band(np.asarray(mala_acceptance(grid, dim)), np.asarray(mala_jump(grid, dim)),
                     keep)
    values = None if spectrum is None or is_matched(spectrum) else np.asarray(spectrum)
    grid = np.geomspace(0.05, 12.0, 160)
    curve = acceptance_curve(grid, dim, values)
    jump = curve.jump_distance if values is None else curve.slowest_jump
    return _band(np.asarray(curve.acceptance), np.asarray(jump), keep)
