"""The draws of a run (:class:`Trace`), and its summary.

A Trace is what :func:`fisherwalk.walk` returns: the kept draws in the user's pytree and
ravelled, the per-draw sampler statistics, and the walker that made them (its chains
moved to their last kept draw). Chain axis first, draw axis second, everywhere.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import jax
import numpy as np

from ..base.pytrees import parameter_names, ravel_batch
from .diagnostics import ess_mean, whitened_jump
from .report import summarize

__all__ = ["Trace", "derived_names"]


class Trace(NamedTuple):
    """The draws of a run, and what is needed to judge and reproduce them.

    Chain axis first, draw axis second, everywhere.
    """

    draws: Any  # the user's pytree, each leaf with leading (chains, draws) axes
    logdensity: np.ndarray  # (chains, draws) log density at each kept draw
    accepted: np.ndarray  # (chains, draws) acceptance indicator (fraction of the thin steps)
    walker: Any  # the walker used; its states moved to each chain's last kept draw
    flat: np.ndarray  # (chains, draws, d) the draws ravelled (parameter order: walker.names)
    acceptance_rate: np.ndarray  # (chains, draws) Metropolis acceptance probability
    faults: np.ndarray  # (chains, draws) proposals with a NaN/+inf log density, rejected
    thin: int  # steps per kept draw
    rng_key: np.ndarray  # key data of the run's key (uint32)
    seconds: float  # wall time of the run, compilation included
    complete: bool  # False when the run was interrupted (the trace holds what finished)
    pointwise: np.ndarray | None = None  # (chains, draws, n_obs) walk(pointwise=...) values
    derived: Any = None  # walk(derived=...) pytree, each leaf with leading (chains, draws)

    @property
    def names(self) -> tuple[str, ...]:
        return self.walker.names

    def columns(self) -> tuple[np.ndarray, tuple[str, ...]]:
        """The draws ravelled with the derived quantities after the parameters:
        ``(chains, draws, d + k)`` and their names (``walk(derived=...)`` adds k)."""
        if self.derived is None:
            return self.flat, self.names
        extra = ravel_batch(self.derived, 2)
        return (np.concatenate([self.flat, extra.astype(self.flat.dtype)], axis=-1),
                self.names + derived_names(self.derived))

    def to_arviz(self):
        """The run as ArviZ ``InferenceData`` (:func:`fisherwalk.results.export.to_arviz`;
        needs the optional extra ``arviz``)."""
        from .export import to_arviz

        return to_arviz(self)

    def summary(self):
        """The diagnostics table (:class:`fisherwalk.results.report.Summary`; print it).
        Derived quantities (``walk(derived=...)``) get rows after the parameters."""
        tuning = self.walker.tuning
        realised = None
        if self.thin == 1 and self.flat.shape[1] > 1:
            realised = whitened_jump(self.flat, np.asarray(tuning.whitening)).mean
        flat, names = self.columns()
        summary = summarize(
            flat,
            names,
            target_acceptance=tuning.target_acceptance,
            acceptance=self.accepted.mean(axis=1),
            predicted_jump=tuning.predicted_jump,
            realised_jump=realised,
            faults=self.faults.sum(axis=1),
        )
        mismatch = _acceptance_mismatch(self.acceptance_rate, tuning)
        if mismatch:
            summary = summary._replace(warnings=summary.warnings + (mismatch,))
        return summary


def derived_names(derived: Any) -> tuple[str, ...]:
    """One name per scalar derived quantity, in ravelled order (``k``, ``ratio[0]``), as
    :func:`fisherwalk.base.pytrees.parameter_names` names parameters. ``derived`` has
    leading axes (chains, draws); a bare array is named ``derived``."""
    single = jax.tree.map(lambda leaf: np.empty(np.shape(leaf)[2:]), derived)
    if not jax.tree_util.tree_flatten_with_path(derived)[0][0][0]:  # a bare array
        return parameter_names({"derived": single})
    return parameter_names(single)


def _acceptance_mismatch(rates: np.ndarray, tuning) -> str | None:
    """A warning when the realised acceptance departs from what the Gaussian picture
    predicts at the walker's scale and shape, beyond 4 Monte Carlo standard errors (ESS of
    the per-step acceptance probabilities) plus 0.005."""
    if rates.shape[1] < 20:
        return None
    predicted = float(tuning.target_acceptance)
    realised = float(rates.mean())
    mcse = float(rates.std() / np.sqrt(max(float(ess_mean(rates)), 1.0)))
    if abs(realised - predicted) <= 4.0 * mcse + 0.005:
        return None
    return (
        f"The realised acceptance {realised:.3f} departs from the {predicted:.3f} that the "
        f"Gaussian picture N(mode, H⁻¹) predicts at scale {tuning.scale:.3f} (Monte Carlo "
        f"error {mcse:.3f}). Where: the whole run. What to do: the posterior is not shaped "
        "like its Laplace approximation here, so the tuning is approximate; compare the "
        "marginals with the Gaussian curves (plots.save_all), and draw more if the ESS is "
        "short."
    )
