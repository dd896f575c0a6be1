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
never changes JAX's configuration). Its parser is :mod:`fisherwalk.cli.parser`, its
account of each step :mod:`fisherwalk.cli.narration`, its checks before any work
:mod:`fisherwalk.cli.preflight`. :func:`workflow` runs the steps (start, refine,
walk, summary) and tells the user what each found; :func:`fisherwalk.cli.runrecord.write_outputs`
writes ``draws.npz`` (plain arrays, no pickle), the plots and ``record.json``;
:func:`fisherwalk.cli.modelfile.load_model` imports and checks a model file.
"""

from __future__ import annotations

import math
import sys
import textwrap
import time
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ..base.jsonio import dumps
from ..base.lock import acquire_lock
from ..errors import FisherwalkError, InputError, ModelFileError, explain
from ..samplers import registry
from . import compilecache, outputs, resumable
from .modelfile import load_model
from .narration import (
    Say,
    draws_words,
    say_files,
    say_fit,
    say_sampling,
    say_warmup,
    warmup_words,
)
from .parser import DEFAULT_WARMUP, build_parser
from .preflight import check_before_work, check_numbers
from .runrecord import RunResult, build_record, run_keys, sha256_file, write_outputs
from .scenarios import truth_table

__all__ = ["main", "workflow", "RunResult"]

MIN_KEPT = 4  # draws per chain an interrupted run needs for its outputs to be written

# --------------------------------------------------------------------------------- workflow


def workflow(logdensity, position, *, seed: int, chains: int, draws: int | None,
             warmup: int | None = DEFAULT_WARMUP, fisher=None, say: Say | None = None,
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

    say = say or Say(quiet=True)
    progress = None if not say.quiet else False
    (k_start, k_warm, k_walk), keys = run_keys(seed)
    seconds: dict[str, float] = {}

    say.busy("Laplace fit: mode search and Fisher information (includes compilation)")
    t = time.perf_counter()
    walker = fisherwalk.start(logdensity, position, k_start, chains, fisher=fisher,
                              restarts=restarts, progress=progress, sampler=sampler)
    seconds["start"] = time.perf_counter() - t

    say_fit(say, walker, seconds["start"])

    t = time.perf_counter()
    walker = fisherwalk.refine(walker, k_warm, warmup, progress=progress)
    seconds["warmup"] = time.perf_counter() - t
    say_warmup(say, walker, seconds["warmup"], chains)

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
    say_sampling(say, trace, summary, seconds["sampling"])
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


# ---------------------------------------------------------------------------- subcommands


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


def _demo(args, argv) -> int:
    from . import scenarios

    say = Say(args.quiet)
    began = time.perf_counter()
    scene = scenarios.scenario(args.scenario)
    out = check_before_work(args, scene.X.shape[1])
    data_path = scene.to_csv(out / "data.csv")
    n, p = scene.X.shape
    say(f"fisherwalk demo: the '{scene.name}' scenario (invented data, seed {scene.seed})")
    say("=" * 72)
    say(textwrap.indent(scene.story, "  "))
    say(f"\n  {n:,} records, {p} coefficients ({scene.family}); data in {data_path}")
    say(f"  {args.chains} chains x {draws_words(args.draws)} after {warmup_words(args.warmup)}, "
        f"seed {args.seed}\n")
    result = workflow(scene.logdensity, scene.initial_position, seed=args.seed,
                      chains=args.chains, draws=args.draws, warmup=args.warmup, say=say,
                      thin=args.thin, restarts=args.restarts, labels=scene.names,
                      sampler=args.sampler)
    print()
    print(str(result.summary))
    truth = truth_table(scene, result.summary)
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
    say_files(say, out, files)
    say(f"wall time {time.perf_counter() - began:.1f} s")
    return _interrupted(args, result, out)


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
    say = Say(args.quiet)
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
    out = check_before_work(args, model.dim, model)
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
    say(f"  {args.chains} chains x {draws_words(args.draws)} after {warmup_words(args.warmup)}, "
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
    say_files(say, out, files)
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
    say = Say(args.quiet)
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
    say_files(say, folder, files)
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
        check_numbers(args)
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
