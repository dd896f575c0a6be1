"""NumPyro models in: :func:`model_problem` turns a NumPyro model and its arguments into a
log density on the unconstrained space and the map back to the model's sites.

NumPyro (Phan, Pradhan & Jankowiak 2019, "Composable effects for flexible and
accelerated probabilistic programming in NumPyro", arXiv:1912.11554) already computes
what fisherwalk needs, so nothing here re-derives it:

- the log density on the unconstrained space with every log-Jacobian
  (``numpyro.infer.util.initialize_model``: the negative of its potential) and a
  starting point from the model's own initialisation;
- the map to the constrained space, deterministic sites included
  (``numpyro.infer.util.constrain_fn``);
- the observed sites' pointwise log likelihood (``numpyro.infer.util.log_likelihood``),
  for leave-one-out cross-validation;
- predictive draws (``numpyro.infer.Predictive``), prior and posterior.

What fisherwalk cannot use is refused before any work, each with what to do: a plate
with a subsample size (the Laplace fit needs the log density of all the data), a
discrete latent site (no unconstrained space), no latent site at all, a site whose
support has no transform. NumPyro is an optional extra (``pip install
fisherwalk[numpyro]``), imported only when a model is read.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from ..base.keys import as_key
from ..errors import InputError, ModelError, explain
from .pymc_model import is_pymc_model, pymc_problem
from .space import ModelLogDensity, ModelProblem, Site, Space

__all__ = ["model_problem", "import_numpyro"]

WHERE = "model_problem(model, ...)"


def import_numpyro():
    """NumPyro, or an error naming the optional extra."""
    try:
        import numpyro
    except ImportError as err:
        raise InputError(explain(
            "NumPyro is not installed; reading a NumPyro model (or declaring constrained "
            "parameters, whose transforms come from NumPyro) needs it.", WHERE,
            "install the optional extra: pip install fisherwalk[numpyro]")) from err
    return numpyro


def _messengers():
    """Two small NumPyro effect handlers: one refuses a subsampled plate as soon as the
    model opens it, one lets observed sites draw (for predictive draws)."""
    from numpyro.primitives import Messenger

    class RefuseSubsample(Messenger):
        def process_message(self, msg):
            if msg["type"] == "plate":
                size, subsample = msg["args"][:2]
                if subsample is not None and subsample != size:
                    raise ModelError(explain(
                        f"Plate {msg['name']!r} draws a subsample of {subsample} of its "
                        f"{size} members; the Laplace fit and every sampler here need the log "
                        "density of all the data.",
                        f"{WHERE}, plate {msg['name']!r}",
                        "leave out subsample_size (or set it to the plate's size); a data "
                        "set too large for memory can be split over devices instead "
                        "(fisherwalk's sharded log density)."))

    class Unobserve(Messenger):
        def process_message(self, msg):
            if msg["type"] == "sample" and msg["is_observed"]:
                msg["value"] = None
                msg["is_observed"] = False

    return RefuseSubsample, Unobserve


def _trace(model, args, kwargs, key):
    from numpyro import handlers

    refuse, _ = _messengers()
    try:
        return handlers.trace(refuse(handlers.seed(model, key))).get_trace(*args, **kwargs)
    except ModelError:
        raise
    except Exception as err:  # noqa: BLE001 - the user's model: report what it raised
        raise ModelError(explain(f"Running the model raised {type(err).__name__}: {err}",
                                 WHERE, "check that model(*args, **kwargs) runs as NumPyro "
                                 "would run it (the data and shapes given).")) from err


def _is_discrete(support) -> bool:
    try:
        return bool(support.is_discrete)
    except NotImplementedError:  # a support known only at run time: not a discrete one
        return False


def _sites(trace) -> tuple[tuple[Site, ...], tuple[Site, ...]]:
    """(latent and deterministic sites, observed sites), each in the model's order."""
    from numpyro.distributions.transforms import biject_to

    sites, observed = [], []
    for name, site in trace.items():
        if site["type"] == "deterministic":
            sites.append(Site(name, tuple(np.shape(site["value"])), "deterministic"))
        if site["type"] != "sample":
            continue
        if site["is_observed"]:
            shape = np.shape(site["fn"].log_prob(site["value"]))
            observed.append(Site(name, tuple(shape), "observed"))
            continue
        support = site["fn"].support
        if _is_discrete(support):
            raise ModelError(explain(
                f"Site {name!r} is a discrete latent variable ({type(site['fn']).__name__}); "
                "fisherwalk samples continuous parameters on an unconstrained space.",
                f"{WHERE}, site {name!r}",
                "sum the discrete variable out of the model (marginalise it: e.g. write a "
                "mixture as dist.MixtureSameFamily, or add its terms with logsumexp in "
                "numpyro.factor), or use a sampler that handles discrete parameters."))
        try:
            biject_to(support)
        except NotImplementedError:
            raise ModelError(explain(
                f"Site {name!r} has a support ({support}) that no transform maps to an "
                "unconstrained space.", f"{WHERE}, site {name!r}",
                "give the site a distribution with a standard support (real, positive, an "
                "interval, a simplex, ...), or sample an unconstrained variable and compute "
                "the site from it with numpyro.deterministic.")) from None
        sites.append(Site(name, tuple(np.shape(site["value"])), "sample"))
    if not any(site.kind == "sample" for site in sites):
        raise ModelError(explain(
            "The model has no latent sample site: nothing to sample.", WHERE,
            "declare the unknown quantities with numpyro.sample('name', prior) (observed "
            "sites carry obs=...)."))
    return tuple(sites), tuple(observed)


def model_problem(model: Callable, args: tuple = (), kwargs: dict | None = None, *,
                  rng_key: jax.Array | None = None) -> ModelProblem:
    """A NumPyro model made ready for :func:`fisherwalk.start`.

    Parameters
    ----------
    model
        A NumPyro model, a Python function with ``numpyro.sample`` sites (observed sites
        carry ``obs=...``), ``numpyro.deterministic`` sites and plates; or a PyMC model
        (``pymc.Model``, which holds its data: no arguments; see
        :mod:`fisherwalk.models.pymc_model`).
    args, kwargs
        The model's arguments (data included), as in ``model(*args, **kwargs)``.
    rng_key
        Key of the model's own initialisation (NumPyro's default: uniform in (-2, 2) on
        the unconstrained space); default ``jax.random.key(0)``.

    Returns
    -------
    ModelProblem
        ``logdensity_fn`` (unconstrained, log-Jacobians included) and ``position`` go to
        :func:`fisherwalk.start`; ``space`` holds the sites in the model's order, the map
        to their values, the observed sites' pointwise log likelihood and the predictive
        draws. The Trace of a walk then shows the sites' values under their names.

    Raises
    ------
    ModelError
        A subsampled plate, a discrete latent site, no latent site, a support without a
        transform, or a model that fails to run.
    InputError
        NumPyro is not installed.

    Examples
    --------
    >>> problem = fisherwalk.model_problem(model, (x,), {"y": y})      # doctest: +SKIP
    >>> walker = fisherwalk.start(problem.logdensity_fn, problem.position, key)  # +SKIP
    """
    if is_pymc_model(model):  # the same problem from a PyMC model (models.pymc_model)
        return pymc_problem(model)
    import_numpyro()
    from numpyro import handlers
    from numpyro.infer import Predictive
    from numpyro.infer.util import constrain_fn, initialize_model, log_likelihood

    args, kwargs = tuple(args), dict(kwargs or {})
    key = as_key(jax.random.key(0) if rng_key is None else rng_key,
                 where="model_problem(rng_key=...)")
    sites, observed = _sites(_trace(model, args, kwargs, key))
    try:
        init = initialize_model(key, model, model_args=args, model_kwargs=kwargs,
                                dynamic_args=False)
    except Exception as err:  # noqa: BLE001 - NumPyro found no finite starting point
        raise ModelError(explain(f"The model's initialisation failed: {err}", WHERE,
                                 "check the priors and data: the log density must be finite "
                                 "somewhere near the prior's centre.")) from err
    potential = init.potential_fn
    latent = tuple(site for site in sites if site.kind == "sample")
    seeded = handlers.seed(model, 0)  # a site without obs must not need a key here

    def logdensity(position):
        return -potential(position)

    def constrain(position):
        return constrain_fn(seeded, args, kwargs, position, return_deterministic=True)

    def pointwise(position):
        values = constrain(position)
        samples = {site.name: values[site.name] for site in latent}
        terms = log_likelihood(model, samples, *args, batch_ndims=0, **kwargs)
        return jnp.concatenate([jnp.ravel(terms[site.name]) for site in observed])

    _, unobserve = _messengers()

    def predict(rng_key, samples: dict | None, draws: int) -> dict[str, Any]:
        """Predictive draws: posterior ones given ``samples`` (latent sites with leading
        (chains, draws) axes), else ``draws`` prior ones (every sample site)."""
        if samples is None:
            out = Predictive(unobserve(model), num_samples=draws)(rng_key, *args, **kwargs)
        else:
            latent_samples = {site.name: samples[site.name] for site in latent}
            out = Predictive(unobserve(model), posterior_samples=latent_samples,
                             batch_ndims=2)(rng_key, *args, **kwargs)
        # a numpyro.factor term draws nothing (an empty array): it has no replicate
        return {name: np.asarray(value) for name, value in out.items() if np.size(value)}

    space = Space("numpyro", sites, constrain, observed,
                  pointwise if observed else None, predict)
    return ModelProblem(ModelLogDensity(logdensity, space), init.param_info.z, space)
