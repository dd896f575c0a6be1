"""The one Tuning: a sampler family by name, its metric, and its own tuned parameter.

Every family shares this type; what it tunes is its own field: the random walk's
dimension-free scale l (``scale``; the step is (l/√d)·S z) or a gradient family's
BlackJAX step size (``step_size``). The other field is None: never does one hold the
other's value. Everything else (the factor, the spectrum, the theory's choice, the target
acceptance, the predicted jump) is derived, by the family
(:mod:`fisherwalk.samplers`), so it cannot disagree with what is stored.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from ..engine import proposal
from ..engine.metric import Metric
from ..samplers import registry
from ..samplers.family import Family
from ..theory.randomwalk import is_matched

__all__ = ["Tuning"]


class Tuning(NamedTuple):
    """A family's tuning: the metric (S, L, kind) and its tuned parameter.

    Only what cannot be derived is stored.
    """

    shape: np.ndarray  # (d, d) S; S Sᵀ is the proposal covariance up to l²/d, or the metric
    scale: float | None  # the random walk's l (None for a step-size family)
    whitening: np.ndarray  # (d, d) lower L, L Lᵀ = P, the precision the walker believes
    shape_kind: str  # "fisher", "diagonal", "identity", "user", "saved" or "warm-up"
    criterion: str = "slowest"  # scale criterion for a shape that does not match P
    sampler: str = registry.DEFAULT  # the family's name in the registry
    step_size: float | None = None  # a gradient family's BlackJAX step size (None: rwm)
    aim: float | None = None  # the user's target_acceptance= for dual averaging (None: the
    #                           theory's; only families with ``takes_target_acceptance``)

    @property
    def family(self) -> Family:
        return registry.family(self.sampler, "Tuning.sampler")

    @property
    def metric(self) -> Metric:
        return Metric(np.asarray(self.shape), np.asarray(self.whitening), self.shape_kind)

    @property
    def parameter(self) -> tuple[str, float]:
        """(name, value) of the family's tuned parameter, e.g. ("scale", 2.38)."""
        name = self.family.parameter
        return name, float(getattr(self, name))

    @property
    def dim(self) -> int:
        return int(np.shape(self.shape)[0])

    @property
    def factor(self) -> np.ndarray:
        """(d, d) (l / sqrt(d)) S, the random walk's ``sigma`` for BlackJAX (a square root)."""
        return proposal.proposal_factor(self.shape, self.scale)

    @property
    def spectrum(self) -> np.ndarray:
        """(d,) eigenvalues of A = Sᵀ P S, ascending (all ones when S Sᵀ = P⁻¹)."""
        return self.metric.spectrum

    @property
    def matched(self) -> bool:
        """Whether the shape matches the precision (A = I within rounding)."""
        return bool(is_matched(self.spectrum))

    @property
    def inverse_mass_matrix(self) -> np.ndarray:
        """S Sᵀ, BlackJAX's dense ``inverse_mass_matrix``."""
        return self.metric.inverse_mass_matrix

    @property
    def precision_cholesky(self) -> np.ndarray:
        """Lower C with C Cᵀ = (S Sᵀ)⁻¹ (the whitening itself when the metric matches)."""
        return self.metric.precision_cholesky(self.matched)

    @property
    def choice(self):
        """The theory's choice for this family, shape and d (Gaussian limit)."""
        return self.family.choice(self)

    @property
    def target_acceptance(self) -> float:
        """The acceptance the Gaussian picture predicts at the tuned value."""
        return float(self.family.target_acceptance(self))

    @property
    def predicted_jump(self) -> float:
        """Expected squared jump per step, whitened units."""
        return float(self.family.predicted_jump(self))
