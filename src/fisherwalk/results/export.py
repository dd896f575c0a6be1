"""A run handed to ArviZ: :func:`to_arviz` builds ``arviz.InferenceData`` from a Trace.

ArviZ (Kumar, Carroll, Hartikainen & Martin 2019, "ArviZ a unified library for
exploratory analysis of Bayesian models in Python", Journal of Open Source Software 4)
is the field's open library of diagnostics and plots; its ``InferenceData`` keeps draws
in groups of labelled arrays with chain and draw dimensions first. The groups filled here:

``posterior``
    One variable per leaf of the user's position, named after its path (``beta``,
    ``sigma``, ``layer.w``), with the leaf's own shape after (chain, draw); derived
    quantities (``walk(derived=...)``) are added as further variables.
``sample_stats``
    ``lp`` (log density), ``acceptance_rate`` (Metropolis acceptance probability),
    ``faults`` (proposals rejected for a NaN/+inf log density); the random walk adds
    ``accepted`` (fraction of the thinned steps accepted); HMC and NUTS add ``energy``
    (the Hamiltonian at each kept draw, what ``arviz.bfmi`` reads) and ``diverging``;
    the gradient samplers add ``n_steps`` (gradient evaluations per draw).
``posterior_predictive``
    The predictions of ``walk(predict=...)``, one variable per leaf.
``log_likelihood``
    ``observations`` with dimension ``observation``, when the trace holds a pointwise log
    likelihood (``walk(pointwise=...)``): what ``arviz.loo`` and ``arviz.waic`` read.

For a model with a space of its own (:func:`fisherwalk.model_problem`,
:func:`fisherwalk.constrained_problem`) the posterior holds the sites' values in the
model's order (constrained, deterministic sites beside them), ``log_likelihood`` one
variable per observed site, filled automatically, and ``posterior_predictive`` (and
``prior``/``prior_predictive`` when ``prior_draws`` is given) come from the model's own
predictive draws, keyed from the run's key (:mod:`fisherwalk.models.predictive`).

The run's settings (the sampler's name, its scale or step size, target acceptance,
shape kind, thin, seconds, version) are
the attributes of the InferenceData and of its posterior and sample_stats groups.
ArviZ is an optional extra: ``pip install fisherwalk[arviz]``.
"""

from __future__ import annotations

from typing import Any

import jax
import numpy as np

from ..base.pytrees import path_parts
from ..errors import InputError, explain
from ..models.predictive import predictive_groups
from .facts import in_written_order

__all__ = ["to_arviz", "leaf_variables", "settings"]


def _import_arviz():
    try:
        import arviz
    except ImportError as err:
        raise InputError(explain(
            "ArviZ is not installed; handing a run to ArviZ needs it.",
            "Trace.to_arviz()",
            "install the optional extra: pip install fisherwalk[arviz]")) from err
    return arviz


def leaf_variables(tree: Any, *, bare: str) -> dict[str, np.ndarray]:
    """One named host array per leaf of ``tree``: ``{"beta": ..., "sigma": ...}``; a
    tuple position gives ``"0"``, ``"1"``; a bare array is named ``bare``."""
    out: dict[str, np.ndarray] = {}
    for path, leaf in jax.tree_util.tree_flatten_with_path(tree)[0]:
        out[".".join(path_parts(path, index="{}")) or bare] = np.asarray(leaf)
    return out


def _written(variables: dict[str, np.ndarray], trace) -> dict[str, np.ndarray]:
    """The posterior's variables in the order the user wrote the position's leaves (the
    rank of a leaf is where its first entry comes in the written order)."""
    facts = trace.facts
    rank = np.empty(facts.dim, dtype=int)
    rank[in_written_order(facts.order, facts.dim)] = np.arange(facts.dim)
    first, start = {}, 0
    for name, shape in facts.leaves:
        size = int(np.prod(shape, dtype=int))
        first[name] = int(rank[start:start + size].min()) if size else facts.dim
        start += size
    return dict(sorted(variables.items(), key=lambda item: first.get(item[0], facts.dim)))


def settings(trace) -> dict[str, Any]:
    """The run's settings as plain attributes (numbers and strings only)."""
    from importlib.metadata import PackageNotFoundError, version

    facts = trace.facts
    try:
        release = version("fisherwalk")
    except PackageNotFoundError:  # pragma: no cover - a source checkout
        release = "unknown"
    return {
        "created_by": "fisherwalk",
        "fisherwalk_version": release,
        "sampler": facts.title,
        facts.setting_label.replace(" ", "_"): float(facts.setting),
        "target_acceptance": float(facts.aim),
        "shape_kind": str(facts.shape_kind),
        "thin": int(trace.thin),
        "seconds": float(trace.seconds),
        "complete": int(bool(trace.complete)),
    }


def to_arviz(trace, *, predictive: bool = True, prior_draws: int = 0):
    """The run as ``arviz.InferenceData`` (groups described in the module docstring).

    Parameters
    ----------
    trace
        A :class:`fisherwalk.Trace` with at least one kept draw.
    predictive
        For a model with predictive draws (NumPyro): fill ``posterior_predictive``.
    prior_draws
        For such a model: this many prior draws in ``prior`` and ``prior_predictive``.

    Returns
    -------
    arviz.InferenceData

    Raises
    ------
    InputError
        ArviZ is not installed (the message names the extra), the trace holds no draws,
        or a derived quantity has the name of a parameter.
    """
    arviz = _import_arviz()
    if trace.draws is None or trace.flat.shape[1] == 0:
        raise InputError(explain("The trace holds no draws.", "Trace.to_arviz()",
                                 "hand over a trace with at least one kept draw."))
    # a model's own space: its sites in the model's order (trace.draws is ordered)
    posterior = (dict(trace.draws) if trace.space is not None
                 else _written(leaf_variables(trace.draws, bare="x"), trace))
    if trace.derived is not None:
        extra = leaf_variables(trace.derived, bare="derived")
        clash = sorted(set(extra) & set(posterior))
        if clash:
            raise InputError(explain(
                f"Derived quantities {', '.join(clash)} have the names of parameters.",
                "Trace.to_arviz()", "name the derived quantities differently."))
        posterior.update(extra)
    stats = {
        "lp": np.asarray(trace.logdensity),
        "acceptance_rate": np.asarray(trace.acceptance_rate),
        "faults": np.asarray(trace.faults),
    }
    if trace.facts.setting_label == "scale":  # the random walk's own 0/1 (or thinned) record
        stats["accepted"] = np.asarray(trace.accepted)
    if trace.divergent is not None:
        stats["diverging"] = np.asarray(trace.divergent, dtype=bool)
    if trace.energy is not None:  # HMC and NUTS: what arviz.bfmi reads
        stats["energy"] = np.asarray(trace.energy)
    if trace.gradients is not None:
        stats["n_steps"] = np.asarray(trace.gradients)
    groups: dict[str, Any] = {"posterior": posterior, "sample_stats": stats}
    if trace.predictions is not None:
        groups["posterior_predictive"] = leaf_variables(trace.predictions, bare="predicted")
    dims = {}
    extra = predictive_groups(trace, predictive, prior_draws)  # {} for a plain model
    if trace.pointwise is not None and "log_likelihood" not in extra:
        groups["log_likelihood"] = {"observations": np.asarray(trace.pointwise)}
        dims["observations"] = ["observation"]
    groups.update(extra)
    attrs = settings(trace)
    return arviz.from_dict(**groups, dims=dims, attrs=dict(attrs),
                           posterior_attrs=dict(attrs), sample_stats_attrs=dict(attrs))
