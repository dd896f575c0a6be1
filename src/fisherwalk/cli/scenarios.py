"""Invented demo data sets: generalised linear models simulated from a fixed seed.

Every number here is made up by the code below; no real organisation, person, place or
product is described. Each scenario is a :class:`Scenario` holding the data, the
coefficients the data were simulated from, and the log posterior that fisherwalk samples.

Both models put the prior N(0, 2.5²) on every coefficient of the *standardised*
predictors (each column centred and divided by its standard deviation), the weakly
informative scale of Gelman, Jakulin, Pittau & Su (2008), "A weakly informative default
prior distribution for logistic and other regression models", Annals of Applied
Statistics 2(4) (who use a Cauchy with that scale; a Gaussian is used here so that the
posterior stays close to its Laplace approximation). The Fisher information of each
likelihood has the closed forms of McCullagh & Nelder (1989), Generalized Linear
Models, 2nd ed.: Xᵀ diag(p(1-p)) X for the logit link, Xᵀ diag(mu) X for the log link.

The data arrays are closed over by ``logdensity`` (fisherwalk's log densities take the
position only), so under ``jit`` they become compile-time constants. Measured with
jax 0.10.2 on a shared 2-core machine (median of 3 fresh processes, seconds to lower and
compile, closure vs arrays passed as arguments): at n = 20,000 rows x 8 columns, value
and gradient 0.32 vs 0.33, Hessian 0.46 vs 0.50, a 100-step scan over 4 chains 2.30 vs
2.43, so closing over the data costs nothing at the demo's size. At n = 200,000 the
closure began to cost (gradient 0.62 vs 0.38), and ``fisherwalk.laplace``'s compile time
grew from 3.8 s (n = 2,000) and 4.1 s (20,000) to 6.8 s (200,000).
"""

from __future__ import annotations

import csv
import io
from collections.abc import Callable
from pathlib import Path
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from ..base.checks import whole_number
from ..base.files import write_text_atomic
from ..errors import InputError, explain

__all__ = ["Scenario", "logistic", "poisson", "SCENARIOS", "scenario", "truth_table",
           "max_z_range"]

PRIOR_SD = 2.5  # sd of the Gaussian prior on each coefficient of a standardised predictor


class Scenario(NamedTuple):
    """An invented regression data set and its log posterior.

    The design matrix ``X`` is an intercept column followed by the standardised
    predictors; ``raw`` holds the predictors in their own units (what ``to_csv`` writes).
    """

    name: str  # "logistic" or "poisson"
    story: str  # a plain-language account of the invented data
    X: np.ndarray  # (n, p) design matrix: intercept, then standardised predictors
    y: np.ndarray  # (n,) outcome (0/1, or counts)
    raw: np.ndarray  # (n, p - 1) predictors in their own units
    columns: tuple[str, ...]  # p - 1 raw column names, with units
    outcome: str  # name of the outcome column
    offset: np.ndarray  # (n,) known log exposure added to the linear predictor (zeros if none)
    true_beta: np.ndarray  # (p,) coefficients the outcome was simulated from
    names: tuple[str, ...]  # p coefficient names: "intercept", then the predictors
    prior_sd: float  # sd of the N(0, prior_sd²) prior on each coefficient
    family: str  # "bernoulli-logit" or "poisson-log"
    seed: int  # the numpy seed that generated everything
    logdensity: Callable  # position {"beta": (p,)} -> log posterior (up to a constant)
    fisher: Callable  # mode {"beta": (p,)} -> (p, p) expected Fisher information + prior precision

    @property
    def initial_position(self) -> dict:
        """Where a mode search starts: every coefficient zero."""
        return {"beta": jnp.zeros(self.X.shape[1])}

    @property
    def parameter_names(self) -> tuple[str, ...]:
        """fisherwalk's names of the ravelled parameters, ``beta[0]`` ... ``beta[p-1]``."""
        return tuple(f"beta[{i}]" for i in range(self.X.shape[1]))

    def to_csv(self, path) -> Path:
        """Write the data as a CSV file (header row, then one row per record).

        The columns are the raw predictors in their own units, the exposure when the
        model has one, and the outcome: what a user's own table would look like.
        """
        path = Path(path)
        header = list(self.columns)
        table = [self.raw]
        if np.any(self.offset != 0.0):
            header.append("exposure_km")
            table.append(np.exp(self.offset)[:, None])
        header.append(self.outcome)
        table.append(self.y[:, None])
        data = np.concatenate(table, axis=1)
        integer = [np.all(col == np.round(col)) for col in data.T]
        text = io.StringIO(newline="")
        writer = csv.writer(text)
        writer.writerow(header)
        for row in data:
            cells = zip(row, integer, strict=True)
            writer.writerow([str(int(v)) if whole else f"{v:.4g}" for v, whole in cells])
        return write_text_atomic(path, text.getvalue())


def _standardise(raw: np.ndarray) -> np.ndarray:
    centred = raw - raw.mean(axis=0)
    return np.concatenate([np.ones((raw.shape[0], 1)), centred / raw.std(axis=0)], axis=1)


def _correlated_normals(rng: np.random.Generator, n: int, corr: np.ndarray) -> np.ndarray:
    return rng.standard_normal((n, corr.shape[0])) @ np.linalg.cholesky(corr).T


def _bernoulli_logit(X: np.ndarray, y: np.ndarray, prior_sd: float):
    def logdensity(position):
        beta = position["beta"]
        eta = jnp.asarray(X, beta.dtype) @ beta
        loglik = jnp.sum(jnp.asarray(y, beta.dtype) * eta - jnp.logaddexp(0.0, eta))
        return loglik - 0.5 * jnp.sum(beta**2) / prior_sd**2

    def fisher(mode):
        beta = mode["beta"]
        p = jax.nn.sigmoid(jnp.asarray(X, beta.dtype) @ beta)
        weighted = jnp.asarray(X, beta.dtype) * (p * (1.0 - p))[:, None]
        prior = jnp.eye(X.shape[1], dtype=beta.dtype) / prior_sd**2
        return jnp.asarray(X, beta.dtype).T @ weighted + prior

    return logdensity, fisher


def _poisson_log(X: np.ndarray, y: np.ndarray, offset: np.ndarray, prior_sd: float):
    def logdensity(position):
        beta = position["beta"]
        eta = jnp.asarray(X, beta.dtype) @ beta + jnp.asarray(offset, beta.dtype)
        loglik = jnp.sum(jnp.asarray(y, beta.dtype) * eta - jnp.exp(eta))  # - log y! dropped
        return loglik - 0.5 * jnp.sum(beta**2) / prior_sd**2

    def fisher(mode):
        beta = mode["beta"]
        mu = jnp.exp(jnp.asarray(X, beta.dtype) @ beta + jnp.asarray(offset, beta.dtype))
        weighted = jnp.asarray(X, beta.dtype) * mu[:, None]
        prior = jnp.eye(X.shape[1], dtype=beta.dtype) / prior_sd**2
        return jnp.asarray(X, beta.dtype).T @ weighted + prior

    return logdensity, fisher


_SEED_STORY = """\
An invented seed bank tests 20,000 stored packets of vegetable seed: a packet passes
when at least 80 of 100 seeds sprout. Does it pass (1) or not (0)? Seven things were
written down for each packet: the store's mean temperature (°C) and relative humidity
(%), the months in storage, the seeds' moisture content (% of weight), the packet's
weight (g), whether it was vacuum-sealed (1/0), and how many times it had been opened.
Warm stores are also damp, and old packets have been opened more often, so the
predictors are correlated. Model: logistic regression on the standardised predictors,
prior N(0, 2.5²) on each of the 8 coefficients."""


def logistic(n: int = 20_000, seed: int = 20240611) -> Scenario:
    """The seed-bank germination test: Bayesian logistic regression, 8 coefficients.

    An invented seed bank tests stored packets of seed; the outcome is whether a
    packet passes its germination test, the predictors are storage conditions (see
    ``Scenario.story``). Predictors are drawn correlated (temperature with humidity,
    months in storage with the number of openings), standardised, and the outcome is
    Bernoulli with logit-linear probability in the true coefficients.

    Parameters
    ----------
    n
        Number of packets (records).
    seed
        numpy seed; the same seed gives the same data, bit for bit.

    Returns
    -------
    Scenario
        Log posterior: sum_i [y_i eta_i - log(1 + exp eta_i)] - |beta|² / (2 · 2.5²),
        eta = X beta (Gelman et al. 2008, Ann. Appl. Stat. 2(4), for the prior scale).
    """
    n = _check_n(n, "logistic")
    rng = np.random.default_rng(seed)
    corr = np.array([
        # temp  humid months moist  weight
        [1.00, 0.55, 0.10, 0.35, 0.00],
        [0.55, 1.00, 0.05, 0.50, 0.00],
        [0.10, 0.05, 1.00, 0.20, -0.15],
        [0.35, 0.50, 0.20, 1.00, 0.10],
        [0.00, 0.00, -0.15, 0.10, 1.00],
    ])
    z = _correlated_normals(rng, n, corr)
    temperature = 8.0 + 3.0 * z[:, 0]
    humidity = 45.0 + 10.0 * z[:, 1]
    months = np.maximum(1.0, np.round(18.0 + 9.0 * z[:, 2]))
    moisture = 7.0 + 1.2 * z[:, 3]
    weight = 12.0 + 2.5 * z[:, 4]
    vacuum = (rng.random(n) < 0.35 + 0.1 * (z[:, 1] < 0)).astype(float)
    opened = rng.poisson(np.exp(0.2 + 0.045 * months))
    raw = np.column_stack([temperature, humidity, months, moisture, weight, vacuum, opened])
    X = _standardise(raw)
    true_beta = np.array([1.2, -0.6, -0.4, -0.5, -0.3, 0.2, 0.35, -0.15])
    p = 1.0 / (1.0 + np.exp(-(X @ true_beta)))
    y = (rng.random(n) < p).astype(float)
    logdensity, fisher = _bernoulli_logit(X, y, PRIOR_SD)
    columns = ("temperature_C", "humidity_pct", "months_stored", "moisture_pct", "weight_g",
               "vacuum_sealed", "times_opened")
    names = ("intercept", "temperature", "humidity", "months stored", "seed moisture",
             "packet weight", "vacuum sealed", "times opened")
    return Scenario("logistic", _SEED_STORY, X, y, raw, columns, "passed", np.zeros(n),
                    true_beta, names, PRIOR_SD, "bernoulli-logit", seed, logdensity, fisher)


_CULVERT_STORY = """\
An invented hill district keeps a register of 6,000 culverts (pipes that carry streams
under its roads). Each spring the road crew counts the blockages it had to clear at
each culvert over the winter. Five things are on the register: the pipe's diameter
(cm), its age (years), the slope of the stream bed (%), the share of woodland
upstream (%), and whether a debris grate is fitted (1/0); the length of road ditch
draining into the culvert (km) is the exposure. Old pipes are narrower and wooded
catchments are steeper, so the predictors are correlated. Model: Poisson regression
with a log link and log(ditch length) as offset, prior N(0, 2.5²) on each of the 6
coefficients of the standardised predictors."""


def poisson(n: int = 6_000, seed: int = 20240612) -> Scenario:
    """The culvert blockage register: Bayesian Poisson regression, 6 coefficients.

    An invented road crew counts the blockages cleared at each culvert over a winter;
    the predictors describe the pipe and its stream (see ``Scenario.story``); the
    ditch length draining into it enters as a known exposure (offset log length).

    Parameters
    ----------
    n
        Number of culverts (records).
    seed
        numpy seed; the same seed gives the same data, bit for bit.

    Returns
    -------
    Scenario
        Log posterior: sum_i [y_i eta_i - exp eta_i] - |beta|² / (2 · 2.5²) (the
        constant -sum log y_i! dropped), eta = X beta + log(length).
    """
    n = _check_n(n, "poisson")
    rng = np.random.default_rng(seed)
    corr = np.array([
        # diam   age  slope  wood
        [1.00, -0.45, 0.00, 0.00],
        [-0.45, 1.00, 0.00, 0.10],
        [0.00, 0.00, 1.00, 0.50],
        [0.00, 0.10, 0.50, 1.00],
    ])
    z = _correlated_normals(rng, n, corr)
    diameter = np.clip(60.0 + 15.0 * z[:, 0], 25.0, None)
    age = np.clip(np.round(35.0 + 12.0 * z[:, 1]), 1.0, None)
    slope = np.exp(1.2 + 0.5 * z[:, 2])
    woodland = 100.0 / (1.0 + np.exp(-(0.2 + 1.1 * z[:, 3])))
    grate = (rng.random(n) < 0.3).astype(float)
    raw = np.column_stack([diameter, age, slope, woodland, grate])
    X = _standardise(raw)
    length = rng.uniform(0.2, 2.0, n)
    offset = np.log(length)
    true_beta = np.array([0.3, -0.35, 0.25, 0.2, 0.4, -0.3])
    y = rng.poisson(np.exp(X @ true_beta + offset)).astype(float)
    logdensity, fisher = _poisson_log(X, y, offset, PRIOR_SD)
    columns = ("diameter_cm", "age_years", "slope_pct", "woodland_pct", "grate_fitted")
    names = ("intercept", "diameter", "age", "slope", "woodland", "grate fitted")
    return Scenario("poisson", _CULVERT_STORY, X, y, raw, columns, "blockages", offset,
                    true_beta, names, PRIOR_SD, "poisson-log", seed, logdensity, fisher)


SCENARIOS = {"logistic": logistic, "poisson": poisson}


def scenario(name: str, **options) -> Scenario:
    """The demo scenario called ``name`` (``"logistic"`` or ``"poisson"``)."""
    if name not in SCENARIOS:
        raise InputError(explain(f"There is no demo scenario called {name!r}.",
                                 "fisherwalk.cli.scenarios.scenario(name)",
                                 f"use one of {', '.join(map(repr, SCENARIOS))}."))
    return SCENARIOS[name](**options)


def _check_n(n, where: str) -> int:
    return whole_number(n, "n", f"fisherwalk.cli.scenarios.{where}(n=...)", minimum=50,
                        todo="pass a whole number of at least 50 records (the default is "
                             "the demo's size).")


def truth_table(scene, summary) -> dict:
    rows, lines = [], []
    lines.append("Against the truth (the data were simulated from these coefficients):")
    lines.append(f"  {'parameter':<26}{'true':>8}{'mean':>9}{'sd':>8}{'(mean-true)/sd':>16}")
    for j, (name, label) in enumerate(zip(summary.names, scene.names, strict=True)):
        mean, sd, true = float(summary.mean[j]), float(summary.sd[j]), float(scene.true_beta[j])
        z = (mean - true) / sd
        rows.append({"name": name, "label": label, "true": true, "mean": mean, "sd": sd,
                     "z": z})
        shown = name if name == label else f"{name} {label}"
        lines.append(f"  {shown:<26}{true:>8.3f}{mean:>9.3f}{sd:>8.3f}{z:>+16.2f}")
    worst = max(abs(r["z"]) for r in rows)
    low, high = max_z_range(len(rows))
    lines.append(f"  largest |mean - true| / sd: {worst:.2f}. Each ratio is about a standard "
                 "normal draw (one data set),")
    lines.append(f"  so with {len(rows)} coefficients the largest falls between {low:.1f} and "
                 f"{high:.1f} in 90% of data sets.")
    return {"rows": rows, "text": "\n".join(lines)}


def max_z_range(count: int) -> tuple[float, float]:
    """5% and 95% quantiles of max |Z_i| over ``count`` independent standard normals:
    P(max <= x) = (2 Phi(x) - 1)^count. By Bernstein-von Mises the posterior mean sits
    about N(truth, sd²) over repeated data sets (van der Vaart 1998, Asymptotic
    Statistics, ch. 10)."""
    from scipy.stats import norm

    return tuple(float(norm.ppf((1.0 + q ** (1.0 / count)) / 2.0)) for q in (0.05, 0.95))
