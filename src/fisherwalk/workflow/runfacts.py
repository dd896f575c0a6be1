"""The plain facts of a run, built once from its walker for the results to read.

:func:`run_facts` is the one place that reads a walker's tuning and reports for the
results (:class:`fisherwalk.results.facts.RunFacts`); the summary, the plots, the ArviZ
export and the run folder's record read the facts, never the walker.
"""

from __future__ import annotations

import jax
import numpy as np

from ..base.pytrees import path_parts
from ..results.facts import RunFacts

__all__ = ["run_facts"]


def _leaves(mode) -> tuple[tuple[str, tuple[int, ...]], ...]:
    out = []
    for path, leaf in jax.tree_util.tree_flatten_with_path(mode)[0]:
        out.append((".".join(path_parts(path, index="{}")) or "x", tuple(np.shape(leaf))))
    return tuple(out)


def run_facts(walker) -> RunFacts:
    """The facts of ``walker``'s run: sampler, aim, scale or step size, predictions,
    whitening, Laplace modes, warm-up."""
    tuning, report = walker.tuning, walker.report
    fit, warm = report.laplace, report.warmup
    family = tuning.family
    parameter, setting = tuning.parameter
    predicted = float(tuning.target_acceptance)
    spectrum = np.asarray(tuning.spectrum, dtype=float)
    return RunFacts(
        sampler=family.name,
        title=family.label,
        setting_label=parameter.replace("_", " "),
        setting=float(setting),
        setting_theory=float(setting if warm is None else warm.tuned_start),
        aim=float(warm.target_acceptance) if warm is not None else predicted,
        predicted_acceptance=predicted,
        predicted_jump=None if tuning.predicted_jump is None else float(tuning.predicted_jump),
        acceptance_band=tuple(family.acceptance_band(tuning)),  # the family's own theory
        shape=np.asarray(tuning.shape, dtype=float),
        whitening=np.asarray(tuning.whitening, dtype=float),
        shape_kind=str(tuning.shape_kind),
        spectrum=spectrum,
        names=tuple(walker.names),
        order=tuple(getattr(fit, "order", ()) or range(walker.dim)),
        mode=np.asarray(fit.mode_flat, dtype=float),
        fisher_cholesky=np.asarray(fit.cholesky, dtype=float),
        modes_flat=tuple(np.asarray(m, dtype=float) for m in getattr(fit, "modes_flat", ())),
        modes_logdensity=tuple(float(h) for _, h in fit.modes),
        modes_fisher=tuple(np.asarray(m, dtype=float) for m in getattr(fit, "modes_fisher", ())),
        warmup_steps=None if warm is None else int(getattr(warm, "steps", 0)),
        leaves=_leaves(fit.mode),
    )
