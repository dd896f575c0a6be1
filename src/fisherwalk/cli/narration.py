"""What the ``fisherwalk`` command tells the user, step by step: the fit, the tuning, the
warm-up, the sampling and the files written (on stdout, unless ``--quiet``)."""

from __future__ import annotations

import math
import sys
import textwrap
from pathlib import Path

import numpy as np

__all__ = ["Say", "say_fit", "say_warmup", "say_sampling", "say_files", "draws_words",
           "warmup_words", "step_line", "wrap"]


class Say:
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


def say_fit(say: Say, walker, seconds: float) -> None:
    fit, tuning = walker.report.laplace, walker.tuning
    cond = np.linalg.cond(np.asarray(fit.fisher))
    source = "autodiff Hessian" if fit.fisher_source == "hessian" else "from the model"
    say(step_line("[1/4] Laplace fit (compilation included)", seconds))
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
        say(wrap(f"note: {note}"))


def say_warmup(say: Say, walker, seconds: float, chains: int) -> None:
    warm = walker.report.warmup
    say(step_line(f"[3/4] warm-up, {warm.steps} steps x {chains} chains", seconds))
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
        say(wrap("      proposal shape re-estimated because: " + "; ".join(warm.reasons)
                  if warm.reasons else "      proposal shape re-estimated (asked for)"))
    else:
        say("      proposal shape kept: every check agreed with the Gaussian picture")


def say_sampling(say: Say, trace, summary, seconds: float) -> None:
    chains, draws = trace.flat.shape[:2]
    say(step_line(f"[4/4] sampling, {draws} draws x {chains} chains", seconds))
    if trace.length is not None:
        say(wrap(f"      {trace.length.line()}"))
    per_chain = " ".join(f"{a:.3f}" for a in np.mean(trace.accepted, axis=1))
    say(f"      acceptance realised {summary.acceptance_pooled:.3f} (chains: {per_chain})")
    say(f"      acceptance aimed at {summary.target_acceptance:.3f}")
    if summary.realised_jump is not None:
        say(f"      jump per step: predicted {summary.predicted_jump:.3f}, realised "
            f"{summary.realised_jump:.3f}")


def draws_words(draws) -> str:
    return "draws planned (ESS >= 400, R-hat < 1.01)" if draws is None else f"{draws} draws"


def warmup_words(steps) -> str:
    return "the sampler's default warm-up" if steps is None else f"{steps} warm-up steps"


def step_line(title: str, seconds: float) -> str:
    return f"{title:<44}{seconds:6.1f} s"


def wrap(text: str) -> str:
    return textwrap.fill(text, width=96, subsequent_indent="        ")


def say_files(say: Say, out: Path, files: dict[str, Path]) -> None:
    say(f"files in {out}/")
    for name, path in files.items():
        say(f"  {path.name:<22} {name}")
