"""Where divergent transitions happen, and what that suggests.

A divergent transition (the leapfrog energy error beyond 1000) means the step size cannot
follow the curvature where the trajectory went. Two remedies, for two situations
(Betancourt & Girolami 2015, "Hamiltonian Monte Carlo for hierarchical models", in
Current Trends in Bayesian Methodology with Applications; Papaspiliopoulos, Roberts &
Sköld 2007, Statistical Science 22(1)):

* a funnel: divergences gather where one parameter (a log scale) is low, and there the
  other parameters' spread collapses (a centred hierarchy: θ_j ~ N(μ, τ²) shrinks with
  τ). The non-centred form θ_j = μ + τ z_j removes it.
* anything else (no such collapse, e.g. a model already non-centred): a smaller step,
  i.e. a higher ``target_acceptance`` for dual averaging.

The rules below (divergences' mean percentile of a parameter below :data:`LOW_PERCENTILE`,
and the others' spread in that parameter's lowest decile below :data:`COLLAPSE` times
their overall spread) are our choice (common practice, no published source).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

__all__ = ["DivergenceSite", "divergence_site", "divergence_warning", "LOW_PERCENTILE",
           "COLLAPSE"]

LOW_PERCENTILE = 0.3  # divergences' mean percentile of the parameter they gather at
COLLAPSE = 0.5  # the others' sd in its lowest decile, relative to their overall sd


class DivergenceSite(NamedTuple):
    """Where the divergences gather."""

    index: int  # the parameter whose low values they gather at (-1: none)
    percentile: float  # the divergences' mean percentile of it (0.5: no preference)
    collapse: float  # the others' sd in its lowest decile over their overall sd
    funnel: bool  # a funnel: low percentile and a collapse


def divergence_site(flat: np.ndarray, divergent: np.ndarray) -> DivergenceSite:
    """Locate the divergences in the draws.

    ``flat`` (chains, draws, d), ``divergent`` (chains, draws): a transition's divergence
    is placed at the draw it started from (the previous kept draw; the first draw's own).
    """
    d = flat.shape[-1]
    start = np.concatenate([flat[:, :1], flat[:, :-1]], axis=1).reshape(-1, d)
    hit = np.asarray(divergent).reshape(-1) > 0
    pooled = flat.reshape(-1, d)
    if not hit.any() or pooled.shape[0] < 20:
        return DivergenceSite(-1, 0.5, 1.0, False)
    ranks = np.argsort(np.argsort(pooled, axis=0), axis=0) / (pooled.shape[0] - 1.0)
    # percentile of each divergent start within each parameter's marginal
    percent = np.stack([np.searchsorted(np.sort(pooled[:, i]), start[hit, i]) / pooled.shape[0]
                        for i in range(d)], axis=1)
    mean_pct = percent.mean(axis=0)
    i = int(np.argmin(mean_pct))
    collapse = 1.0
    if d > 1:
        low = ranks[:, i] <= 0.1
        others = np.delete(pooled, i, axis=1)
        overall = others.std(axis=0)
        within = others[low].std(axis=0) if low.sum() > 2 else overall
        ok = overall > 0
        collapse = float(np.median(within[ok] / overall[ok])) if ok.any() else 1.0
    funnel = bool(mean_pct[i] < LOW_PERCENTILE and collapse < COLLAPSE)
    return DivergenceSite(i, float(mean_pct[i]), collapse, funnel)


def divergence_warning(flat: np.ndarray, divergent: np.ndarray, names: tuple[str, ...],
                       aim: float | None) -> str:
    """The summary's warning about divergent transitions, with the remedy that fits where
    they happened (module docstring)."""
    count, total = int(np.sum(divergent)), int(np.size(divergent))
    site = divergence_site(flat, divergent)
    aim_now = 0.8 if aim is None else float(aim)
    higher = min(0.99, round(aim_now + 0.5 * (1.0 - aim_now), 2))
    head = (f"{count} of {total} transitions were divergent (the leapfrog energy error "
            "exceeded 1000): the sampler met curvature its step size cannot follow, and "
            "the draws near there may be biased.")
    if site.funnel:
        name = names[site.index]
        where = (f"Where: at low values of {name} (the divergences' mean percentile of it "
                 f"is {site.percentile:.2f}), where the other parameters' spread shrinks "
                 f"to {site.collapse:.2f} of its overall size: a funnel. The chains "
                 f"could not follow it into the neck at this step size, so the low tail of "
                 f"{name} is under-represented (its mean biased upward, its sd too small).")
        todo = (f"What to do: write the parameters that {name} scales in the non-centred "
                f"form (θ_j = μ + τ z_j, z_j ~ N(0, 1)); if the data per group are strong "
                f"keep the centred form and raise target_acceptance to {higher} "
                "(start(..., target_acceptance=...)).")
    else:
        spot = ("spread over the posterior" if site.index < 0 or site.percentile >= 0.4
                else f"toward low values of {names[site.index]} (mean percentile "
                     f"{site.percentile:.2f}), with no funnel-like collapse of the others")
        where = f"Where: {spot}."
        todo = (f"What to do: raise target_acceptance to {higher} "
                f"(start(..., target_acceptance=...); now {aim_now:.2f}): a smaller step "
                "follows sharper curvature; then compare the estimates.")
    return " ".join((head, where, todo))
