"""How a :class:`fisherwalk.Summary` is printed: header, tables, warnings.

Every number a warning quotes is formatted here and in :mod:`fisherwalk.results.alerts` the
same way (R-hat with enough decimals to sit on the right side of its threshold, ESS
rounded down), so the text never contradicts itself.
"""

from __future__ import annotations

import math
import textwrap
from typing import Any

import numpy as np

from . import alerts

__all__ = ["render", "interval_probabilities"]

_GAP = "  "


def interval_probabilities(interval: float) -> tuple[float, float]:
    """Probabilities of the central interval's ends: 0.9 -> exactly (0.05, 0.95)."""
    low = round((1.0 - interval) / 2.0, 12)
    return low, round(1.0 - low, 12)


def _percent(prob: float) -> str:
    return f"{100.0 * prob:.6g}%"


def _num(value: float, decimals: int) -> str:
    if not math.isfinite(value):
        return str(value)
    if value != 0 and (abs(value) >= 1e7 or abs(value) < 10.0 ** (-decimals) / 2):
        return f"{value:.3e}"
    return f"{value:.{decimals}f}"


def _decimals(sd: float, mean: float) -> int:
    """Decimals that show the sd with three significant digits (0 to 8)."""
    scale = sd if math.isfinite(sd) and sd > 0 else abs(mean)
    if not math.isfinite(scale) or scale == 0:
        return 3
    return int(min(8, max(0, 2 - math.floor(math.log10(scale)))))


def _two_digits(value: float) -> str:
    if not math.isfinite(value):
        return str(value)
    if value == 0:
        return "0"
    return _num(value, int(min(10, max(0, 1 - math.floor(math.log10(abs(value)))))))


def _rate(value: float) -> str:
    """Three significant digits without an exponent below 10⁷ (ESS per second)."""
    if not math.isfinite(value) or value == 0:
        return _two_digits(value)
    return _num(value, int(min(10, max(0, 2 - math.floor(math.log10(abs(value)))))))


def _row(s, j: int) -> list[str]:
    places = _decimals(float(s.sd[j]), float(s.mean[j]))
    flags = []
    if not (np.isfinite(s.rhat[j]) and s.rhat[j] <= s.rhat_limit):
        flags.append("R-hat")
    if min(s.ess_bulk[j], s.ess_tail[j]) < s.ess_limit:
        flags.append("ESS")
    if j < len(s.flags) and s.flags[j]:
        flags.append(s.flags[j])
    cells = [
        s.names[j],
        _num(float(s.mean[j]), places), _num(float(s.sd[j]), places),
        _two_digits(float(s.mcse[j])),
        _num(float(s.lower[j]), places), _num(float(s.median[j]), places),
        _num(float(s.upper[j]), places),
        alerts.ess_text(float(s.ess_bulk[j])), alerts.ess_text(float(s.ess_tail[j])),
    ]
    if s.ess_bulk_per_second is not None:
        cells.append(_rate(float(s.ess_bulk_per_second[j])))
    return cells + [alerts.rhat_text(float(s.rhat[j]), s.rhat_limit), " ".join(flags) or "-"]


def _error_row(s, j: int) -> list[str]:
    return [s.names[j]] + [_two_digits(float(getattr(s, f)[j]))
                           for f in ("mcse_sd", "mcse_lower", "mcse_median", "mcse_upper")]


def _grid(titles, rows, groups=None, text_last: bool = False) -> list[str]:
    """Aligned columns: the first left-aligned, numbers right-aligned, an optional last
    text column left-aligned; optional group titles spanning columns above."""
    widths = [max(len(t), *(len(r[i]) for r in rows)) for i, t in enumerate(titles)]
    col = 0
    for title, size in groups or ():  # a group title wider than its columns widens the last
        short = len(title) + 2 - (sum(widths[col : col + size]) + len(_GAP) * (size - 1))
        widths[col + size - 1] += max(0, short) if title else 0
        col += size
    numeric = slice(1, len(titles) - 1) if text_last else slice(1, len(titles))

    def line(cells):
        parts = [cells[0].ljust(widths[0])]
        parts += [c.rjust(w) for c, w in zip(cells[numeric], widths[numeric], strict=True)]
        if text_last:
            parts.append(cells[-1].ljust(widths[-1]))
        return "  " + _GAP.join(parts).rstrip()

    out = []
    if groups:
        spans, col = [], 0
        for title, size in groups:
            width = sum(widths[col : col + size]) + len(_GAP) * (size - 1)
            spans.append(f" {title} ".center(width, "-") if title else " " * width)
            col += size
        out.append("  " + _GAP.join(spans))
    return out + [line(titles)] + [line(r) for r in rows]


def _acceptance_lines(s) -> list[str]:
    lines = []
    if s.acceptance is not None:
        acc = s.acceptance
        if acc.size <= 8:
            each = "per chain " + " ".join(f"{a:.3f}" for a in acc)
        else:
            each = (f"per chain min {acc.min():.3f}, median {np.median(acc):.3f}, "
                    f"max {acc.max():.3f}")
        error = ("" if s.acceptance_mcse is None or not math.isfinite(s.acceptance_mcse)
                 else f"Monte Carlo error {s.acceptance_mcse:.3f}; ")
        lines.append(f"realised {s.acceptance_pooled:.3f} ({error}{each})")
    if s.target_acceptance is not None:
        text = f"target {s.target_acceptance:.3f}"
        if s.scale is not None:
            text += f" at scale {s.scale:.3f}"
            gaussian = s.gaussian_acceptance
            if gaussian is not None and abs(gaussian - s.target_acceptance) <= alerts.SAME_TARGET:
                text += " (the Gaussian picture's prediction at this scale)"
            elif gaussian is not None:
                text += (" (the warm-up's aim when it adapted the scale; the Gaussian "
                         f"picture predicts {gaussian:.3f} at this scale)")
        lines.append(text)
    return [("  acceptance  " if k == 0 else "              ") + line
            for k, line in enumerate(lines)]


def _header(s) -> list[str]:
    lines = ["fisherwalk summary"]
    total = s.chains * s.draws
    text = f"{s.chains} {'chain' if s.chains == 1 else 'chains'} x {s.draws} draws = {total}"
    if len(s.used_chains) < s.chains:
        text += f"; statistics from chains {', '.join(map(str, s.used_chains))} only"
    lines.append(f"  draws       {text}")
    if s.seconds is not None:
        lines.append(f"  time        {s.seconds:.3g} s (the walk, compilation included; "
                     "ESS/s is the bulk ESS per second of it)")
    lines += _acceptance_lines(s)
    if s.realised_jump is not None or s.predicted_jump is not None:
        dim = len(s.names)
        pairs = [(label, value) for label, value in
                 (("realised", s.realised_jump), ("predicted", s.predicted_jump))
                 if value is not None]
        total = " | ".join(f"{label} {value:.3g}" for label, value in pairs)
        each = " | ".join(f"{value / dim:.3g}" for _, value in pairs)
        lines.append(f"  jump        {total}  (squared step in whitened units, "
                     f"per parameter {each})")
    if s.faults is not None:
        total_faults = int(s.faults.sum())
        lines.append("  faults      " + ("none" if total_faults == 0 else
                     f"{total_faults} NaN/+inf proposal(s) rejected"))
    for note in s.notes:
        lines.append(f"  note        {note}")
    return lines


def render(s: Any) -> str:
    """The summary as text: header, estimates, Monte Carlo errors, warnings."""
    low, high = (_percent(p) for p in interval_probabilities(s.interval))
    rate = s.ess_bulk_per_second is not None
    titles = ["parameter", "mean", "sd", "MCSE", low, "50%", high, "ESS bulk", "ESS tail"]
    titles += ["ESS/s"] * rate + ["R-hat", "check"]
    groups = (("", 1), ("estimate", 3), (f"median, {_percent(s.interval)} interval", 3),
              ("mixing", 4 + rate))
    count = range(len(s.names))
    out = _header(s) + [""]
    out += _grid(titles, [_row(s, j) for j in count], groups, text_last=True)
    out += ["", "  Monte Carlo standard errors of the sd and the quantiles"]
    out += _grid(["parameter", "sd", low, "50%", high], [_error_row(s, j) for j in count])
    out.append("")
    if s.warnings:
        out.append(f"  {len(s.warnings)} warning(s)")
        for k, text in enumerate(s.warnings, 1):
            body = textwrap.wrap(text, width=92)
            out.append(f"  [{k}] {body[0]}")
            out += [f"      {more}" for more in body[1:]]
    else:
        out.append(f"  no warnings (R-hat <= {s.rhat_limit}, ESS >= {s.ess_limit:.0f}, "
                   "no stuck or separated chain)")
    return "\n".join(out)
