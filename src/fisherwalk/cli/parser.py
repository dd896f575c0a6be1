"""The argument parser of the ``fisherwalk`` command: its subcommands, options, defaults
and help texts (:func:`build_parser`)."""

from __future__ import annotations

import argparse

from ..samplers import registry
from . import compilecache

__all__ = ["build_parser", "DEFAULT_CHAINS", "DEFAULT_DRAWS", "DEFAULT_WARMUP", "DEFAULT_SEED",
           "MAX_SEED", "TRUST"]

DEFAULT_CHAINS = 4
# Without --draws the run length is planned (walk(draws=None)): rounds until every
# parameter has bulk and tail ESS >= 400 and R-hat < 1.01, sized from the theory's
# predicted ESS per step (fisherwalk.workflow.plan).
DEFAULT_DRAWS = None
# refine(steps=None): the sampler family's own warm-up (400 random walk, 200 gradient)
DEFAULT_WARMUP = None
DEFAULT_SEED = 0

TRUST = ("'run' executes the Python code in MODEL_FILE with your own rights (the file\n"
         "is imported like any module): run only model files you trust.")
MAX_SEED = 2**32 - 1  # jax.random.key takes the seed as an unsigned 32-bit number here


def _common(sub: argparse.ArgumentParser, out_default: str) -> None:
    sub.add_argument("--out", default=out_default, metavar="DIR",
                     help=f"output folder, created if needed (default: {out_default})")
    sub.add_argument("--chains", default=DEFAULT_CHAINS, metavar="N",
                     help=f"number of chains (default {DEFAULT_CHAINS})")
    sub.add_argument("--draws", default=DEFAULT_DRAWS, metavar="N",
                     help="draws kept per chain after the warm-up, at least 4 (default: "
                          "planned, until every ESS >= 400 and R-hat < 1.01, within a budget)")
    sub.add_argument("--warmup", default=DEFAULT_WARMUP, metavar="N",
                     help="warm-up steps per chain, rounded up to a multiple of 200 "
                          "(default: the sampler's own, 400 for the random walk, 200 for "
                          "MALA, HMC and NUTS)")
    sub.add_argument("--seed", default=DEFAULT_SEED, metavar="S",
                     help=f"seed of the JAX random key, 0 to {MAX_SEED} (default "
                          f"{DEFAULT_SEED})")
    sub.add_argument("--quiet", action="store_true",
                     help="no progress bars and no step-by-step account; print the tables")
    sub.add_argument("--thin", default=1, metavar="N",
                     help="steps per kept draw (default 1: keep every step)")
    sub.add_argument("--sampler", default="rwm",
                     choices=registry.choices(),
                     help="the sampler: random-walk Metropolis (default), BlackJAX's MALA, "
                          "HMC or NUTS on the whitened posterior, or auto (the one predicted "
                          "to reach ESS 400 first)")
    sub.add_argument("--restarts", default=0, metavar="N",
                     help="extra mode searches from dispersed points before the Laplace fit "
                          "(default 0)")
    _cache_option(sub)


def _focus_option(sub: argparse.ArgumentParser) -> None:
    sub.add_argument("--focus", nargs="+", default=None, metavar="NAME",
                     help="the parameters the summary and the figures show: names "
                          "(beta[3]), leaf names (beta) or patterns ('beta*'); default all "
                          "(the figures: the worst-mixing ones and the group-level scales "
                          "when there are many). summary.csv and draws.npz keep every "
                          "parameter")


def _cache_option(sub: argparse.ArgumentParser) -> None:
    sub.add_argument("--no-compile-cache", dest="compile_cache_on", action="store_false",
                     help="do not use JAX's persistent compilation cache (default: on, in "
                          f"{compilecache.cache_folder()})")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``fisherwalk`` (exposed for documentation and tests)."""
    fmt = argparse.RawDescriptionHelpFormatter
    parser = argparse.ArgumentParser(
        prog="fisherwalk", formatter_class=fmt,
        description="Bayesian sampling tuned before its first step from the Laplace "
                    "approximation\n(mode and observed Fisher information) of the posterior: "
                    "random-walk Metropolis,\nMALA, HMC or NUTS (BlackJAX), a short warm-up, "
                    "diagnostics, figures and a record.",
        epilog="examples:\n  fisherwalk demo\n  fisherwalk scale 1 10 100\n"
               "  fisherwalk run my_model.py --out results\n  fisherwalk show results --focus "
               "'beta*'\n\n"
               "'fisherwalk COMMAND --help' describes each command.")
    subs = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    demo = subs.add_parser(
        "demo", formatter_class=fmt, help="the whole workflow on an invented demo data set",
        description="Fit, tune, warm up, sample and diagnose an invented regression, then "
                    "compare the\nposterior with the coefficients the data were simulated "
                    "from. Writes data.csv,\ndraws.npz, record.json and four PNG figures.",
        epilog="examples:\n  fisherwalk demo\n  fisherwalk demo --scenario poisson --out culverts"
               "\n  fisherwalk demo --chains 2 --draws 500 --seed 7 --quiet")
    _common(demo, "fisherwalk-demo")
    demo.add_argument("--scenario", choices=("logistic", "poisson"), default="logistic",
                      help="logistic: seed-bank germination test, 20,000 records, 8 "
                           "coefficients; poisson: culvert blockage counts, 6,000 records, "
                           "6 coefficients (default logistic)")

    scale = subs.add_parser(
        "scale", formatter_class=fmt, help="optimal scale and acceptance for dimensions",
        description="The scale l maximising the expected squared jump of random-walk "
                    "Metropolis with\na proposal matched to the posterior's covariance, and "
                    "the acceptance rate it implies,\nfor each dimension d (Gaussian limit, "
                    "computed for finite d).",
        epilog="examples:\n  fisherwalk scale 1 2 5 10 100\n  fisherwalk scale 4 --json")
    scale.add_argument("dims", nargs="+", metavar="DIM",
                       help="number of scalar parameters d")
    scale.add_argument("--json", action="store_true",
                       help="print a JSON list of {dim, scale, acceptance, jump_distance}")

    run = subs.add_parser(
        "run", formatter_class=fmt, help="the whole workflow on your model file",
        description="Run the workflow on a Python model file that defines\n"
                    "  logdensity(position) -> scalar   the log posterior, written in JAX\n"
                    "  initial_position                 a pytree of floats to start from\n"
                    "and optionally\n"
                    "  fisher(mode) -> (d, d)           your Fisher information (else autodiff)\n"
                    "  names                            one label per scalar parameter\n"
                    "  pointwise(position) -> (n_obs,)  log likelihood per observation "
                    "(--pointwise)\n"
                    "  derived(position) -> pytree      quantities summarised with the "
                    "parameters\n"
                    "  predict(position, key) -> pytree predictions with their own randomness "
                    "(a key per draw)\n"
                    "With --data table.csv it defines instead\n"
                    "  make(data) -> (logdensity, initial_position), or a dict of the names "
                    "above,\n"
                    "  data being {column name: float array}, and optionally\n"
                    "  columns = (\"count\", \"hours\")   the columns it needs (checked "
                    "first)\n\n"
                    "Warning: " + TRUST,
        epilog="examples:\n  fisherwalk run model.py\n"
               "  fisherwalk run model.py --out results --chains 6 --draws 4000 --seed 3\n"
               "  fisherwalk run counts.py --data counts.csv --pointwise --checkpoint\n\n"
               "A minimal model.py:\n"
               "  import jax.numpy as jnp\n"
               "  y = jnp.array([2.1, 1.7, 2.6, 2.2])\n"
               "  def logdensity(p):\n"
               "      return -0.5 * jnp.sum((y - p['mu']) ** 2) - 0.5 * p['mu'] ** 2 / 100\n"
               "  initial_position = {'mu': jnp.asarray(0.0)}")
    run.add_argument("model_file", metavar="MODEL_FILE", help="path of the model file (.py)")
    _common(run, "fisherwalk-run")
    run.add_argument("--data", metavar="CSV", default=None,
                     help="a CSV table (header row of column names) handed to the model "
                          "file's make(data) as {column: float array}")
    run.add_argument("--pointwise", action="store_true",
                     help="store the model file's pointwise(position) log likelihood at every "
                          "kept draw (draws.npz 'pointwise'; for LOO with ArviZ)")
    _focus_option(run)
    run.add_argument("--checkpoint", action="store_true",
                     help="keep the sampling's progress in OUT/checkpoint/ so that "
                          "'fisherwalk resume OUT --model MODEL_FILE' can finish it")

    again = subs.add_parser(
        "resume", formatter_class=fmt, help="finish an interrupted 'run --checkpoint'",
        description="Finish the sampling of a 'fisherwalk run ... --checkpoint' that was "
                    "interrupted,\nwith the same draws an uninterrupted run gives, and write "
                    "the usual files into DIR.\nThe model file must be the original one "
                    "(its log density is checked).\n\nWarning: " + TRUST,
        epilog="example:\n  fisherwalk run model.py --data counts.csv --out results --checkpoint"
               "\n  (interrupted)\n  fisherwalk resume results --model model.py")
    again.add_argument("folder", metavar="DIR", help="the --out folder of the interrupted run")
    again.add_argument("--model", required=True, metavar="MODEL_FILE",
                       help="the model file of the run")
    again.add_argument("--data", metavar="CSV", default=None,
                       help="the data file (default: the path the run recorded)")
    again.add_argument("--quiet", action="store_true", help="no progress bar")
    _cache_option(again)

    show = subs.add_parser(
        "show", formatter_class=fmt, help="print the summary of a finished run and redraw "
                                          "its figures",
        description="Open a finished run without its model: the folder of 'fisherwalk run' "
                    "or 'demo'\n(draws.npz and record.json), or a finished checkpoint "
                    "folder. Print its summary\nand write its figures again.",
        epilog="examples:\n  fisherwalk show results\n  fisherwalk show results --focus "
               "'tau*' sigma --interval 0.8")
    show.add_argument("folder", metavar="DIR", help="the run's folder")
    _focus_option(show)
    show.add_argument("--interval", default="0.9", metavar="P",
                      help="probability of the central interval (default 0.9)")
    show.add_argument("--figures", default=None, metavar="DIR",
                      help="where to write the figures (default: DIR itself)")
    return parser
