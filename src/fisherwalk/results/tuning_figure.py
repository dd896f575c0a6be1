"""The tuning figure: the acceptance (and the random walk's jump) that the Gaussian limit
predicts against the family's tuned parameter, with the chosen, refined and realised values.
"""

from __future__ import annotations

import math

import numpy as np

from . import diagnostics
from .canvas import figure, save_figure

__all__ = ["plot_tuning"]


def plot_tuning(trace, path=None):
    """The tuning picture for this dimension and proposal shape.

    Top: the acceptance rate that the Gaussian limit predicts at each scale l (Roberts,
    Gelman & Gilks 1997, Ann. Appl. Probab. 7(1), computed for this finite d and the
    spectrum of A = Sᵀ H S). Bottom: the predicted expected squared jump distance per
    step in whitened units, |Lᵀ Δθ|² with L Lᵀ = H (standard deviations of the Laplace
    approximation, summed over parameters); its peak is the optimal l. A posterior
    wider than N(mode, H⁻¹) shows a realised jump above the curve, and the warm-up then
    raises l to bring the acceptance back to the target. Marked: the scale start() chose
    from the theory, the scale after the warm-up, and the realised acceptance and jump
    of the walk at the refined scale. Realised points on the curves say the Gaussian
    picture holds; points off them say the posterior differs from N(mode, H⁻¹) (wider,
    narrower, skewed).
    """
    from ..theory.randomwalk import acceptance_curve

    facts = trace.facts
    if facts.setting_label != "scale":
        return _plot_gradient_tuning(trace, path)
    warmed = facts.warmed
    dim = int(facts.dim)
    spectrum = np.asarray(facts.spectrum, dtype=float)
    matched = bool(np.allclose(spectrum, 1.0, rtol=1e-6))
    chosen = float(facts.setting_theory)
    refined = float(facts.setting)
    top = max(3.0 * max(chosen, refined), 6.0)
    grid = np.linspace(0.05, top, 240)
    curve = acceptance_curve(grid, dim, None if matched else spectrum)
    marks = acceptance_curve(np.array([chosen, refined]), dim, None if matched else spectrum)
    realised_acc = float(np.mean(trace.accepted))
    realised_jump = None
    if trace.thin == 1 and trace.flat.shape[1] > 1:
        realised_jump = diagnostics.whitened_jump(
            np.asarray(trace.flat), np.asarray(facts.whitening)).mean

    fig = figure(7.6, 7.0)
    ax_acc, ax_jump = fig.subplots(2, 1, sharex=True)
    ax_acc.plot(grid, curve.acceptance, color="#1b6ca8", lw=1.8, label="predicted acceptance")
    ax_jump.plot(grid, curve.jump_distance, color="#1b6ca8", lw=1.8,
                 label="predicted jump distance (all directions)")
    if not matched:
        ax_jump.plot(grid, curve.slowest_jump * dim, color="#1b6ca8", lw=1.2, ls=":",
                     label="slowest direction's jump x d")
    for ax, values in ((ax_acc, marks.acceptance), (ax_jump, marks.jump_distance)):
        if not warmed:  # no refine(): walk() used the scale start() chose
            ax.axvline(refined, color="#e09f3e", ls="-", lw=1.0,
                       label=f"chosen by start(), no warm-up: l = {refined:.3f}")
            ax.plot([refined], values[1:], "o", color="#1b6ca8", ms=5, zorder=3,
                    label="predicted at this scale")
            continue
        ax.axvline(chosen, color="#6a4c93", ls="--", lw=1.0,
                   label=f"chosen by start(): l = {chosen:.3f}")
        ax.axvline(refined, color="#e09f3e", ls="-", lw=1.0,
                   label=f"after warm-up: l = {refined:.3f}")
        ax.plot([chosen, refined], values, "o", color="#1b6ca8", ms=5, zorder=3,
                label="predicted at these scales")
    ax_acc.axhline(facts.predicted_acceptance, color="grey", ls=":", lw=1.0,
                   label=f"target acceptance {facts.predicted_acceptance:.3f}")
    ax_acc.plot([refined], [realised_acc], "D", color="#d1495b", ms=8, zorder=4,
                label=f"realised acceptance {realised_acc:.3f}")
    if realised_jump is not None:
        ax_jump.plot([refined], [realised_jump], "D", color="#d1495b", ms=8, zorder=4,
                     label=f"realised jump {realised_jump:.3f}")
    ax_acc.set_ylabel("acceptance rate")
    ax_acc.set_ylim(0, 1)
    precision = "re-estimated precision" if facts.shape_kind == "warm-up" else "H"
    ax_jump.set_ylabel(f"squared jump per step, whitened\n|Lᵀ Δθ|² with L Lᵀ = {precision}")
    ax_jump.set_xlabel("scale l  (proposal step = l/√d · S z)")
    ax_jump.set_ylim(bottom=0)
    ax_acc.legend(fontsize=8, loc="upper right")
    ax_jump.legend(fontsize=8, loc="upper right")
    shape = "proposal matched to H⁻¹" if matched else (
        f"proposal shape '{facts.shape_kind}', spectrum of SᵀHS "
        f"{spectrum.min():.2g} to {spectrum.max():.2g}")
    fig.suptitle(f"Tuning for d = {dim}: {shape}\n"
                 "curves: Gaussian-limit predictions; diamonds: this walk", fontsize=11)
    save_figure(fig, path)
    return fig


def _plot_gradient_tuning(trace, path=None):
    """A gradient sampler's tuning picture: the acceptance the Gaussian limit predicts
    against BlackJAX's step size on the whitened target N(0, I_d) (exact for MALA and HMC
    with its jittered time, fisherwalk.theory.gradient; for NUTS the acceptance statistic of
    the circle model, a rough guide), the theory step, the step after dual averaging and
    the realised acceptance."""
    from ..theory.gradient import stable_step_limit, step_acceptance

    facts = trace.facts
    dim, sampler = int(facts.dim), facts.sampler
    chosen, refined = float(facts.setting_theory), float(facts.setting)
    stable = stable_step_limit(sampler)  # leapfrog: the curve ends just short of ε = 2
    limit = 0.975 * stable if math.isfinite(stable) else 3.0 * max(chosen, refined)
    grid = np.linspace(0.02, max(limit, 1.5 * max(chosen, refined)), 120)
    curve = np.asarray(step_acceptance(sampler, grid, dim))
    realised = float(np.mean(trace.acceptance_rate))
    fig = figure(7.6, 4.4)
    ax = fig.subplots(1, 1)
    ax.plot(grid, curve, color="#1b6ca8", lw=1.8, label="predicted acceptance")
    ax.axvline(chosen, color="#6a4c93", ls="--", lw=1.0,
               label=f"theory step for d = {dim}: {chosen:.4g}")
    if facts.warmed:
        ax.axvline(refined, color="#e09f3e", ls="-", lw=1.0,
                   label=f"after dual averaging: {refined:.4g}")
        ax.axhline(facts.aim, color="grey", ls=":", lw=1.0,
                   label=f"target acceptance {facts.aim:.3f}")
    else:
        ax.set_title("no warm-up: the theory step", fontsize=9)
    ax.plot([refined], [realised], "D", color="#d1495b", ms=8, zorder=4,
            label=f"realised acceptance {realised:.3f}")
    ax.set_ylim(0, 1)
    ax.set_xlabel(f"step size (BlackJAX's step_size for {sampler})")
    ax.set_ylabel("acceptance")
    ax.legend(fontsize=8, loc="upper right")
    fig.suptitle(f"Tuning of {facts.title} for d = {dim}, posterior whitened by S Sᵀ "
                 f"({facts.shape_kind})\ncurve: Gaussian-limit prediction; diamond: this "
                 "walk", fontsize=11)
    save_figure(fig, path)
    return fig
