"""Constrained parameters in hand-written models: declare each once, and fisherwalk applies
the transform to an unconstrained space and its log-Jacobian.

The user writes the log density in the parameters' own terms (``sigma`` positive, ``w``
on a simplex) and declares the constraints; :func:`constrained_problem` returns the log
density of the unconstrained coordinates,

    log p(φ) = log π(T(φ)) + log |det ∂T/∂φ|,

the change of variables of a density (e.g. Gelman et al. 2013, Bayesian Data Analysis,
3rd ed., §1.8), a starting point T⁻¹(position), and the map T back. A forgotten
Jacobian changes the posterior silently; here there is none to forget.

The transforms are NumPyro's (``numpyro.distributions.transforms.biject_to`` of a
``numpyro.distributions.constraints`` object: exp for positive, a scaled logistic for an
interval, stick-breaking for a simplex, cumulative exp for ordered, the LKJ-style
partial correlations for the Cholesky factor of a correlation matrix), never written
here: the same ones NumPyro models use, tested by NumPyro against their Jacobians.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..errors import InputError, ModelError, explain
from .numpyro_model import import_numpyro
from .space import ModelLogDensity, ModelProblem, Site, Space

__all__ = ["constrained_problem", "DECLARATIONS"]

WHERE = "constrained_problem(..., constraints=...)"
DECLARATIONS = ("real", "positive", "interval", "simplex", "ordered", "correlation_cholesky")


def _constraint(name: str, declared: Any):
    """A NumPyro constraint object for one declaration."""
    from numpyro.distributions import constraints

    fixed = {"real": constraints.real, "positive": constraints.positive,
             "simplex": constraints.simplex, "ordered": constraints.ordered_vector,
             "correlation_cholesky": constraints.corr_cholesky}
    if isinstance(declared, str) and declared in fixed:
        return fixed[declared]
    if (isinstance(declared, tuple) and len(declared) == 3 and declared[0] == "interval"):
        lower, upper = (float(v) for v in declared[1:])
        if not (np.isfinite(lower) and np.isfinite(upper) and lower < upper):
            raise InputError(explain(f"The interval of {name!r} is ({lower}, {upper}).",
                                     f"{WHERE}, parameter {name!r}",
                                     "give finite bounds with lower < upper, e.g. "
                                     "('interval', 0.0, 1.0)."))
        return constraints.interval(lower, upper)
    if isinstance(declared, constraints.Constraint):
        return declared
    raise InputError(explain(f"{declared!r} is not a known constraint.",
                             f"{WHERE}, parameter {name!r}",
                             f"declare one of {', '.join(map(repr, DECLARATIONS[:2]))}, "
                             "('interval', lower, upper), 'simplex', 'ordered', "
                             "'correlation_cholesky' (or a NumPyro constraint object)."))


def constrained_problem(logdensity_fn: Callable, position: Mapping[str, Any],
                        constraints: Mapping[str, Any], *,
                        deterministic: Callable | None = None,
                        pointwise: Callable | None = None) -> ModelProblem:
    """A hand-written model with declared constraints, made ready for
    :func:`fisherwalk.start`.

    Parameters
    ----------
    logdensity_fn
        The log posterior in the parameters' own terms: ``position -> scalar`` with
        ``position`` a dict ``{name: array}`` of constrained values.
    position
        A starting point in the parameters' own terms (inside each constraint).
    constraints
        ``{name: declaration}`` for the constrained parameters (the others are real):
        ``"positive"``, ``("interval", lower, upper)``, ``"simplex"`` (a vector summing
        to 1), ``"ordered"`` (an increasing vector), ``"correlation_cholesky"`` (the
        lower Cholesky factor of a correlation matrix), ``"real"``, or a NumPyro
        constraint object.
    deterministic
        Optional ``position -> {name: array}``: quantities computed from the parameters,
        shown beside them in the summary, the plots and ``to_arviz()``.
    pointwise
        Optional ``position -> (n_obs,)``: the log likelihood of each observation, stored
        at every draw (``trace.pointwise``) and handed to ArviZ for ``az.loo``.

    Returns
    -------
    ModelProblem
        ``fisherwalk.start(problem.logdensity_fn, problem.position, key)``.

    Raises
    ------
    InputError
        An unknown constraint or parameter name, a starting value outside its
        constraint, NumPyro not installed.
    """
    import_numpyro()
    from numpyro.distributions.transforms import biject_to

    if not isinstance(position, Mapping) or not position:
        raise InputError(explain("The position is not a dict of named parameters.", WHERE,
                                 "pass e.g. {'mu': 0.0, 'sigma': 1.0}: constraints are "
                                 "declared by name."))
    unknown = sorted(set(constraints) - set(position))
    if unknown:
        raise InputError(explain(f"Constraints are declared for {', '.join(unknown)}, which "
                                 "the position does not hold.", WHERE,
                                 f"declare names among {', '.join(position)}."))
    transforms, start, sites = {}, {}, []
    for name, value in position.items():
        value = jnp.asarray(value, dtype=jnp.result_type(float))
        transform = biject_to(_constraint(name, constraints.get(name, "real")))
        inside = np.asarray(transform.codomain.check(value))
        if not inside.all():
            raise InputError(explain(f"The starting value of {name!r} lies outside its "
                                     f"constraint ({constraints.get(name)!r}).",
                                     f"{WHERE}, parameter {name!r}",
                                     "start inside the constraint (e.g. sigma = 1.0 for "
                                     "'positive', equal weights for 'simplex')."))
        transforms[name] = transform
        start[name] = transform.inv(value)
        sites.append(Site(str(name), tuple(value.shape), "sample"))

    def parameters(unconstrained) -> dict:
        return {name: transforms[name](unconstrained[name]) for name in transforms}

    def logdensity(unconstrained):
        values = parameters(unconstrained)
        jacobian = sum(jnp.sum(transforms[name].log_abs_det_jacobian(
            unconstrained[name], values[name])) for name in transforms)
        return logdensity_fn(values) + jacobian

    def constrain(unconstrained) -> dict:
        values = parameters(unconstrained)
        if deterministic is None:
            return values
        return {**values, **deterministic(values)}

    if deterministic is not None:
        shapes = jax.eval_shape(deterministic, {k: jnp.asarray(v) for k, v in position.items()})
        clash = sorted(set(shapes) & set(position))
        if clash:
            raise InputError(explain(f"Deterministic quantities {', '.join(clash)} have the "
                                     "names of parameters.", "constrained_problem("
                                     "deterministic=...)", "name them differently."))
        sites += [Site(str(k), tuple(v.shape), "deterministic") for k, v in shapes.items()]
    observed: tuple[Site, ...] = ()
    pointwise_fn = None
    if pointwise is not None:
        shape = jax.eval_shape(pointwise, {k: jnp.asarray(v) for k, v in position.items()})
        if len(getattr(shape, "shape", (0, 0))) != 1:
            raise ModelError(explain("The pointwise log likelihood does not return a vector.",
                                     "constrained_problem(pointwise=...)",
                                     "return one log likelihood per observation, (n_obs,)."))
        observed = (Site("observations", tuple(shape.shape), "observed"),)

        def pointwise_fn(unconstrained):
            return pointwise(parameters(unconstrained))

    space = Space("declared", tuple(sites), constrain, observed, pointwise_fn, None)
    return ModelProblem(ModelLogDensity(logdensity, space), start, space)
