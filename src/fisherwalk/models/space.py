"""The model's own space: where its sites live, and how the sampler's coordinates map there.

fisherwalk fits, tunes and samples on an unconstrained space, where the posterior of
log σ is closer to Gaussian than that of σ (the Laplace approximation and the
Bernstein-von Mises picture apply there; change of variables with its log-Jacobian,
e.g. Gelman et al. 2013, Bayesian Data Analysis, 3rd ed., §1.8). A :class:`Space` says
what the user's model looks like instead: its sites in the model's order, their shapes,
which are functions of the others (deterministic sites), and the map ``constrain``
from an unconstrained position to every site's value. It may also carry the observed
sites' pointwise log likelihood and the model's own predictive draws.

A :class:`ModelProblem` is what :func:`fisherwalk.model_problem` and
:func:`fisherwalk.constrained_problem` return: ``logdensity_fn`` and ``position`` go to
:func:`fisherwalk.start` as any log density and position would. The log density carries
its space (:class:`ModelLogDensity`), so refine, walk, resume, handoff and saved tunings
need nothing more, and :func:`space_of` finds it again for the Trace.

This module is plain numpy/JAX: the model languages are imported only by the modules
that read them.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from ..base.pytrees import parameter_names

__all__ = ["Site", "Space", "ModelLogDensity", "ModelProblem", "space_of", "space_note"]


class Site(NamedTuple):
    """One named quantity of a model."""

    name: str
    shape: tuple[int, ...]
    kind: str  # "sample" (a parameter), "deterministic" (a function of them), "observed"

    @property
    def size(self) -> int:
        return int(math.prod(self.shape))


class Space(NamedTuple):
    """The model's own space, and the way there from the sampler's coordinates."""

    language: str  # "numpyro", "pymc" or "declared"
    sites: tuple[Site, ...]  # parameters and deterministic sites, in the model's order
    constrain: Callable  # unconstrained position (pytree) -> {site name: value}, every site
    observed: tuple[Site, ...] = ()  # observed sites, in the model's order
    pointwise: Callable | None = None  # unconstrained position -> (n_obs,), sites in order
    predict: Callable | None = None  # (rng_key, {site: (chains, draws, ...)} or None, n)

    @property
    def names(self) -> tuple[str, ...]:
        """One name per scalar of the model's space (``sigma``, ``w[0]``), model order."""
        return tuple(name for site in self.sites
                     for name in parameter_names({site.name: np.empty(site.shape)}))

    def ordered(self, values: dict) -> dict[str, np.ndarray]:
        """``values`` (site name -> array with leading axes) in the model's site order."""
        return {site.name: np.asarray(values[site.name]) for site in self.sites}

    def columns(self, values: dict, lead: int = 2) -> np.ndarray:
        """The sites ravelled in the model's order: ``(*lead axes, k)``, k = len(names)."""
        parts = []
        for site in self.sites:
            array = np.asarray(values[site.name])
            parts.append(array.reshape(array.shape[:lead] + (site.size,)))
        return np.concatenate(parts, axis=-1)

    def split_pointwise(self, pointwise: np.ndarray) -> dict[str, np.ndarray]:
        """The concatenated pointwise log likelihood ``(chains, draws, n_obs)`` split per
        observed site, each with the site's own shape."""
        out, begin = {}, 0
        lead = pointwise.shape[:-1]
        for site in self.observed:
            out[site.name] = pointwise[..., begin:begin + site.size].reshape(lead + site.shape)
            begin += site.size
        return out


@dataclass(frozen=True)
class ModelLogDensity:
    """A log density on the unconstrained space (log-Jacobians included) that knows the
    model's space. Called like any ``logdensity_fn``."""

    fn: Callable
    space: Space

    def __call__(self, position):
        return self.fn(position)


class ModelProblem(NamedTuple):
    """A model made ready for :func:`fisherwalk.start`:
    ``fisherwalk.start(problem.logdensity_fn, problem.position, key)``."""

    logdensity_fn: ModelLogDensity  # unconstrained position -> log density (Jacobians in)
    position: Any  # a starting point on the unconstrained space: {site: array}
    space: Space  # the model's own space (site names, shapes, the map there)

    @property
    def names(self) -> tuple[str, ...]:
        """The scalar names of the model's space, in the model's order."""
        return self.space.names

    def constrain(self, position) -> dict:
        """An unconstrained position -> every site's value in the model's space."""
        return self.space.constrain(position)


def space_of(logdensity_fn: Any) -> Space | None:
    """The model's space a log density carries, or None for a plain function."""
    return logdensity_fn.space if isinstance(logdensity_fn, ModelLogDensity) else None


def space_note(space: Space | None) -> str:
    """One sentence saying which space a report's figures are in ('' for a plain model)."""
    if space is None:
        return ""
    return ("Estimates are in the model's own space (site names, constrained values, "
            "deterministic sites beside them); the Laplace fit, the proposal, acceptance and "
            "jumps are on the unconstrained space the sampler works on.")
