"""The draws of a run (:class:`Trace`), and its summary.

A Trace is what :func:`fisherwalk.walk` returns: the kept draws in the user's pytree and
ravelled, the per-draw sampler statistics, and the walker that made them (its chains
moved to their last kept draw). Chain axis first, draw axis second, everywhere.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from .coverage import mode_caveats
from .diagnostics import ess_mean, whitened_jump
from .report import summarize

__all__ = ["Trace", "per_step_jump"]


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
    length: Any = None  # how the run length was decided and why it stopped (run.plan.RunLength)

    @property
    def names(self) -> tuple[str, ...]:
        return self.walker.names

    def summary(self):
        """The diagnostics table (:class:`fisherwalk.results.report.Summary`; print it)."""
        tuning = self.walker.tuning
        realised = None
        if self.thin == 1 and self.flat.shape[1] >= 4:  # whitened_jump needs 4 draws
            realised = whitened_jump(self.flat, np.asarray(tuning.whitening)).mean
        elif self.thin > 1 and self.flat.shape[1] >= 4:
            realised = per_step_jump(self.flat, np.asarray(tuning.whitening), self.thin)
        limits = {}
        header = ()
        if self.length is not None:
            limits = {"rhat_limit": self.length.rhat_limit, "ess_limit": self.length.ess_limit}
            header = (self.length.line(),)
        if realised is not None and self.thin > 1:
            header += (f"realised jump per step converted from draws kept every {self.thin} "
                       "steps (AR(1) picture: E|x(t+k) - x(t)|² = 2(1 - (1 - J/2)^k) per "
                       "whitened direction)",)
        summary = summarize(
            self.flat,
            self.names,
            target_acceptance=tuning.target_acceptance,
            acceptance=self.accepted.mean(axis=1),
            predicted_jump=tuning.predicted_jump,
            realised_jump=realised,
            faults=self.faults.sum(axis=1),
            header_notes=header,
            **limits,
        )
        mismatch = _acceptance_mismatch(self.acceptance_rate, tuning)
        if mismatch:
            summary = summary._replace(warnings=summary.warnings + (mismatch,))
        fit = self.walker.report.laplace
        modes, flags = mode_caveats(self.flat, self.names, getattr(fit, "modes_flat", ()),
                                    [h for _, h in fit.modes], getattr(fit, "modes_fisher", ()))
        if modes:
            summary = summary._replace(warnings=summary.warnings + (modes,), flags=flags)
        return summary


def per_step_jump(flat: np.ndarray, whitening: np.ndarray, thin: int) -> float:
    """Realised squared jump per step (whitened units, summed over directions) from draws
    kept every ``thin`` steps.

    A direction whose lag-1 autocorrelation is rho = 1 - J/2 (J its squared jump per step,
    unit variance) has E|x(t+k) - x(t)|² = 2(1 - rho^k) under the AR(1) picture (an
    approximation, no published source for random-walk Metropolis); inverting it per
    whitened direction gives J = 2(1 - (1 - D/2)^(1/k)) from the measured D per kept draw.
    For k = 1 it is the measured jump itself.
    """
    white = np.asarray(flat) @ np.asarray(whitening)  # z = Lᵀ θ, row-vector form
    moves = np.diff(white, axis=1)
    kept = np.mean(moves**2, axis=(0, 1))  # (d,) per whitened direction, per kept draw
    half = np.clip(kept / 2.0, 0.0, 1.0)
    per_step = 2.0 * (1.0 - (1.0 - half) ** (1.0 / thin))
    return float(np.sum(per_step))


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
