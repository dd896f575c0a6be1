"""PyMC models in: the same :class:`~fisherwalk.models.space.ModelProblem` from a PyMC
model, through the JAX graphs PyMC compiles for its own JAX back end.

PyMC (Abril-Pla et al. 2023, "PyMC: a modern, and comprehensive probabilistic
programming framework in Python", PeerJ Computer Science 9) builds its models as
PyTensor graphs; ``pymc.sampling.jax.get_jaxified_graph`` turns a graph into a JAX
function. Three graphs are all fisherwalk needs, each in terms of the model's value
variables (the unconstrained coordinates, ``sigma_log__``):

- ``model.logp()``, the joint log density with every log-Jacobian;
- the free variables and deterministics in terms of the value variables
  (``model.replace_rvs_by_values``), the map to the model's own space;
- ``model.logp(vars=observed, sum=False)``, the observed variables' pointwise log
  likelihood.

The starting point is the model's own (``model.initial_point()``). PyMC's predictive
sampling is not a JAX function, so a PyMC model has no predictive draws here (use
``pymc.sample_posterior_predictive`` on ``trace.to_arviz()``). PyMC is an optional
extra (``pip install fisherwalk[pymc]``), imported only when a PyMC model is given.
"""

from __future__ import annotations

from typing import Any

import jax.numpy as jnp
import numpy as np

from ..errors import ModelError, explain
from .space import ModelLogDensity, ModelProblem, Site, Space

__all__ = ["is_pymc_model", "pymc_problem"]

WHERE = "model_problem(<PyMC model>)"


def is_pymc_model(model: Any) -> bool:
    """Whether ``model`` is a PyMC model (checked without importing PyMC)."""
    return any(kind.__module__.split(".")[0] == "pymc" and kind.__name__ == "Model"
               for kind in type(model).__mro__)


def pymc_problem(model) -> ModelProblem:
    """A PyMC model made ready for :func:`fisherwalk.start` (see the module docstring).

    Raises
    ------
    ModelError
        A discrete free variable (marginalise it), a minibatch of the data, or a model
        with no free variable.
    """
    from pymc.sampling.jax import get_jaxified_graph

    free = list(model.free_RVs)
    if not free:
        raise ModelError(explain("The PyMC model has no free random variable: nothing to "
                                 "sample.", WHERE, "declare the unknown quantities as "
                                 "random variables without observed=..."))
    for rv in free:
        if not str(rv.type.dtype).startswith("float"):
            raise ModelError(explain(
                f"Variable {rv.name!r} is a discrete free variable ({rv.type.dtype}); "
                "fisherwalk samples continuous parameters on an unconstrained space.",
                f"{WHERE}, variable {rv.name!r}",
                "sum the discrete variable out of the model (marginalise it, e.g. with "
                "pm.Mixture), or use a sampler that handles discrete parameters."))
    for rv in model.observed_RVs:  # observed=pm.Minibatch(...), total_size=...
        if type(rv.owner.op).__name__ == "MinibatchRandomVariable":
            raise ModelError(explain(
                f"Observed variable {rv.name!r} is a minibatch of its data (total_size=...); "
                "the Laplace fit and every sampler here need the log density of all the data.",
                f"{WHERE}, variable {rv.name!r}",
                "pass the whole data set as observed=... and leave out total_size."))
    values = list(model.value_vars)
    order = {name: i for i, name in enumerate(model.named_vars)}
    shown = sorted(free + list(model.deterministics), key=lambda v: order[v.name])
    observed = list(model.observed_RVs)
    joint = get_jaxified_graph(inputs=values, outputs=[model.logp()])
    to_sites = get_jaxified_graph(inputs=values, outputs=model.replace_rvs_by_values(shown))
    start = {v.name: jnp.asarray(x) for v, x in
             ((v, model.initial_point()[v.name]) for v in values)}

    def arguments(position):
        return [position[v.name] for v in values]

    def logdensity(position):
        return joint(*arguments(position))[0]

    def constrain(position) -> dict:
        return dict(zip((v.name for v in shown), to_sites(*arguments(position)), strict=True))

    at_start = constrain(start)
    deterministic = {v.name for v in model.deterministics}
    sites = tuple(Site(v.name, tuple(np.shape(at_start[v.name])),
                       "deterministic" if v.name in deterministic else "sample")
                  for v in shown)
    observed_sites: tuple[Site, ...] = ()
    pointwise_fn = None
    if observed:
        terms = get_jaxified_graph(inputs=values, outputs=model.logp(vars=observed, sum=False))
        shapes = [np.shape(t) for t in terms(*arguments(start))]
        observed_sites = tuple(Site(v.name, tuple(s), "observed")
                               for v, s in zip(observed, shapes, strict=True))

        def pointwise_fn(position):
            return jnp.concatenate([jnp.ravel(t) for t in terms(*arguments(position))])

    space = Space("pymc", sites, constrain, observed_sites, pointwise_fn, None)
    return ModelProblem(ModelLogDensity(logdensity, space), start, space)
