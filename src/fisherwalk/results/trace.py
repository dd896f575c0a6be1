"""The draws of a run (:class:`Trace`), and its summary.

A Trace is what :func:`fisherwalk.walk` returns: the kept draws in the user's pytree and
ravelled, the per-draw sampler statistics, the plain facts of the run
(:class:`fisherwalk.results.facts.RunFacts`, all that the summary, the figures and the
export read) and the walker that made them (its chains moved to their last kept draw;
``None`` for a run reopened from its folder). Chain axis first, draw axis second, everywhere.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import jax
import numpy as np

from ..base.pytrees import parameter_names, ravel_batch
from ..models.space import space_note
from .alerts import divergence_warning
from .coverage import mode_caveats
from .diagnostics import whitened_jump
from .facts import RunFacts, in_written_order
from .focus import focus_indices
from .report import summarize

__all__ = ["Trace", "derived_names", "per_step_jump"]


class Trace(NamedTuple):
    """The draws of a run, and what is needed to judge and reproduce them.

    Chain axis first, draw axis second, everywhere. ``flat`` and :attr:`names` are in
    ravelled order (dict keys sorted); :meth:`columns`, the summary, the figures and the
    run folder show the parameters in the order the user wrote them.
    """

    draws: Any  # the user's pytree, each leaf with leading (chains, draws) axes
    logdensity: np.ndarray  # (chains, draws) log density at each kept draw
    accepted: np.ndarray  # (chains, draws) the random walk: 1 if the step was accepted (the
    #                       fraction over the thin steps); a gradient family: the kernel's
    #                       acceptance probability (BlackJAX's acceptance_rate; NUTS has no
    #                       accept/reject, only the mean over its trajectory), as in
    #                       acceptance_rate
    walker: Any  # the walker used (its states at each chain's last kept draw); None reopened
    flat: np.ndarray  # (chains, draws, d) the draws ravelled (parameter order: names)
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
    facts: RunFacts | None = None  # the plain facts of the run (results.facts)
    derived_order: tuple[int, ...] = ()  # derived columns in the order the user wrote them
    predictions: Any = None  # walk(predict=...) pytree, leaves with leading (chains, draws)
    predictions_order: tuple[int, ...] = ()  # prediction columns in written order
    energy: np.ndarray | None = None  # (chains, draws) Hamiltonian energy (HMC, NUTS)
    failures: tuple = ()  # pointwise/derived evaluations that failed (run.derive.EvaluationFailure)
    # The model's own space (fisherwalk.models.space.Space) when the log density came from
    # model_problem / constrained_problem: `draws` then holds every site's value in the
    # model's order (deterministic sites included) while `flat` stays on the unconstrained
    # space the sampler moved on; the summary, plots and to_arviz() show the sites.
    space: Any = None

    @property
    def names(self) -> tuple[str, ...]:
        """Parameter names in ravelled order (the order of ``flat``)."""
        return self.facts.names

    @property
    def unconstrained(self) -> Any:
        """The draws on the sampler's space in the position's pytree (the same as
        ``draws`` unless the model has a space of its own)."""
        return self.walker.unravel_many(self.flat) if self.space is not None else self.draws

    def columns(self) -> tuple[np.ndarray, tuple[str, ...]]:
        """Every summarised column in written order, ``(chains, draws, d + k)``, and the
        names: the parameters (with a model space, the model's sites, constrained, in the
        model's order), then the derived quantities (``walk(derived=...)``), then the
        predictions (``walk(predict=...)``), each in the order the user wrote them."""
        if self.space is not None and self.draws is not None:
            parts = [self.space.columns(self.draws).astype(self.flat.dtype)]
            names = list(self.space.names)
        else:
            order = in_written_order(self.facts.order, self.flat.shape[-1])
            parts, names = [self.flat[..., order]], [self.names[j] for j in order]
        for tree, written, bare in ((self.derived, self.derived_order, "derived"),
                                    (self.predictions, self.predictions_order, "predicted")):
            if tree is None:
                continue
            extra = ravel_batch(tree, 2).astype(self.flat.dtype)
            keep = in_written_order(written, extra.shape[-1])
            parts.append(extra[..., keep])
            tree_names = derived_names(tree, bare=bare)
            names += [tree_names[j] for j in keep]
        values = parts[0] if len(parts) == 1 else np.concatenate(parts, axis=-1)
        return values, tuple(names)

    def to_arviz(self, *, predictive: bool = True, prior_draws: int = 0):
        """The run as ArviZ ``InferenceData`` (:func:`fisherwalk.results.export.to_arviz`;
        needs the optional extra ``arviz``). For a NumPyro model, ``predictive`` fills
        ``posterior_predictive`` and ``prior_draws`` > 0 adds that many prior draws."""
        from .export import to_arviz

        return to_arviz(self, predictive=predictive, prior_draws=prior_draws)

    def summary(self, interval: float = 0.9, focus: Any = None):
        """The diagnostics table (:class:`fisherwalk.results.report.Summary`; print it).

        ``interval`` is the probability of the central interval (0.9: from the 5% to the
        95% quantile). ``focus`` chooses the rows: ``None`` for all, else names, leaf
        names or patterns (:mod:`fisherwalk.results.focus`), e.g. ``focus=["tau",
        "beta*"]``. The acceptance aimed for, the predicted jump and the Gaussian
        picture's acceptance are those of the scale or step size actually used. Derived
        quantities and predictions get rows after the parameters.
        """
        facts = self.facts
        realised = None
        whitening = np.asarray(facts.whitening)
        if self.thin == 1 and self.flat.shape[1] >= 4:  # whitened_jump needs 4 draws
            realised = whitened_jump(self.flat, whitening).per_chain
        elif self.thin > 1 and self.flat.shape[1] >= 4:
            realised = per_step_jump(self.flat, whitening, self.thin)
        limits = {}
        header: tuple[str, ...] = ()
        if self.length is not None:
            limits = {"rhat_limit": self.length.rhat_limit, "ess_limit": self.length.ess_limit}
            header = (self.length.line(),)
        if realised is not None and self.thin > 1:
            header += (f"realised jump per step converted from draws kept every {self.thin} "
                       "steps (AR(1) picture: E|x(t+k) - x(t)|² = 2(1 - (1 - J/2)^k) per "
                       "whitened direction)",)
        if self.space is not None:  # which space the figures are in
            header += (space_note(self.space),)
        flat, names = self.columns()
        dim = self.flat.shape[-1]  # the sampler's coordinates
        order = in_written_order(facts.order, dim)
        keep = focus_indices(names, focus, where="Trace.summary(focus=...)")
        params = [] if self.space is not None else [j for j in keep if j < dim]
        if focus is not None:
            header += (f"focus: {len(keep)} of {len(names)} columns shown "
                       f"({', '.join(map(repr, _focus_texts(focus)))})",)
        shape = np.asarray(facts.shape)[order][params] if params else None
        summary = summarize(
            flat[..., keep],
            tuple(names[j] for j in keep),
            interval=interval,
            target_acceptance=facts.aim,
            scale=facts.setting,
            gaussian_acceptance=facts.predicted_acceptance,
            acceptance_steps=self.accepted,
            predicted_jump=facts.predicted_jump,
            realised_jump=realised,
            faults=self.faults.sum(axis=1),
            gradient_faults=self.gradients is not None,
            header_notes=header,
            # the correlation check compares the draws with the proposal: sampler's space only
            proposal_shape=shape,
            seconds=self.seconds if self.seconds > 0 else None,
            sampler=facts.title,
            setting_label=facts.setting_label,
            acceptance_band=facts.acceptance_band,
            jump_dim=dim,
            **limits,
        )
        modes, flags = mode_caveats(self.flat, self.names, facts.modes_flat,
                                    facts.modes_logdensity, facts.modes_fisher)
        # where the divergences gather, and the remedy that fits (results/divergences.py)
        text = divergence_warning(self.divergent, self.flat, self.names, facts.aim)
        if text:
            summary = summary._replace(warnings=summary.warnings + (text,))
        for failure in self.failures:  # walk(pointwise=/derived=) failed after sampling
            summary = summary._replace(warnings=summary.warnings + (
                f"walk({failure.function}=...) failed after sampling; its values are not "
                f"stored (trace.failures): {failure.message}",))
        if modes and self.space is not None:  # rows are sites, not the sampler's coordinates
            summary = summary._replace(warnings=summary.warnings + (modes,))
        elif modes:
            shown = tuple(flags[int(order[j])] if j < dim else "" for j in keep)
            summary = summary._replace(warnings=summary.warnings + (modes,), flags=shown)
        return summary


def _focus_texts(focus: Any) -> list[str]:
    return [focus] if isinstance(focus, str) else [str(f) for f in focus]


def derived_names(derived: Any, bare: str = "derived") -> tuple[str, ...]:
    """One name per scalar derived quantity, in ravelled order (``k``, ``ratio[0]``), as
    :func:`fisherwalk.base.pytrees.parameter_names` names parameters. ``derived`` has
    leading axes (chains, draws); a bare array is named ``bare``."""
    single = jax.tree.map(lambda leaf: np.empty(np.shape(leaf)[2:]), derived)
    if not jax.tree_util.tree_flatten_with_path(derived)[0][0][0]:  # a bare array
        return parameter_names({bare: single})
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
