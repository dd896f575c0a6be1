"""Figures of a walk, saved as PNG files (optional extra: ``pip install fisherwalk[plots]``).

The core library never imports this module, and this module imports matplotlib only
inside its functions. Figures are built as ``matplotlib.figure.Figure`` objects drawn
by the Agg renderer: no display, no pyplot, no global backend is touched, so the
functions run on a headless server as well as in a notebook.

Each figure stands alone (title, axis labels, legend):

* :func:`plot_traces`: every chain's path, one panel per parameter.
* :func:`plot_tuning`: predicted acceptance and jump distance against the scale l for
  this dimension and proposal shape, with the chosen, refined and realised values.
* :func:`plot_marginals`: each marginal of the draws against the Gaussian (Laplace)
  approximation N(mode, H⁻¹).
* :func:`plot_autocorrelation`: autocorrelation by lag, one panel per parameter.

:func:`save_all` writes all four.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError, explain
from . import diagnostics
from .canvas import CHAIN_COLOURS, figure, save_figure
from .facts import in_written_order
from .focus import focus_indices, prominent
from .tuning_figure import plot_tuning

__all__ = [
    "plot_traces",
    "plot_tuning",
    "plot_marginals",
    "plot_autocorrelation",
    "save_all",
    "FILE_NAMES",
]

FILE_NAMES = {
    "traces": "traces.png",
    "tuning": "tuning.png",
    "marginals": "marginals.png",
    "autocorrelation": "autocorrelation.png",
}
MAX_PANELS = 16  # parameters shown per figure; more would be unreadable
def _labels(trace, labels: Sequence[str] | None) -> list[str]:
    """Panel titles in ravelled order (the order of ``trace.flat``); ``labels`` are given
    one per parameter in ravelled order, as ``trace.names``."""
    names = list(trace.names)
    if labels is None:
        return names
    labels = list(labels)
    if len(labels) != len(names):
        raise InputError(explain(
            f"{len(labels)} labels were given for {len(names)} parameters.",
            "fisherwalk.results.plots (labels=...)",
            f"pass one label per parameter, in the order {', '.join(names[:6])}"
            f"{', ...' if len(names) > 6 else ''}."))
    return [f"{name}  ({label})" if label != name else name
            for name, label in zip(names, labels, strict=True)]


def _matches(names: list[str], text: Any) -> bool:
    try:
        return bool(focus_indices(names, text))
    except InputError:
        return False


def panels(trace, focus: Any = None, max_panels: int = MAX_PANELS) -> tuple[list[int], str]:
    """The parameters a figure shows, as indices into ``trace.flat``, in written order, and
    a note for the title. ``focus`` chooses them (:mod:`fisherwalk.results.focus`); with
    none and more parameters than ``max_panels``, the ones that matter most are shown
    (worst R-hat, lowest ESS, group-level scales)."""
    flat = np.asarray(trace.flat)
    dim = flat.shape[2]
    order = in_written_order(trace.facts.order, dim)
    written = [trace.names[j] for j in order]
    if focus is not None:  # derived quantities and predictions have no panels: skipped
        texts = [focus] if isinstance(focus, str) else list(focus)
        chosen = sorted({j for text in texts if _matches(written, text)
                         for j in focus_indices(written, text, where="plots (focus=...)")})
        if not chosen:
            focus_indices(written, focus, where="plots (focus=...)")  # refuse, naming them
        note = f" ({len(chosen[:max_panels])} chosen of {dim} parameters)"
        return [int(order[j]) for j in chosen[:max_panels]], note
    if dim <= max_panels:
        return [int(j) for j in order], ""
    if flat.shape[1] >= 4:
        rhat = np.atleast_1d(diagnostics.rhat(flat[:, :, order]))
        ess = np.minimum(np.atleast_1d(diagnostics.ess_bulk(flat[:, :, order])),
                         np.atleast_1d(diagnostics.ess_tail(flat[:, :, order])))
    else:
        rhat, ess = np.ones(dim), np.ones(dim)
    picked = prominent(written, rhat, ess, max_panels)
    note = (f" ({len(picked)} of {dim} parameters: worst R-hat, lowest ESS, "
            "group-level scales)")
    return [int(order[j]) for j in picked], note


def _space(trace, sites: bool) -> str:
    """Which space a figure is in, for a model with a space of its own ('' otherwise)."""
    if trace.space is None:
        return ""
    return ("\n(the model's sites, constrained values)" if sites
            else "\n(the sampler's unconstrained coordinates, where the Laplace fit lives)")


def _grid(fig, count: int):
    from matplotlib.ticker import MaxNLocator

    cols = min(4, count)
    rows = math.ceil(count / cols)
    axes = fig.subplots(rows, cols, squeeze=False)
    for ax in axes.flat[count:]:
        ax.set_visible(False)
    for ax in axes.flat[:count]:
        ax.xaxis.set_major_locator(MaxNLocator(5))
        ax.tick_params(labelsize=7)
    return axes.flat[:count]


def _legend(fig, ncols: int) -> None:
    """One legend for the whole grid, below it, with lines thick enough to read."""
    handles, texts = fig.axes[0].get_legend_handles_labels()
    legend = fig.legend(handles, texts, loc="outside lower center", ncols=ncols, fontsize=8,
                        frameon=False)
    for line in legend.get_lines():
        line.set_linewidth(2.0)
        line.set_alpha(1.0)


def _panel_size(count: int) -> tuple[float, float]:
    cols = min(4, count)
    rows = math.ceil(count / cols)
    return 3.4 * cols + 0.4, 2.5 * rows + 0.9


def _laplace_moments(trace) -> tuple[np.ndarray, np.ndarray]:
    mode = np.asarray(trace.facts.mode, dtype=float)
    cholesky = np.asarray(trace.facts.fisher_cholesky, dtype=float)
    inverse = np.linalg.inv(cholesky)  # H⁻¹ = L⁻ᵀ L⁻¹: diagonal = column sums of L⁻¹ squared
    return mode, np.sqrt(np.sum(inverse**2, axis=0))


def plot_traces(trace, path=None, *, labels: Sequence[str] | None = None,
                max_panels: int = MAX_PANELS, max_points: int = 2000, focus: Any = None):
    """Chain traces: each parameter's value against the draw index, chains coloured.

    The dashed line is the posterior mode found by the Laplace fit. Well-mixed chains
    overlap and look like stationary noise around the same level; a chain that wanders
    off, sticks (flat stretches) or sits apart from the others is a problem.

    Parameters
    ----------
    trace
        A :class:`fisherwalk.Trace`.
    path
        Where to write the PNG (``None``: do not write).
    labels
        Readable names, one per parameter, shown beside fisherwalk's names.
    max_panels
        At most this many parameters are drawn (see ``focus``).
    focus
        Which parameters (names, leaf names or patterns; :mod:`fisherwalk.results.focus`).
        ``None``: all, or, when there are more than ``max_panels``, the ones that matter
        most (worst R-hat, lowest ESS, group-level scales).
    max_points
        Longer chains are drawn at every k-th draw (stated in the title): more points
        than pixels only blur the picture.

    Returns
    -------
    matplotlib.figure.Figure
    """
    flat = np.asarray(trace.flat)
    names = _labels(trace, labels)
    mode, _ = _laplace_moments(trace)
    if trace.space is not None:  # a model's own space (fisherwalk.models): the sites' values
        flat, site_names = trace.columns()
        names, mode = list(site_names), None
        chosen = (list(range(len(names))) if focus is None
                  else focus_indices(names, focus, where="plots (focus=...)"))[:max_panels]
        note = f" ({len(chosen)} of {len(names)} sites)" if len(chosen) < len(names) else ""
    else:
        chosen, note = panels(trace, focus, max_panels)
    chains, draws, dim = flat.shape
    fig = figure(*_panel_size(len(chosen)))
    every = max(1, math.ceil(draws / max_points))
    steps = np.arange(0, draws, every) * trace.thin
    if every > 1:
        note += f", 1 draw in {every} shown"
    for k, (i, ax) in enumerate(zip(chosen, _grid(fig, len(chosen)), strict=True)):
        for c in range(chains):
            ax.plot(steps, flat[c, ::every, i], lw=0.5, alpha=0.75,
                    color=CHAIN_COLOURS[c % len(CHAIN_COLOURS)],
                    label=f"chain {c}" if k == 0 else None)
        if mode is not None:
            ax.axhline(mode[i], color="black", ls="--", lw=0.9,
                       label="Laplace mode" if k == 0 else None)
        ax.set_title(names[i], fontsize=9)
        ax.set_xlabel("step after warm-up" if trace.facts.warmed else "step (no warm-up)",
                      fontsize=8)
        ax.set_ylabel("value", fontsize=8)
    _legend(fig, min(chains + 1, 9))
    fig.suptitle(f"Chain traces: {chains} chains x {draws} draws{note}{_space(trace, True)}",
                 fontsize=11)
    save_figure(fig, path)
    return fig


def plot_marginals(trace, path=None, *, labels: Sequence[str] | None = None,
                   max_panels: int = MAX_PANELS, bins: int = 40, focus: Any = None):
    """Each parameter's marginal: the draws against the Laplace approximation.

    Bars: histogram of all chains' draws (a density). Solid line: a kernel density
    estimate of the draws. Dashed line: the marginal of N(mode, H⁻¹), the large-sample
    (Bernstein-von Mises) picture that tuned the sampler. Each panel states the shift
    of the posterior mean from the mode and the ratio of the posterior sd to the
    Laplace sd; 0 and 1 mean the Gaussian picture holds for that parameter.
    """
    from scipy import stats

    flat = np.asarray(trace.flat)
    chains, draws, dim = flat.shape
    chosen, note = panels(trace, focus, max_panels)
    names = _labels(trace, labels)
    mode, laplace_sd = _laplace_moments(trace)
    fig = figure(*_panel_size(len(chosen)))
    pooled = flat.reshape(-1, dim)
    rng = np.random.default_rng(0)
    for k, (i, ax) in enumerate(zip(chosen, _grid(fig, len(chosen)), strict=True)):
        x = pooled[:, i]
        mean, sd = float(x.mean()), float(x.std(ddof=1))
        lo = min(x.min(), mode[i] - 4 * laplace_sd[i])
        hi = max(x.max(), mode[i] + 4 * laplace_sd[i])
        grid = np.linspace(lo, hi, 300)
        heights, _, _ = ax.hist(x, bins=bins, range=(x.min(), x.max()) if sd > 0 else None,
                                density=True, color="#9ecae1", edgecolor="white", lw=0.3,
                                label="draws (histogram)" if k == 0 else None)
        top = float(np.max(heights))
        if sd > 0:
            sub = x if x.size <= 4000 else rng.choice(x, 4000, replace=False)
            kde = stats.gaussian_kde(sub)(grid)
            top = max(top, float(kde.max()))
            ax.plot(grid, kde, color="#1b6ca8", lw=1.4,
                    label="draws (kernel density)" if k == 0 else None)
        gauss = stats.norm.pdf(grid, mode[i], laplace_sd[i])
        ax.plot(grid, gauss, color="#d1495b", ls="--", lw=1.4,
                label="Laplace N(mode, H⁻¹)" if k == 0 else None)
        ax.set_ylim(0.0, 1.3 * max(top, float(gauss.max())))  # room for the text box
        shift = (mean - mode[i]) / laplace_sd[i]
        ratio = sd / laplace_sd[i]
        ax.text(0.02, 0.97, f"(mean − mode) / Laplace sd: {shift:+.2f}\n"
                f"sd / Laplace sd: {ratio:.2f}",
                transform=ax.transAxes, va="top", ha="left", fontsize=7,
                bbox={"facecolor": "white", "alpha": 0.7, "lw": 0})
        ax.set_title(names[i], fontsize=9)
        ax.set_xlabel("value", fontsize=8)
        ax.set_ylabel("density", fontsize=8)
    _legend(fig, 3)
    fig.suptitle(f"Marginals of {chains * draws} draws against the Laplace approximation"
                 f"{note}{_space(trace, False)}", fontsize=11)
    save_figure(fig, path)
    return fig


def plot_autocorrelation(trace, path=None, *, labels: Sequence[str] | None = None,
                         max_panels: int = MAX_PANELS, max_lag: int | None = None,
                         focus: Any = None):
    """Autocorrelation of each parameter's draws by lag, averaged over chains.

    A fast decay means nearly independent draws. Each panel gives the integrated
    autocorrelation time tau (Geyer 1992, Statistical Science 7(4)): about tau steps
    per independent draw, so N/tau is the effective number of the N draws. The grey
    band is ±2/√(chains·draws), where the autocorrelation of independent draws would
    fall.
    """
    flat = np.asarray(trace.flat)
    chains, draws, dim = flat.shape
    chosen, note = panels(trace, focus, max_panels)
    names = _labels(trace, labels)
    taus = np.atleast_1d(diagnostics.integrated_autocorrelation_time(flat))
    if max_lag is None:
        finite = taus[np.isfinite(taus)]
        longest = float(finite.max()) if finite.size else 10.0
        max_lag = int(min(draws - 1, max(20, math.ceil(4 * longest))))
    max_lag = int(min(max_lag, draws - 1))
    acf = np.atleast_2d(diagnostics.autocorrelation(flat, max_lag))
    lags = np.arange(max_lag + 1) * trace.thin
    band = 2.0 / math.sqrt(chains * draws)
    fig = figure(*_panel_size(len(chosen)))
    for k, (i, ax) in enumerate(zip(chosen, _grid(fig, len(chosen)), strict=True)):
        ax.axhspan(-band, band, color="#dddddd", lw=0,
                   label="±2/√N: independent draws" if k == 0 else None)
        ax.axhline(0.0, color="black", lw=0.6)
        ax.vlines(lags, 0.0, acf[i], color="#1b6ca8", lw=1.0,
                  label="autocorrelation" if k == 0 else None)
        ess = chains * draws / taus[i] if np.isfinite(taus[i]) and taus[i] > 0 else 0.0
        ax.text(0.97, 0.95, f"τ = {taus[i]:.1f} steps\nN/τ = {ess:.0f} effective draws",
                transform=ax.transAxes,
                ha="right", va="top", fontsize=7,
                bbox={"facecolor": "white", "alpha": 0.7, "lw": 0})
        ax.set_ylim(min(-0.1, float(acf[i].min()) - 0.05), 1.05)
        ax.set_title(names[i], fontsize=9)
        ax.set_xlabel("lag (steps)", fontsize=8)
        ax.set_ylabel("autocorrelation", fontsize=8)
    _legend(fig, 2)
    fig.suptitle(f"Autocorrelation by lag, mean over {chains} chains; τ: integrated "
                 f"autocorrelation time{note}{_space(trace, False)}", fontsize=11)
    save_figure(fig, path)
    return fig


def save_all(trace, out_dir, *, labels: Sequence[str] | None = None,
             focus: Any = None) -> list[Path]:
    """Write the four figures as PNG files into ``out_dir``; return their paths.

    File names: ``traces.png``, ``tuning.png``, ``marginals.png``,
    ``autocorrelation.png`` (see :data:`FILE_NAMES`). The tuning figure needs a walker
    that has been through :func:`fisherwalk.refine` or :func:`fisherwalk.start`.
    ``focus`` chooses the parameters of the per-parameter figures (see
    :func:`plot_traces`).
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    makers: dict[str, Any] = {
        "traces": lambda p: plot_traces(trace, p, labels=labels, focus=focus),
        "tuning": lambda p: plot_tuning(trace, p),
        "marginals": lambda p: plot_marginals(trace, p, labels=labels, focus=focus),
        "autocorrelation": lambda p: plot_autocorrelation(trace, p, labels=labels,
                                                          focus=focus),
    }
    paths = []
    for key, make in makers.items():
        path = out / FILE_NAMES[key]
        make(path)
        paths.append(path)
    return paths
