"""Which of the modes that start() found did the chains visit, parameter by parameter.

A random walk rarely crosses between well separated modes: a parameter's row in the
summary then describes the modes its chains started in, weighted by how many chains
started in each, not by the posterior's mass. This module finds, for each parameter,
the distinct values it takes at the modes (values closer than 3 posterior sd are one),
assigns every draw to the nearest value, and flags the parameter unless every chain has
visited every value.
"""

from __future__ import annotations

import numpy as np

from ..fit.modes import describe_modes

__all__ = ["mode_caveats"]

_SAME_VALUE_SD = 3.0  # mode values of a parameter closer than this many sd are one
_VISIT_SHARE = 0.01  # a chain has visited a value when 1% of its draws are nearest to it


def _values(column: np.ndarray, sd: float) -> np.ndarray:
    """Distinct values of one parameter over the modes (centres of merged groups)."""
    ordered = np.sort(column)
    groups, current = [], [ordered[0]]
    for value in ordered[1:]:
        if value - current[-1] > _SAME_VALUE_SD * sd:
            groups.append(np.mean(current))
            current = []
        current.append(value)
    groups.append(np.mean(current))
    return np.asarray(groups)


def mode_caveats(flat: np.ndarray, names, modes_flat, modes_logdensity, modes_fisher
                 ) -> tuple[str | None, tuple[str, ...]]:
    """(warning or None, one flag per parameter: "modes" or "").

    ``flat`` is (chains, draws, d); the modes are those of
    :class:`fisherwalk.fit.laplace.LaplaceFit` (``modes_flat``, the log densities of
    ``modes``, ``modes_fisher``). Nothing is said when fewer than two modes were found.
    """
    dim = flat.shape[2]
    if len(modes_flat) < 2 or flat.shape[1] == 0:
        return None, ("",) * dim
    points = np.asarray(modes_flat, np.float64)
    sd = np.sqrt(np.max([np.diag(np.linalg.inv(np.asarray(h, np.float64)))
                         for h in modes_fisher], axis=0))
    flags, partial = [], []
    for j in range(dim):
        values = _values(points[:, j], sd[j])
        if values.size < 2:
            flags.append("")
            continue
        nearest = np.argmin(np.abs(flat[:, :, j, None] - values), axis=2)  # (chains, draws)
        share = np.stack([(nearest == k).mean(axis=1) for k in range(values.size)], axis=1)
        every_chain_everywhere = bool(np.all(share >= _VISIT_SHARE))
        flags.append("" if every_chain_everywhere else "modes")
        if not every_chain_everywhere:
            seen = np.flatnonzero(share.max(axis=0) >= _VISIT_SHARE)
            partial.append(f"{names[j]} (modes at {', '.join(f'{v:.3g}' for v in values)}; "
                           f"chains seen at {', '.join(f'{values[k]:.3g}' for k in seen)})")
    text = describe_modes(points, list(modes_logdensity), modes_fisher, names)
    if partial:
        text += (" No chain crossed between the modes of " + "; ".join(partial[:6])
                 + (f" and {len(partial) - 6} more" if len(partial) > 6 else "")
                 + ": their rows (check 'modes') describe the modes the chains started in, "
                 "weighted by how many chains started there, not the posterior.")
    text += (" What to do: a random walk rarely crosses between separated modes (and start() "
             "may not have found them all); report "
             "the modes separately, reparametrise (e.g. order exchangeable components), or "
             "use a sampler built for several modes.")
    return text, tuple(flags)
