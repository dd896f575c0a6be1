"""The console command ``fisherwalk``: the whole workflow from a shell.

Subcommands
-----------
``demo``   fit, tune, warm up, sample and diagnose an invented demo scenario
           (:mod:`fisherwalk.cli.scenarios`), and write plots, data, draws and a record.
``scale``  the optimal scale l and target acceptance for given dimensions.
``run``    the same workflow as ``demo`` on a model file of the user's (and a CSV data
           file with ``--data``, :mod:`fisherwalk.cli.datafile`).
``resume`` finish a ``run --checkpoint`` that was interrupted (:mod:`fisherwalk.cli.resumable`).

The command is an application, so it switches JAX to float64 for itself (the library
never changes JAX's configuration). :func:`workflow` runs the steps (start, refine,
walk, summary) and tells the user what each found; :func:`fisherwalk.cli.runrecord.write_outputs`
writes ``draws.npz`` (plain arrays, no pickle), the plots and ``record.json``;
:func:`fisherwalk.cli.modelfile.load_model` imports and checks a model file.
"""

from __future__ import annotations

import argparse
import math
import sys
import textwrap
import time
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ..base.checks import parse_whole_number
from ..base.files import check_output_folder
from ..base.jsonio import dumps
from ..base.lock import acquire_lock
from ..errors import FisherwalkError, InputError, ModelFileError, explain
from ..run.memory import check_walk_memory
from ..run.plan import MAX_DRAWS
from ..run.samplers import registry
from . import compilecache, outputs, resumable
from .modelfile import load_model
from .runrecord import RunResult, build_record, run_keys, sha256_file, write_outputs

__all__ = ["main", "workflow", "RunResult"]

DEFAULT_CHAINS = 4
# Without --draws the run length is planned (walk(draws=None)): rounds until every
# parameter has bulk and tail ESS >= 400 and R-hat < 1.01, sized from the theory's
# predicted ESS per step (fisherwalk.run.plan).
DEFAULT_DRAWS = None
DEFAULT_WARMUP = 400
DEFAULT_SEED = 0
MIN_KEPT = 4  # draws per chain an interrupted run needs for its outputs to be written

_TRUST = ("'run' executes the Python code in MODEL_FILE with your own rights (the file\n"
          "is imported like any module): run only model files you trust.")


# --------------------------------------------------------------------------------- workflow


class _Say:
    """Narration on stdout (unless quiet) and a 'working on it' line on stderr."""

    def __init__(self, quiet: bool):
        self.quiet = quiet
        self.tty = sys.stderr.isatty()

    def __call__(self, text: str = "") -> None:
        if not self.quiet:
            print(text, flush=True)

    def busy(self, text: str) -> None:
        if not self.quiet and self.tty:
            print(f"  ... {text}", file=sys.stderr, flush=True)


def workflow(logdensity, position, *, seed: int, chains: int, draws: int | None,
             warmup: int = DEFAULT_WARMUP, fisher=None, say: _Say | None = None,
             thin: int = 1, restarts: int = 0, pointwise=None, derived=None,
             checkpoint=None, labels=None, sampler: str = "rwm", predict=None) -> RunResult:
    """Laplace fit and tuning (start), warm-up (refine), sampling (walk), summary.

    ``draws=None`` plans the run length; ``labels`` (one per scalar parameter, e.g. a
    model file's ``names``) replace the ravelled names everywhere. The summary has every
    row (the record and summary.csv keep them all); ``run --focus`` chooses the printed
    rows and the figures' panels.

    ``thin``, ``pointwise``, ``derived`` and ``checkpoint`` go to :func:`fisherwalk.walk`,
    ``restarts`` (mode searches from dispersed points) to :func:`fisherwalk.start`.
    """
    import fisherwalk

    say = say or _Say(quiet=True)
    progress = None if not say.quiet else False
    (k_start, k_warm, k_walk), keys = run_keys(seed)
    seconds: dict[str, float] = {}

    say.busy("Laplace fit: mode search and Fisher information (includes compilation)")
    t = time.perf_counter()
    walker = fisherwalk.start(logdensity, position, k_start, chains, fisher=fisher,
                              restarts=restarts, progress=progress, sampler=sampler)
    seconds["start"] = time.perf_counter() - t

    _say_fit(say, walker, seconds["start"])

    t = time.perf_counter()
    walker = fisherwalk.refine(walker, k_warm, warmup, progress=progress)
    seconds["warmup"] = time.perf_counter() - t
    _say_warmup(say, walker, seconds["warmup"], chains)

    t = time.perf_counter()
    trace = fisherwalk.walk(walker, k_walk, draws, thin, progress=progress,
                            pointwise=pointwise, derived=derived, checkpoint=checkpoint,
                            predict=predict)
    seconds["sampling"] = time.perf_counter() - t
    if not trace.complete and trace.flat.shape[1] < MIN_KEPT:
        raise KeyboardInterrupt  # too few draws to summarise: nothing worth writing

    t = time.perf_counter()
    trace = labelled(trace, labels)
    summary = trace.summary()  # every row: the record and summary.csv keep them all
    seconds["diagnostics"] = time.perf_counter() - t
    _say_sampling(say, trace, summary, seconds["sampling"])
    return RunResult(trace, summary, seconds, keys)


def labelled(trace, labels):
    """The trace with ``labels`` (a model file's ``names``, one per scalar parameter in
    ravelled order) as its parameter names everywhere: the summary, draws.npz, the record
    (laplace, tuning, summary, facts), the figures and ArviZ."""
    if labels is None or len(labels) != len(trace.names):
        return trace
    names = tuple(str(n) for n in labels)
    walker = trace.walker
    if walker is not None:
        fit = walker.report.laplace._replace(names=names)
        walker = walker._replace(report=walker.report._replace(laplace=fit))
    return trace._replace(walker=walker, facts=trace.facts._replace(names=names))


def _say_fit(say: _Say, walker, seconds: float) -> None:
    fit, tuning = walker.report.laplace, walker.tuning
    cond = np.linalg.cond(np.asarray(fit.fisher))
    source = "autodiff Hessian" if fit.fisher_source == "hessian" else "from the model"
    say(_step("[1/4] Laplace fit (compilation included)", seconds))
    say(f"      mode after {fit.iterations} iterations, largest |gradient| {fit.gradient_norm:.1e}")
    say(f"      Fisher information H: {source}, condition number {cond:.3g}")
    check = getattr(walker.report, "check", None)
    if check is not None and hasattr(check, "khat"):
        verdict = "holds" if check.khat <= check.threshold else "is doubtful"
        say(f"      Laplace check: PSIS k̂ {check.khat:.2f} (limit {check.threshold:.2f}): "
            f"the Gaussian picture {verdict}")
    say(f"[2/4] tuning from the theory, d = {tuning.dim}")
    if tuning.scale is not None:  # a family tuned by its scale l (the random walk)
        say(f"      scale l = {tuning.scale:.3f}, step (l/√d)·S z with l/√d = "
            f"{tuning.scale / math.sqrt(tuning.dim):.3f}, S Sᵀ = H⁻¹ ({tuning.shape_kind})")
    else:
        name, value = tuning.parameter
        say(f"      sampler {tuning.sampler} (BlackJAX) on the posterior whitened by "
            f"S Sᵀ = H⁻¹ ({tuning.shape_kind}); {name.replace('_', ' ')} {value:.4g}")
    say(f"      target acceptance {tuning.target_acceptance:.3f}")
    say(f"      predicted jump {tuning.predicted_jump:.3f} per step (squared, in sd of "
        "N(mode, H⁻¹))")
    for note in walker.report.notes:
        say(_wrap(f"note: {note}"))


def _say_warmup(say: _Say, walker, seconds: float, chains: int) -> None:
    warm = walker.report.warmup
    say(_step(f"[3/4] warm-up, {warm.steps} steps x {chains} chains", seconds))
    ratio = warm.tuned_final / warm.tuned_start
    say(f"      {warm.tuned.replace('_', ' ')} {warm.tuned_start:.4g} -> "
        f"{warm.tuned_final:.4g} (x{ratio:.2f})")
    say(f"      acceptance {warm.acceptance_final:.3f}, aimed at {warm.target_acceptance:.3f}")
    low, high = warm.spectrum_bounds
    spec = np.asarray(warm.covariance_spectrum)
    say(f"      warm-up covariance against H⁻¹: eigenvalues {spec.min():.2f} to {spec.max():.2f}")
    say(f"      (Monte Carlo error allows {low:.2f} to {high:.2f} with "
        f"{warm.effective_draws:.0f} effective draws)")
    if warm.reshaped:
        say(_wrap("      proposal shape re-estimated because: " + "; ".join(warm.reasons)
                  if warm.reasons else "      proposal shape re-estimated (asked for)"))
    else:
        say("      proposal shape kept: every check agreed with the Gaussian picture")


def _say_sampling(say: _Say, trace, summary, seconds: float) -> None:
    chains, draws = trace.flat.shape[:2]
    say(_step(f"[4/4] sampling, {draws} draws x {chains} chains", seconds))
    if trace.length is not None:
        say(_wrap(f"      {trace.length.line()}"))
    per_chain = " ".join(f"{a:.3f}" for a in np.mean(trace.accepted, axis=1))
    say(f"      acceptance realised {summary.acceptance_pooled:.3f} (chains: {per_chain})")
    say(f"      acceptance aimed at {summary.target_acceptance:.3f}")
    if summary.realised_jump is not None:
        say(f"      jump per step: predicted {summary.predicted_jump:.3f}, realised "
            f"{summary.realised_jump:.3f}")


def _draws_words(draws) -> str:
    return "draws planned (ESS >= 400, R-hat < 1.01)" if draws is None else f"{draws} draws"


def _step(title: str, seconds: float) -> str:
    return f"{title:<44}{seconds:6.1f} s"


def _wrap(text: str) -> str:
    return textwrap.fill(text, width=96, subsequent_indent="        ")


# ---------------------------------------------------------------------------- subcommands


MAX_SEED = 2**32 - 1  # jax.random.key takes the seed as an unsigned 32-bit number here
MAX_CHAINS = 10_000
MIN_DRAWS = 4  # R-hat and ESS need 4 draws per chain
_NUMBERS = {"chains": (1, MAX_CHAINS), "draws": (MIN_DRAWS, None), "warmup": (1, None),
            "seed": (0, MAX_SEED), "thin": (1, None), "restarts": (0, None)}


def _check_numbers(args) -> None:
    """Every numeric option as a whole number in its range (argparse keeps them as text,
    so that '1e23' and '2.0' get the package's message, exit 2, before any work)."""
    for name, (low, high) in _NUMBERS.items():
        if getattr(args, name, None) is not None:  # None: --draws left to the plan
            text = getattr(args, name)
            text = str(text) if isinstance(text, int) else text  # a default
            setattr(args, name, parse_whole_number(text, f"--{name}",
                                                   f"option --{name}", minimum=low,
                                                   maximum=high))
    if hasattr(args, "dims"):
        args.dims = [parse_whole_number(text, "DIM", "fisherwalk scale DIM", minimum=1)
                     for text in args.dims]


def _output_bytes(chains: int, draws: int, dim: int) -> int:
    """About how many bytes the outputs take: draws.npz (draws, log density, acceptance
    in float64), record.json (five d x d matrices at ~25 characters a number) and the
    four figures (a few hundred kB each)."""
    return chains * draws * (dim + 2) * 8 + 125 * dim * dim + 4 * 2**20


def _values_per_draw(fn, position) -> int:
    """How many numbers ``fn(position)`` returns (traced, not run); 0 when it cannot be
    traced here (walk() then reports the function's problem)."""
    if fn is None:
        return 0
    import jax

    try:
        shapes = jax.eval_shape(fn, position)
    except Exception:  # noqa: BLE001 - reported by walk() with its own message
        return 0
    return sum(math.prod(leaf.shape) for leaf in jax.tree_util.tree_leaves(shapes))


def _check_before_work(args, dim: int, model=None) -> Path:
    """The output folder (a writable folder with room for the outputs) and the memory
    the run needs (with the model's pointwise and derived values), checked before the
    fit."""
    draws = MAX_DRAWS if args.draws is None else args.draws  # a planned run: its budget
    pointwise = derived = 0
    if model is not None:
        if getattr(args, "pointwise", False):
            pointwise = _values_per_draw(model.pointwise, model.initial_position)
        derived = _values_per_draw(model.derived, model.initial_position)
    check_walk_memory(draws, args.chains, dim, where="options --draws and --chains",
                      todo="pass --draws {draws} or fewer (or fewer --chains); nothing was "
                           "fitted or sampled.", thin=args.thin, pointwise=pointwise,
                      derived=derived)
    out = check_output_folder(args.out, _output_bytes(args.chains, draws, dim))
    checkpoint = bool(getattr(args, "checkpoint", False))
    outputs.check_output_names(out, outputs.output_names(args.command, checkpoint=checkpoint))
    if args.command == "demo":
        outputs.check_demo_folder(out)
    return out


def _options(args) -> dict:
    import inspect

    from ..fit.laplace import laplace

    defaults = {k: v.default for k, v in inspect.signature(laplace).parameters.items()
                if v.default is not inspect.Parameter.empty}
    eps = float(np.finfo(np.float64).eps)
    return {
        "seed": args.seed, "chains": args.chains, "draws": args.draws,
        "warmup_steps": args.warmup, "thin": args.thin, "shape": "fisher",
        "sampler": vars(args).get("sampler", registry.DEFAULT),
        "criterion": "slowest",
        "laplace": {"max_iterations": defaults.get("max_iterations"),
                    "gradient_tolerance": defaults.get("gradient_tolerance") or math.sqrt(eps),
                    "restarts": args.restarts},
    }


def _say_files(say: _Say, out: Path, files: dict[str, Path]) -> None:
    say(f"files in {out}/")
    for name, path in files.items():
        say(f"  {path.name:<22} {name}")


def _demo(args, argv) -> int:
    from . import scenarios

    say = _Say(args.quiet)
    began = time.perf_counter()
    scene = scenarios.scenario(args.scenario)
    out = _check_before_work(args, scene.X.shape[1])
    data_path = scene.to_csv(out / "data.csv")
    n, p = scene.X.shape
    say(f"fisherwalk demo: the '{scene.name}' scenario (invented data, seed {scene.seed})")
    say("=" * 72)
    say(textwrap.indent(scene.story, "  "))
    say(f"\n  {n:,} records, {p} coefficients ({scene.family}); data in {data_path}")
    say(f"  {args.chains} chains x {_draws_words(args.draws)} after {args.warmup} warm-up steps, "
        f"seed {args.seed}\n")
    result = workflow(scene.logdensity, scene.initial_position, seed=args.seed,
                      chains=args.chains, draws=args.draws, warmup=args.warmup, say=say,
                      thin=args.thin, restarts=args.restarts, labels=scene.names,
                      sampler=args.sampler)
    print()
    print(str(result.summary))
    truth = _truth_table(scene, result.summary)
    print()
    print(truth["text"])
    extra = {"scenario": {"name": scene.name, "records": n, "family": scene.family,
                          "data_seed": scene.seed, "prior_sd": scene.prior_sd,
                          "labels": list(scene.names), "true_beta": scene.true_beta,
                          "data_file": data_path.name, "data_sha256": sha256_file(data_path)},
             "truth": truth["rows"], "compile_cache": _cache_facts(args)}
    t = time.perf_counter()
    say.busy("writing the figures and the record")
    record = build_record("demo", argv, _options(args), result, extra)
    files = {"data": data_path, **write_outputs(out, result, record)}
    say(f"\nplots and record written in {time.perf_counter() - t:.1f} s")
    _say_files(say, out, files)
    say(f"wall time {time.perf_counter() - began:.1f} s")
    return _interrupted(args, result, out)


def _truth_table(scene, summary) -> dict:
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
    low, high = _max_z_range(len(rows))
    lines.append(f"  largest |mean - true| / sd: {worst:.2f}. Each ratio is about a standard "
                 "normal draw (one data set),")
    lines.append(f"  so with {len(rows)} coefficients the largest falls between {low:.1f} and "
                 f"{high:.1f} in 90% of data sets.")
    return {"rows": rows, "text": "\n".join(lines)}


def _max_z_range(count: int) -> tuple[float, float]:
    """5% and 95% quantiles of max |Z_i| over ``count`` independent standard normals:
    P(max <= x) = (2 Phi(x) - 1)^count. By Bernstein-von Mises the posterior mean sits
    about N(truth, sd²) over repeated data sets (van der Vaart 1998, Asymptotic
    Statistics, ch. 10)."""
    from scipy.stats import norm

    return tuple(float(norm.ppf((1.0 + q ** (1.0 / count)) / 2.0)) for q in (0.05, 0.95))


def _scale(args) -> int:
    from ..theory.randomwalk import optimal_scale

    choices = [optimal_scale(d) for d in args.dims]
    if args.json:
        payload = [{"dim": c.dim, "scale": c.scale, "acceptance": c.acceptance,
                    "jump_distance": c.jump_distance} for c in choices]
        print(dumps(payload, indent=1))
        return 0
    print("Optimal random-walk Metropolis scale for a proposal matched to H⁻¹")
    print("(Gaussian limit; step = (l/√d)·S z, jump in squared posterior-sd units)\n")
    print(f"{'d':>10}  {'scale l':>8}  {'l/√d':>9}  {'acceptance':>10}  {'jump/step':>9}")
    for c in choices:
        print(f"{c.dim:>10}  {c.scale:>8.4f}  {c.scale / math.sqrt(c.dim):>9.5f}  "
              f"{c.acceptance:>10.4f}  {c.jump_distance:>9.4f}")
    return 0


def _run(args, argv) -> int:
    say = _Say(args.quiet)
    began = time.perf_counter()
    model = load_model(args.model_file, data=args.data)  # before anything is written
    if args.pointwise and model.pointwise is None:
        raise ModelFileError(explain(
            "--pointwise was given but the model defines no pointwise(position).",
            f"model file {model.path}", "define pointwise(position) -> one log likelihood "
            "per observation (the terms of the log density's sum), or leave out --pointwise."))
    if args.checkpoint and args.draws is None:
        raise InputError(explain(
            "--checkpoint needs a run of fixed length, and --draws was not given.",
            "option --checkpoint", "pass --draws N with --checkpoint (a planned run's length "
            "is not known in advance, so it cannot be resumed)."))
    out = _check_before_work(args, model.dim, model)
    checkpoint = None
    if not args.checkpoint:
        return _run_in(args, argv, say, began, model, out, None)
    # one command at a time in a checkpointed --out; the plan (command.json) is written
    # only once this command is sure to start its own run, never before a refusal
    with acquire_lock(out, where=f"fisherwalk run --out {out} --checkpoint"):
        checkpoint = resumable.claim_checkpoint(out, model_file=model.path)
        resumable.write_plan(out, argv=argv, options=_options(args), keys=run_keys(args.seed)[1],
                             model=model, pointwise=args.pointwise)
        return _run_in(args, argv, say, began, model, out, checkpoint)


def _run_in(args, argv, say, began, model, out: Path, checkpoint: Path | None) -> int:
    """The work of ``run`` once its folder is checked (and, with --checkpoint, held)."""
    data = f", {model.data.rows:,} rows of {model.data.path.name}" if model.data else ""
    say(f"fisherwalk run: {model.path} ({model.dim} parameters{data})")
    say("=" * 72)
    say(f"  {args.chains} chains x {_draws_words(args.draws)} after {args.warmup} warm-up steps, "
        f"seed {args.seed}\n")
    result = workflow(model.logdensity, model.initial_position, seed=args.seed,
                      chains=args.chains, draws=args.draws, warmup=args.warmup,
                      fisher=model.fisher, say=say, thin=args.thin, restarts=args.restarts,
                      pointwise=model.pointwise if args.pointwise else None,
                      derived=model.derived, checkpoint=checkpoint, labels=model.labels,
                      sampler=args.sampler, predict=model.predict)
    print()
    focus = args.focus
    try:
        shown = result.summary if focus is None else result.trace.summary(focus=focus)
    except InputError as err:  # after the sampling: keep the run, show every row
        print(f"fisherwalk run: --focus ignored: {err}", file=sys.stderr)
        shown, focus = result.summary, None
    print(str(shown))
    extra = {**resumable.model_facts(model), "compile_cache": _cache_facts(args)}
    say.busy("writing the figures and the record")
    record = build_record("run", argv, _options(args), result, extra)
    files = write_outputs(out, result, record, focus=focus)
    say()
    _say_files(say, out, files)
    say(f"wall time {time.perf_counter() - began:.1f} s")
    return _interrupted(args, result, out)


def _interrupted(args, result: RunResult, out: Path) -> int:
    """0, or 130 (the shell's code for Ctrl-C) with a line saying what was kept."""
    trace = result.trace
    if trace.complete:
        return 0
    print(f"fisherwalk {args.command}: interrupted (Ctrl-C) after {trace.flat.shape[1]} of "
          f"{args.draws} draws per chain; those draws, their summary and the record are "
          f"written in {out}.", file=sys.stderr)
    return 130


def _resume(args, argv) -> int:
    say = _Say(args.quiet)
    began = time.perf_counter()
    folder = Path(args.folder)
    resumable.read_plan(folder)  # refuses a folder without a run, creating nothing
    outputs.check_output_names(folder, outputs.output_names("resume"),
                               where=f"fisherwalk resume {folder}")
    with acquire_lock(folder, where=f"fisherwalk resume {folder}"):
        return _resume_in(args, argv, say, began, folder, resumable.read_plan(folder))


def _resume_in(args, argv, say, began, folder: Path, plan: dict) -> int:
    """The work of ``resume`` while it holds its folder."""
    import fisherwalk

    data = args.data or (plan.get("data_file") or {}).get("path")
    model = load_model(args.model, data=data)
    pointwise = None
    if plan.get("pointwise"):
        if model.pointwise is None:
            raise ModelFileError(explain(
                "The run was started with --pointwise but the model defines no "
                "pointwise(position).", f"model file {model.path}",
                "give the model file of the original run."))
        pointwise = model.pointwise
    say(f"fisherwalk resume: {folder} with {model.path}")
    t = time.perf_counter()
    trace = fisherwalk.resume(folder / resumable.CHECKPOINT_FOLDER, model.logdensity,
                              position=model.initial_position,
                              progress=None if not args.quiet else False,
                              pointwise=pointwise, derived=model.derived,
                              predict=model.predict)
    seconds = {"sampling": time.perf_counter() - t}
    t = time.perf_counter()
    trace = labelled(trace, model.labels)
    summary = trace.summary()
    seconds["diagnostics"] = time.perf_counter() - t
    print()
    print(str(summary))
    result = RunResult(trace, summary, seconds, plan["keys"])
    extra = {**resumable.model_facts(model), "compile_cache": _cache_facts(args),
             "resumed": {"original_argv": plan.get("argv"),
                         "note": "start and warm-up ran in the original command; seconds "
                                 "cover the resumed sampling only"}}
    record = build_record("resume", argv, plan["options"], result, extra)
    files = write_outputs(folder, result, record)
    say()
    _say_files(say, folder, files)
    say(f"wall time {time.perf_counter() - began:.1f} s")
    return 0


def _show(args) -> int:
    """Print a finished run's summary and write its figures again (no model needed)."""
    import fisherwalk

    from ..results import plots  # the optional extra 'plots' (matplotlib)

    trace = fisherwalk.reopen(args.folder)
    try:
        interval = float(args.interval)
    except ValueError:
        interval = float("nan")
    summary = trace.summary(interval=interval, focus=args.focus)
    print(str(summary))
    out = Path(args.figures or args.folder)
    paths = plots.save_all(trace, out, focus=args.focus)
    print(f"\nfigures written in {out}/: {', '.join(p.name for p in paths)}", file=sys.stderr)
    return 0


def _cache_facts(args) -> dict:
    facts = dict(getattr(args, "compile_cache", None) or {"used": False})
    if facts.get("used"):
        facts["entries_after"] = compilecache.entries(Path(facts["folder"]))
    return facts


# ---------------------------------------------------------------------------------- parser


def _common(sub: argparse.ArgumentParser, out_default: str) -> None:
    sub.add_argument("--out", default=out_default, metavar="DIR",
                     help=f"output folder, created if needed (default: {out_default})")
    sub.add_argument("--chains", default=DEFAULT_CHAINS, metavar="N",
                     help=f"number of chains (default {DEFAULT_CHAINS})")
    sub.add_argument("--draws", default=DEFAULT_DRAWS, metavar="N",
                     help="draws kept per chain after the warm-up, at least 4 (default: "
                          "planned, until every ESS >= 400 and R-hat < 1.01, within a budget)")
    sub.add_argument("--warmup", default=DEFAULT_WARMUP, metavar="N",
                     help=f"warm-up steps per chain (default {DEFAULT_WARMUP})")
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
                    "Warning: " + _TRUST,
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
                    "(its log density is checked).\n\nWarning: " + _TRUST,
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


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``fisherwalk`` command; returns the exit code.

    Exit codes: 0 success; 2 a usage error, a model file that cannot be used, an output
    folder that cannot take the outputs or any other refusal of the operating system
    (checked before the fit wherever possible); 1 a failure of the fit or the sampling
    (the message says what and where); 130 interrupted with Ctrl-C (the draws finished
    by then are written when sampling had begun).
    """
    argv = list(sys.argv[1:] if argv is None else argv)
    args = build_parser().parse_args(argv)
    import jax

    jax.config.update("jax_enable_x64", True)  # the application's choice, not the library's
    if args.command not in ("scale", "show"):
        args.compile_cache = compilecache.switch(args.compile_cache_on)
    try:
        _check_numbers(args)
        if args.command == "scale":
            return _scale(args)
        if args.command == "demo":
            return _demo(args, argv)
        if args.command == "resume":
            return _resume(args, argv)
        if args.command == "show":
            return _show(args)
        return _run(args, argv)
    except (ModelFileError, InputError) as err:
        _error_note(args, err)
        return 2
    except FisherwalkError as err:
        _error_note(args, err)
        return 1
    except OSError as err:
        where = f": {err.filename}" if err.filename else ""
        print(f"fisherwalk {args.command}: {err.strerror or err}{where}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        if args.command == "run" and args.checkpoint:
            print(f"fisherwalk run: interrupted; the sampling's progress is saved. Finish it "
                  f"with: fisherwalk resume {args.out} --model {args.model_file}",
                  file=sys.stderr)
            return 130
        print(f"fisherwalk {args.command}: interrupted (Ctrl-C) before any draw could be "
              "kept; nothing was written.", file=sys.stderr)
        return 130


def _error_note(args, err: Exception) -> None:
    """The message on standard error and, for run and resume, as error.txt in the output
    folder (the only file a failed run leaves there)."""
    text = f"fisherwalk {args.command}: {err}"
    print(text, file=sys.stderr)
    folder = {"run": getattr(args, "out", None), "resume": getattr(args, "folder", None)}.get(
        args.command)
    outputs.write_error_note(folder, text)  # into an existing folder only, never a link


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
