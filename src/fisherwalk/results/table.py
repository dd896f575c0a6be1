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

__all__ = ["render", "interval_probabilities", "check_text"]

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


def check_text(s, j: int) -> str:
    """The check column of parameter ``j``: what failed (R-hat, ESS, modes) or "-"."""
    return _flags(s, j)


def _flags(s, j: int) -> str:
    flags = []
    if not (np.isfinite(s.rhat[j]) and s.rhat[j] <= s.rhat_limit):
        flags.append("R-hat")
    if min(s.ess_bulk[j], s.ess_tail[j]) < s.ess_limit:
        flags.append("ESS")
    if j < len(s.flags) and s.flags[j]:
        flags.append(s.flags[j])
    return " ".join(flags) or "-"


def _row(s, j: int) -> list[str]:
    """One parameter: mixing first (can the row be trusted), then where it lies (median
    and central interval), then the mean with its Monte Carlo error, the spread, a check."""
    places = _decimals(float(s.sd[j]), float(s.mean[j]))
    return [
        s.names[j],
        alerts.rhat_text(float(s.rhat[j]), s.rhat_limit),
        alerts.ess_text(float(s.ess_bulk[j])), alerts.ess_text(float(s.ess_tail[j])),
        _num(float(s.median[j]), places),
        (_num(float(s.lower[j]), places), _num(float(s.upper[j]), places)),
        _num(float(s.mean[j]), places), _two_digits(float(s.mcse[j])),
        _num(float(s.sd[j]), places),
        _flags(s, j),
    ]


def _error_row(s, j: int) -> list[str]:
    return [s.names[j]] + [_two_digits(float(getattr(s, f)[j]))
                           for f in ("mcse_median", "mcse_lower", "mcse_upper", "mcse_sd")]


INTERVAL_DASH = " – "


def _cell(cell, width: int, pair: tuple[int, int] | None) -> str:
    if isinstance(cell, tuple):  # an interval: both ends right-aligned, the dash in line
        text = cell[0].rjust(pair[0]) + INTERVAL_DASH + cell[1].rjust(pair[1])
        return text.rjust(width)
    return cell.rjust(width)


def _grid(titles, rows, groups=None, text_last: bool = False) -> list[str]:
    """Aligned columns: the first left-aligned, numbers right-aligned, an interval cell
    (a pair) with its dash in line, an optional last text column left-aligned; optional
    group titles spanning columns above."""
    pairs: list[tuple[int, int] | None] = []
    widths = []
    for i, title in enumerate(titles):
        cells = [r[i] for r in rows]
        if cells and isinstance(cells[0], tuple):
            pair = (max(len(c[0]) for c in cells), max(len(c[1]) for c in cells))
            pairs.append(pair)
            widths.append(max(len(title), pair[0] + len(INTERVAL_DASH) + pair[1]))
        else:
            pairs.append(None)
            widths.append(max(len(title), *(len(c) for c in cells)))
    col = 0
    for title, size in groups or ():  # a group title wider than its columns widens the last
        short = len(title) + 2 - (sum(widths[col : col + size]) + len(_GAP) * (size - 1))
        widths[col + size - 1] += max(0, short) if title else 0
        col += size
    last = len(titles) - 1 if text_last else len(titles)

    def line(cells, heading=False):
        parts = [cells[0].ljust(widths[0])]
        for i in range(1, last):
            parts.append(cells[i].rjust(widths[i]) if heading
                         else _cell(cells[i], widths[i], pairs[i]))
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
    return out + [line(titles, heading=True)] + [line(r) for r in rows]


def _acceptance_lines(s) -> list[str]:
    """One line per figure: realised, aimed at, predicted, tolerated."""
    lines = []
    label = s.setting_label
    if s.acceptance is not None:
        acc = s.acceptance
        if acc.size <= 8:
            each = "per chain " + " ".join(f"{a:.3f}" for a in acc)
        else:
            each = (f"per chain min {acc.min():.3f}, median {np.median(acc):.3f}, "
                    f"max {acc.max():.3f}")
        error = ("" if s.acceptance_mcse is None or not math.isfinite(s.acceptance_mcse)
                 else f"Monte Carlo error {s.acceptance_mcse:.3f}; ")
        lines.append(("acceptance", f"realised {s.acceptance_pooled:.3f} ({error}{each})"))
    if s.target_acceptance is not None:
        gaussian = s.gaussian_acceptance
        same = gaussian is None or abs(gaussian - s.target_acceptance) <= alerts.SAME_TARGET
        at = "" if s.scale is None else f" at {label} {s.scale:.4g}"
        if same:
            lines.append(("target", f"{s.target_acceptance:.3f} (the Gaussian picture's "
                          f"prediction{at})"))
        else:
            lines.append(("target", f"{s.target_acceptance:.3f} (the warm-up's aim when it "
                          f"adapted the {label})"))
            lines.append(("predicted", f"{gaussian:.3f} (the Gaussian picture{at})"))
    if s.acceptance_band is not None:
        low, high = s.acceptance_band
        lines.append(("tolerated", f"{low:.3f} to {high:.3f} (the theory's tolerance: an "
                      "acceptance that costs little efficiency; no warning inside it)"))
    return [f"  {title:<11} {text}" for title, text in lines]


def _rate_line(s) -> str | None:
    """The ESS rate, moved out of the table: the slowest and the median parameter."""
    rates = s.ess_bulk_per_second
    if rates is None or not len(rates):
        return None
    slowest = int(np.argmin(rates))
    return (f"  ESS rate    bulk ESS per second {_rate(float(rates[slowest]))} for the slowest "
            f"({s.names[slowest]}), median {_rate(float(np.median(rates)))}")


def _header(s) -> list[str]:
    title = "fisherwalk summary" + (f": {s.sampler}" if s.sampler else "")
    lines = [title]
    total = s.chains * s.draws
    text = f"{s.chains} {'chain' if s.chains == 1 else 'chains'} x {s.draws} draws = {total}"
    if len(s.used_chains) < s.chains:
        text += f"; statistics from chains {', '.join(map(str, s.used_chains))} only"
    lines.append(f"  draws       {text}")
    if s.scale is not None:
        lines.append(f"  {s.setting_label:<11} {s.scale:.4g}")
    if s.seconds is not None:
        lines.append(f"  time        {s.seconds:.3g} s (the walk, compilation included)")
        rate = _rate_line(s)
        lines += [rate] if rate else []
    lines += _acceptance_lines(s)
    if s.realised_jump is not None or s.predicted_jump is not None:
        dim = s.jump_dim or len(s.names)
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
    """The summary as text: header, estimates, Monte Carlo errors, warnings.

    The table reads left to right as a person judges a row: first whether it can be
    trusted (R-hat, bulk and tail ESS), then where the parameter lies (the median and the
    central interval, one column "lower – upper"), then the mean with its Monte Carlo
    error and the sd, and last the check column naming what failed.
    """
    low, high = (_percent(p) for p in interval_probabilities(s.interval))
    titles = ["parameter", "R-hat", "ESS bulk", "ESS tail", "median",
              f"{_percent(s.interval)} interval", "mean", "±MCSE", "sd", "check"]
    groups = (("", 1), ("mixing", 3), ("where it lies", 2), ("mean", 2), ("", 1))
    count = range(len(s.names))
    out = _header(s) + [""]
    out += _grid(titles, [_row(s, j) for j in count], groups, text_last=True)
    out += ["", "  Monte Carlo standard errors of the median, the interval's ends and the sd"]
    out += _grid(["parameter", "median", low, high, "sd"], [_error_row(s, j) for j in count])
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
