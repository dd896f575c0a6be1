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
from .coverage import mode_caveats
from .diagnostics import whitened_jump
from .divergences import divergence_warning
from .report import summarize

__all__ = ["Trace", "derived_names", "per_step_jump"]


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
    length: Any = None  # how the run length was decided and why it stopped (run.plan.RunLength)
    divergent: np.ndarray | None = None  # (chains, draws) divergent transitions (HMC, NUTS)
    gradients: np.ndarray | None = None  # (chains, draws) gradient evaluations (gradient samplers)

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

    def summary(self, interval: float = 0.9):
        """The diagnostics table (:class:`fisherwalk.results.report.Summary`; print it).

        ``interval`` is the probability of the central interval shown beside the median
        (0.9: the 5% and 95% quantiles). The acceptance aimed for, the predicted jump and
        the Gaussian picture's acceptance are those of the scale actually used. Derived
        quantities (``walk(derived=...)``) get rows after the parameters.
        """
        tuning = self.walker.tuning
        warm = getattr(self.walker.report, "warmup", None)
        # What the sampler aimed for: the warm-up's target when it adapted the scale,
        # else the Gaussian picture's prediction at the scale used.
        aim = tuning.target_acceptance if warm is None else warm.target_acceptance
        realised = None
        if self.thin == 1 and self.flat.shape[1] >= 4:  # whitened_jump needs 4 draws
            realised = whitened_jump(self.flat, np.asarray(tuning.whitening)).per_chain
        elif self.thin > 1 and self.flat.shape[1] >= 4:
            realised = per_step_jump(self.flat, np.asarray(tuning.whitening), self.thin)
        limits = {}
        header: tuple[str, ...] = ()
        if self.length is not None:
            limits = {"rhat_limit": self.length.rhat_limit, "ess_limit": self.length.ess_limit}
            header = (self.length.line(),)
        if realised is not None and self.thin > 1:
            header += (f"realised jump per step converted from draws kept every {self.thin} "
                       "steps (AR(1) picture: E|x(t+k) - x(t)|² = 2(1 - (1 - J/2)^k) per "
                       "whitened direction)",)
        flat, names = self.columns()
        summary = summarize(
            flat,
            names,
            interval=interval,
            target_acceptance=aim,
            scale=tuning.scale,
            gaussian_acceptance=tuning.target_acceptance,
            acceptance_steps=self.accepted,
            predicted_jump=tuning.predicted_jump,
            realised_jump=realised,
            faults=self.faults.sum(axis=1),
            header_notes=header,
            proposal_shape=np.asarray(tuning.shape),
            seconds=self.seconds if self.seconds > 0 else None,
            **limits,
        )
        fit = self.walker.report.laplace
        modes, flags = mode_caveats(self.flat, self.names, getattr(fit, "modes_flat", ()),
                                    [h for _, h in fit.modes], getattr(fit, "modes_fisher", ()))
        if self.divergent is not None and self.divergent.sum():
            text = divergence_warning(self.flat, self.divergent, self.names,
                                      getattr(self.walker.tuning, "aim", None))
            summary = summary._replace(warnings=summary.warnings + (text,))
        if modes:
            flags = tuple(flags) + ("",) * (len(names) - len(flags))
            summary = summary._replace(warnings=summary.warnings + (modes,), flags=flags)
        return summary


def derived_names(derived: Any) -> tuple[str, ...]:
    """One name per scalar derived quantity, in ravelled order (``k``, ``ratio[0]``), as
    :func:`fisherwalk.base.pytrees.parameter_names` names parameters. ``derived`` has
    leading axes (chains, draws); a bare array is named ``derived``."""
    single = jax.tree.map(lambda leaf: np.empty(np.shape(leaf)[2:]), derived)
    if not jax.tree_util.tree_flatten_with_path(derived)[0][0][0]:  # a bare array
        return parameter_names({"derived": single})
    return parameter_names(single)


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
