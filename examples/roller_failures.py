"""A NumPyro model through fisherwalk: a Weibull time-to-failure regression with right
censoring and a positive shape, and a random intercept per production line.

    python examples/roller_failures.py

The data are invented: 60 conveyor rollers from 4 production lines run on a test rig
at a load between -1 and 1 (standardised) until they fail or the test ends at 3000
hours; the rollers still running then are right-censored. The model is written as a
NumPyro user writes it (sample sites, a plate, a deterministic site, an observed site);
the two lines marked "fisherwalk" replace NumPyro's own MCMC. The summary, the figures
and ArviZ then show the sites' own values (shape > 0) under their names.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

jax.config.update("jax_enable_x64", True)  # the Laplace fit needs float64

import numpyro  # noqa: E402
import numpyro.distributions as dist  # noqa: E402

import fisherwalk  # noqa: E402

END_OF_TEST = 3000.0


def invented_rollers(seed: int = 11):
    """Loads, production lines, observed hours and which rollers were still running."""
    rng = np.random.default_rng(seed)
    line = np.repeat(np.arange(4), 15)
    load = rng.uniform(-1.0, 1.0, line.size)
    line_effect = np.array([0.15, -0.1, 0.0, -0.2])
    scale = np.exp(7.6 - 0.6 * load + line_effect[line])
    hours = scale * rng.weibull(1.8, line.size)
    running = hours > END_OF_TEST
    return (jnp.asarray(load), jnp.asarray(line), jnp.asarray(np.minimum(hours, END_OF_TEST)),
            jnp.asarray(running))


def model(load, line, running, hours=None):
    shape = numpyro.sample("shape", dist.Gamma(4.0, 2.0))          # Weibull shape, > 0
    base = numpyro.sample("base", dist.Normal(7.5, 1.5))           # log scale at load 0
    slope = numpyro.sample("slope", dist.Normal(0.0, 1.0))         # per unit of load
    spread = numpyro.sample("spread", dist.HalfNormal(0.5))        # between lines, > 0
    with numpyro.plate("lines", 4):
        offset = numpyro.sample("offset", dist.Normal(0.0, 1.0))   # non-centred
    numpyro.deterministic("median_hours_at_load_0",
                          jnp.exp(base) * jnp.log(2.0) ** (1.0 / shape))
    scale = jnp.exp(base + slope * load + spread * offset[line])
    with numpyro.plate("rollers", load.shape[0]):
        numpyro.sample("hours", dist.RightCensoredDistribution(
            dist.Weibull(scale, shape), censored=running), obs=hours)


def main() -> None:
    load, line, hours, running = invented_rollers()
    print(f"{int(running.sum())} of {running.size} rollers still running at "
          f"{END_OF_TEST:.0f} hours (right-censored)\n")
    # before (NumPyro's own sampler):
    #   mcmc = numpyro.infer.MCMC(numpyro.infer.NUTS(model), num_warmup=1000, num_samples=1000)
    #   mcmc.run(jax.random.key(0), load, line, running, hours=hours)
    # after (fisherwalk): the same model and arguments, two lines
    problem = fisherwalk.model_problem(model, (load, line, running), {"hours": hours})
    walker = fisherwalk.start(problem.logdensity_fn, problem.position, jax.random.key(0),
                              sampler="nuts", progress=False)
    walker = fisherwalk.refine(walker, jax.random.key(1), progress=False)
    trace = fisherwalk.walk(walker, jax.random.key(2), draws=1000, progress=False)
    print(trace.summary())
    try:
        import arviz as az
    except ImportError:
        return
    idata = trace.to_arviz()          # posterior, log_likelihood, posterior_predictive
    print(az.loo(idata))


if __name__ == "__main__":
    main()
