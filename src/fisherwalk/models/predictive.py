"""The groups a model with a space of its own adds to ArviZ's ``InferenceData``: the
observed sites' pointwise log likelihood, and predictive draws from the model itself.

Predictive draws are keyed from the run's key (``fold_in(run key, tag)``), so the same
run gives the same draws. The posterior predictive draws one replicate of the observed
sites per kept draw (Gelman, Meng & Stern 1996, "Posterior predictive assessment of
model fitness via realized discrepancies", Statistica Sinica 6); the prior predictive
draws the parameters from their prior and then the observations.
"""

from __future__ import annotations

from typing import Any

import jax
import numpy as np

from ..base.checks import whole_number
from ..base.keys import as_key
from ..errors import InputError, explain

__all__ = ["predictive_groups", "POSTERIOR_TAG", "PRIOR_TAG"]

POSTERIOR_TAG = 0x5EED_0001  # fold_in labels of the run key: one purpose each
PRIOR_TAG = 0x5EED_0002


def predictive_groups(trace, predictive: bool = True, prior_draws: int = 0) -> dict[str, Any]:
    """``log_likelihood``, ``posterior_predictive``, ``prior`` and ``prior_predictive``
    for :func:`fisherwalk.results.export.to_arviz` ({} for a plain log density)."""
    space = trace.space
    if prior_draws:
        prior_draws = whole_number(prior_draws, "prior_draws", "to_arviz(prior_draws=...)")
    if space is None:
        if prior_draws:
            raise InputError(explain(
                "Prior draws need a model that can draw from its prior.",
                "to_arviz(prior_draws=...)",
                "build the model with fisherwalk.model_problem (NumPyro), or leave out "
                "prior_draws."))
        return {}
    groups: dict[str, Any] = {}
    sizes = sum(site.size for site in space.observed)
    if trace.pointwise is not None and space.observed and trace.pointwise.shape[-1] == sizes:
        groups["log_likelihood"] = space.split_pointwise(np.asarray(trace.pointwise))
    if space.predict is None:
        if prior_draws:
            raise InputError(explain(
                f"A model of kind {space.language!r} has no predictive draws.",
                "to_arviz(prior_draws=...)",
                "write the model in NumPyro (fisherwalk.model_problem) to draw from it."))
        return groups
    key = as_key(np.asarray(trace.rng_key, dtype=np.uint32), where="the run's key")
    observed = [site.name for site in space.observed]
    if predictive and observed:
        samples = {site.name: trace.draws[site.name] for site in space.sites
                   if site.kind == "sample"}
        drawn = space.predict(jax.random.fold_in(key, POSTERIOR_TAG), samples, 0)
        replicates = {name: drawn[name] for name in observed if name in drawn}
        if replicates:  # none when every observed site is a numpyro.factor term
            groups["posterior_predictive"] = replicates
    if prior_draws:
        drawn = space.predict(jax.random.fold_in(key, PRIOR_TAG), None, prior_draws)
        one_chain = {name: value[None] for name, value in drawn.items()}
        groups["prior"] = {site.name: one_chain[site.name] for site in space.sites
                           if site.name in one_chain}
        prior_replicates = {name: one_chain[name] for name in observed if name in one_chain}
        if prior_replicates:
            groups["prior_predictive"] = prior_replicates
    return groups
