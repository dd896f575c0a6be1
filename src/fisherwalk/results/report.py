"""The summary table a person reads after a walk.

:func:`summarize` turns draws ``(chains, draws, d)`` and the sampler's own figures
(acceptance, expected squared jump distance, faults) into a :class:`Summary`:
per-parameter estimates and diagnostics, a header, and plain-language warnings that
say what is wrong, where, and what to do. ``str(summary)`` is the printed table;
``summary.to_dict()`` is its JSON-ready content.

Thresholds: R-hat above 1.01 and bulk or tail ESS below 400 follow Vehtari, Gelman,
Simpson, Carpenter & Bürkner (2021), "Rank-normalization, folding, and localization:
an improved R-hat for assessing convergence of MCMC", Bayesian Analysis 16(2). The
stuck-chain and separated-chain rules are fisherwalk's own (common practice, no
published source); they are spelled out in :func:`summarize`.
"""

from __future__ import annotations

import math
import textwrap
from typing import NamedTuple

import numpy as np

from ..errors import InputError, explain
from . import diagnostics

__all__ = ["Summary", "summarize"]

_MAX_LISTED = 8  # parameters named in one warning before "and N more"
_STUCK_ACCEPTANCE = 0.01  # absolute floor of a moving chain's acceptance
_STUCK_RATIO = 0.2  # ... and the fraction of the other chains' median acceptance
_APART_NOISE = 5.0  # separated chain: difference beyond 5 Monte Carlo standard errors
_APART_SPREAD = 2.0  # ... and beyond 2 within-chain standard deviations of the others


class Summary(NamedTuple):
    """Estimates, diagnostics and warnings of one walk; ``str()`` gives the table."""

    names: tuple[str, ...]
    mean: np.ndarray  # (d,) every array below is per parameter
    sd: np.ndarray
    mcse: np.ndarray  # Monte Carlo standard error of the mean
    q05: np.ndarray
    q50: np.ndarray
    q95: np.ndarray
    ess_bulk: np.ndarray
    ess_tail: np.ndarray
    rhat: np.ndarray
    chains: int
    draws: int  # per chain
    used_chains: tuple[int, ...]  # chains the statistics are computed from
    acceptance: np.ndarray | None  # (chains,) realised acceptance per chain
    acceptance_pooled: float | None
    target_acceptance: float | None
    predicted_jump: float | None  # ESJD per step, whitened units (sum over parameters)
    realised_jump: float | None
    realised_jump_per_chain: np.ndarray | None
    faults: np.ndarray | None  # (chains,) proposals rejected for a NaN/+inf log density
    max_rhat: float  # inf if any R-hat is not finite
    min_ess_bulk: float
    min_ess_tail: float
    warnings: tuple[str, ...]
    notes: tuple[str, ...]
    rhat_limit: float = 1.01  # the thresholds the warnings and the check column used
    ess_limit: float = 400.0
    flags: tuple[str, ...] = ()  # per parameter, extra words for the check column

    def table(self) -> str:
        """The summary as text: header, one row per parameter, warnings."""
        return _render(self)

    def __str__(self) -> str:
        return _render(self)

    def to_dict(self) -> dict:
        """Plain JSON-ready content; non-finite numbers become ``None`` (the warnings
        say why)."""
        columns = ("mean", "sd", "mcse", "q05", "q50", "q95", "ess_bulk", "ess_tail", "rhat")
        rows = [
            {"name": name, **{c: _plain(getattr(self, c)[j]) for c in columns}}
            for j, name in enumerate(self.names)
        ]
        return {
            "chains": self.chains,
            "draws": self.draws,
            "used_chains": list(self.used_chains),
            "acceptance": {
                "per_chain": _plain_list(self.acceptance),
                "pooled": _plain(self.acceptance_pooled),
                "target": _plain(self.target_acceptance),
            },
            "jump": {
                "units": "squared whitened distance per step",
                "predicted": _plain(self.predicted_jump),
                "realised": _plain(self.realised_jump),
                "per_chain": _plain_list(self.realised_jump_per_chain),
            },
            "faults": _plain_list(self.faults),
            "worst": {
                "max_rhat": _plain(self.max_rhat),
                "min_ess_bulk": _plain(self.min_ess_bulk),
                "min_ess_tail": _plain(self.min_ess_tail),
            },
            "parameters": rows,
            "warnings": list(self.warnings),
            "notes": list(self.notes),
        }


def _plain(value):
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _plain_list(values):
    if values is None:
        return None
    values = np.asarray(values)
    if np.issubdtype(values.dtype, np.integer):
        return [int(v) for v in values.tolist()]
    return [_plain(v) for v in values.tolist()]


# ---------------------------------------------------------------------------------------
# building the summary
# ---------------------------------------------------------------------------------------


def _per_chain(value, chains: int, label: str, *, integer: bool = False):
    if value is None:
        return None
    arr = np.asarray(value, dtype=np.int64 if integer else float)
    if arr.shape != (chains,) or (not integer and not np.all(np.isfinite(arr))):
        raise InputError(
            explain(
                f"{label} has shape {arr.shape}, or holds non-finite values",
                f"summarize(..., {label}=...)",
                f"pass one finite value per chain, shape ({chains},)",
            )
        )
    return arr


def _optional_float(value, label: str):
    if value is None:
        return None
    value = float(value)
    if not math.isfinite(value):
        raise InputError(explain(f"{label} is {value}", f"summarize(..., {label}=...)",
                                 "pass a finite number or None"))
    return value


def summarize(
    flat_draws,
    names,
    *,
    target_acceptance: float | None = None,
    acceptance=None,
    predicted_jump: float | None = None,
    realised_jump=None,
    faults=None,
    header_notes=(),
    cholesky=None,
    rhat_limit: float = 1.01,
    ess_limit: float = 400.0,
) -> Summary:
    """Summarise draws ``(chains, draws, d)`` named ``names`` into a :class:`Summary`.

    Parameters
    ----------
    flat_draws : array (chains, draws, d), or (chains, draws) for one parameter.
    names : d parameter names in ravelled order ("beta[3]", "sigma").
    target_acceptance : the acceptance rate the scaling theory predicts.
    acceptance : (chains,) realised acceptance per chain.
    predicted_jump, realised_jump : expected squared jump distance per step in whitened
        units (|Lᵀ Δθ|², summed over parameters); ``realised_jump`` may be per chain.
        When it is None and ``cholesky`` (L with L Lᵀ = H) is given, it is measured
        from the draws with :func:`fisherwalk.results.diagnostics.whitened_jump`.
    faults : (chains,) counts of proposals rejected for a NaN or +inf log density.
    header_notes : extra lines for the header (e.g. the model and the seed).
    rhat_limit, ess_limit : warning thresholds (Vehtari et al. 2021 recommend 1.01, 400).

    Warning rules
    -------------
    * R-hat above ``rhat_limit`` or not finite; bulk or tail ESS below ``ess_limit``
      (with the draws per chain that would roughly reach it at the current ESS per draw).
    * Stuck chain: its acceptance is below 1%, or below a fifth of the median
      acceptance of the other chains, or its draws never change.
    * Separated chain (a second mode, or chains that have not mixed): in some parameter
      the chain's mean differs from the mean of all other chains' draws by more than
      5 Monte Carlo standard errors of that difference (each side's MCSE from its own
      ESS, so chance alone almost never triggers it) *and* by more than 2 within-chain
      standard deviations of the other chains (so the gap is large on the posterior's
      own scale, not merely detectable).
    * Faults: proposals with a NaN or +inf log density, per chain.
    * Chains holding non-finite draws are left out of every statistic and named.
    """
    where = "summarize(flat_draws, names)"
    try:
        draws = np.asarray(flat_draws, dtype=float)
    except (TypeError, ValueError) as err:
        raise InputError(explain(f"flat_draws cannot be read as floats ({err})", where,
                                 "pass a numpy array (chains, draws, d)")) from None
    if draws.ndim == 2:
        draws = draws[:, :, None]
    if draws.ndim != 3 or min(draws.shape) < 1:
        raise InputError(explain(f"flat_draws has shape {np.shape(flat_draws)}", where,
                                 "pass a numpy array (chains, draws, d)"))
    chains, count, dim = draws.shape
    names = tuple(names)
    if len(names) != dim or not all(isinstance(n, str) for n in names):
        raise InputError(explain(f"{len(names)} names for {dim} parameters (or a name is not "
                                 "a string)", where, "pass one string per scalar parameter, "
                                 "in ravelled order"))
    acceptance = _per_chain(acceptance, chains, "acceptance")
    faults = _per_chain(faults, chains, "faults", integer=True)
    target_acceptance = _optional_float(target_acceptance, "target_acceptance")
    predicted_jump = _optional_float(predicted_jump, "predicted_jump")

    warnings: list[str] = []
    finite_chain = np.all(np.isfinite(draws), axis=(1, 2))
    used = tuple(int(c) for c in np.nonzero(finite_chain)[0])
    if not used:
        raise InputError(explain("every chain holds NaN or inf draws", where,
                                 "find why the sampler produced non-finite positions; "
                                 "check the model's transforms"))
    if len(used) < chains:
        bad = [c for c in range(chains) if c not in used]
        warnings.append(_warn(
            f"Chain(s) {_join(bad)} hold NaN or inf draws and were left out of every "
            "statistic below.",
            "The sampler should never produce a non-finite position; check the model's "
            "transforms and the starting points of those chains."))
    kept = draws[list(used)]

    mean = kept.mean(axis=(0, 1))
    sd = kept.reshape(-1, dim).std(axis=0, ddof=1)
    q05, q50, q95 = np.quantile(kept.reshape(-1, dim), [0.05, 0.5, 0.95], axis=0)
    ess_b = np.atleast_1d(diagnostics.ess_bulk(kept))
    ess_t = np.atleast_1d(diagnostics.ess_tail(kept))
    rh = np.atleast_1d(diagnostics.rhat(kept))
    mcse = np.atleast_1d(diagnostics.mcse_mean(kept))

    jump_per_chain = None
    if realised_jump is None and cholesky is not None:
        measured = diagnostics.whitened_jump(kept, cholesky)
        realised = measured.mean
        jump_per_chain = np.full(chains, np.nan)
        jump_per_chain[list(used)] = measured.per_chain
    elif realised_jump is not None and np.ndim(realised_jump) == 1:
        jump_per_chain = _per_chain(realised_jump, chains, "realised_jump")
        realised = float(jump_per_chain.mean())
    else:
        realised = _optional_float(realised_jump, "realised_jump")

    warnings += _rhat_warnings(names, rh, rhat_limit)
    warnings += _ess_warnings(names, ess_b, ess_t, ess_limit, kept.shape[0], count)
    warnings += _stuck_warnings(draws, used, acceptance)
    warnings += _apart_warnings(names, kept, used)
    if faults is not None and np.any(faults > 0):
        hit = [f"chain {c}: {int(faults[c])}" for c in range(chains) if faults[c] > 0]
        warnings.append(_warn(
            f"{int(faults.sum())} proposal(s) had a NaN or +inf log density and were "
            f"rejected ({', '.join(hit)}).",
            "a NaN usually means the model is evaluated outside its domain (a negative "
            "scale, the log of a negative number): sample such parameters on an "
            "unconstrained scale (e.g. log sigma) or guard the log density; +inf means the "
            "density is unbounded there."))

    return Summary(
        names=names, mean=mean, sd=sd, mcse=mcse, q05=q05, q50=q50, q95=q95,
        ess_bulk=ess_b, ess_tail=ess_t, rhat=rh, chains=chains, draws=count,
        used_chains=used, acceptance=acceptance,
        acceptance_pooled=None if acceptance is None else float(acceptance.mean()),
        target_acceptance=target_acceptance, predicted_jump=predicted_jump,
        realised_jump=realised, realised_jump_per_chain=jump_per_chain, faults=faults,
        max_rhat=float(np.max(rh)) if np.all(np.isfinite(rh)) else float("inf"),
        min_ess_bulk=float(np.min(ess_b)), min_ess_tail=float(np.min(ess_t)),
        warnings=tuple(warnings), notes=tuple(str(n) for n in header_notes),
        rhat_limit=float(rhat_limit), ess_limit=float(ess_limit),
    )


# ---------------------------------------------------------------------------------------
# warning rules
# ---------------------------------------------------------------------------------------


def _warn(what: str, todo: str) -> str:
    return f"{what} What to do: {todo}"


def _join(items) -> str:
    items = [str(i) for i in items]
    if len(items) > _MAX_LISTED:
        return ", ".join(items[:_MAX_LISTED]) + f" and {len(items) - _MAX_LISTED} more"
    return ", ".join(items)


def _rhat_warnings(names, rh, limit) -> list[str]:
    out = []
    undefined = [names[j] for j in np.nonzero(~np.isfinite(rh))[0]]
    if undefined:
        out.append(_warn(
            f"R-hat is undefined or infinite for {_join(undefined)}: every chain stayed "
            "constant in these parameters.",
            "the chains did not move; see the acceptance rates and restart or refine() "
            "the walker before trusting any estimate."))
    high = np.nonzero(np.isfinite(rh) & (rh > limit))[0]
    if high.size:
        order = high[np.argsort(-rh[high])]
        listed = [f"{names[j]} ({rh[j]:.3f})" for j in order]
        out.append(_warn(
            f"R-hat above {limit} for {high.size} parameter(s): {_join(listed)}. The chains "
            "disagree about these parameters.",
            "run longer; if R-hat stays high, look at the per-chain traces for a stuck or "
            "separated chain (see the other warnings)."))
    return out


def _ess_warnings(names, ess_b, ess_t, limit, chains, count) -> list[str]:
    worst = np.minimum(ess_b, ess_t)
    low = np.nonzero(worst < limit)[0]
    if not low.size:
        return []
    order = low[np.argsort(worst[low])]
    listed = [f"{names[j]} ({worst[j]:.0f})" for j in order]
    lowest = float(worst[order[0]])
    what = (f"Bulk or tail ESS below {limit:.0f} for {low.size} parameter(s): "
            f"{_join(listed)}.")
    if lowest <= 0:
        return [_warn(what + " An ESS of 0 means a parameter never moved in any chain.",
                      "running longer will not help until the chains move: check the "
                      "acceptance rates, and whether the proposal has any spread in the "
                      "direction of that parameter (its Fisher information).")]
    needed = math.ceil(count * limit / lowest)
    return [_warn(
        what + f" At the current {lowest / (chains * count):.3g} effective draws per draw, "
        f"reaching {limit:.0f} needs roughly {needed} draws per chain (now {count}).",
        f"run about {needed} draws per chain (or proportionally more chains).")]


def _stuck_warnings(draws, used, acceptance) -> list[str]:
    chains = draws.shape[0]
    frozen = [c for c in used if np.all(np.ptp(draws[c], axis=0) == 0)]
    low = []
    if acceptance is not None:
        for c in range(chains):
            others = np.delete(acceptance, c)
            reference = float(np.median(others)) if others.size else None
            if acceptance[c] < _STUCK_ACCEPTANCE or (
                reference is not None and acceptance[c] < _STUCK_RATIO * reference
            ):
                low.append(c)
    out = []
    for c in sorted(set(frozen) | set(low)):
        detail = []
        if acceptance is not None:
            others = np.delete(acceptance, c)
            text = f"acceptance {acceptance[c]:.1%}"
            if others.size:
                text += f" against a median of {np.median(others):.1%} for the other chains"
            detail.append(text)
        if c in frozen:
            detail.append("its draws never change")
        out.append(_warn(
            f"Chain {c} is stuck: {'; '.join(detail)}. Its draws describe little more "
            "than its starting point.",
            "check where it started; a chain stuck far out in the tails or in a narrow "
            "region needs a better start or a reshaped proposal (refine()); drop it only if you "
            "understand why it stuck."))
    return out


def _apart_warnings(names, kept, used) -> list[str]:
    chains = kept.shape[0]
    if chains < 2:
        return []
    out = []
    for i, c in enumerate(used):
        own = kept[i]
        others = np.delete(kept, i, axis=0)
        if np.all(np.ptp(own, axis=0) == 0):
            continue  # a frozen chain is reported as stuck
        diff = own.mean(axis=0) - others.mean(axis=(0, 1))
        noise = np.sqrt(np.atleast_1d(diagnostics.mcse_mean(own[None])) ** 2
                        + np.atleast_1d(diagnostics.mcse_mean(others)) ** 2)
        spread = np.sqrt(np.mean(np.var(others, axis=1, ddof=1), axis=0))
        apart = (np.abs(diff) > _APART_NOISE * noise) & (np.abs(diff) > _APART_SPREAD * spread)
        hit = np.nonzero(apart)[0]
        if not hit.size:
            continue
        with np.errstate(divide="ignore"):
            gap = np.abs(diff) / spread
        order = hit[np.argsort(-gap[hit])]
        listed = [f"{names[j]} ({gap[j]:.1f} sd away)" for j in order]
        out.append(_warn(
            f"Chain {c} sits apart from the other chains in {hit.size} parameter(s): "
            f"{_join(listed)}, with sd the within-chain standard deviation of the other "
            "chains. This looks like a second mode, or chains that have not mixed yet.",
            "plot the traces of these parameters; if the posterior has several modes, "
            "random-walk Metropolis will not move between them: report them separately "
            "or reparameterise; otherwise run longer."))
    return out


# ---------------------------------------------------------------------------------------
# the printed table
# ---------------------------------------------------------------------------------------


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
    return _num(value, int(min(10, max(0, 1 - math.floor(math.log10(value))))))


def _row(s: Summary, j: int, rhat_limit: float, ess_limit: float) -> list[str]:
    places = _decimals(float(s.sd[j]), float(s.mean[j]))
    flags = []
    if not (np.isfinite(s.rhat[j]) and s.rhat[j] <= rhat_limit):
        flags.append("R-hat")
    if min(s.ess_bulk[j], s.ess_tail[j]) < ess_limit:
        flags.append("ESS")
    if j < len(s.flags) and s.flags[j]:
        flags.append(s.flags[j])
    return [
        s.names[j],
        _num(float(s.mean[j]), places), _num(float(s.sd[j]), places),
        _two_digits(float(s.mcse[j])),
        _num(float(s.q05[j]), places), _num(float(s.q50[j]), places),
        _num(float(s.q95[j]), places),
        f"{s.ess_bulk[j]:.0f}", f"{s.ess_tail[j]:.0f}",
        "nan" if np.isnan(s.rhat[j]) else f"{s.rhat[j]:.3f}",
        " ".join(flags) or "-",
    ]


def _header(s: Summary) -> list[str]:
    lines = ["fisherwalk summary"]
    total = s.chains * s.draws
    text = f"{s.chains} {'chain' if s.chains == 1 else 'chains'} x {s.draws} draws = {total}"
    if len(s.used_chains) < s.chains:
        text += f"; statistics from chains {_join(s.used_chains)} only"
    lines.append(f"  draws       {text}")
    if s.acceptance is not None:
        acc = s.acceptance
        if acc.size <= 8:
            each = "per chain " + " ".join(f"{a:.3f}" for a in acc)
        else:
            each = (f"per chain min {acc.min():.3f}, median {np.median(acc):.3f}, "
                    f"max {acc.max():.3f}")
        text = f"realised {s.acceptance_pooled:.3f} ({each})"
        if s.target_acceptance is not None:
            text += f" | target {s.target_acceptance:.3f}"
        lines.append(f"  acceptance  {text}")
    elif s.target_acceptance is not None:
        lines.append(f"  acceptance  target {s.target_acceptance:.3f}")
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


_GROUPS = (("", 1), ("estimate", 3), ("quantiles", 3), ("mixing", 4))
_TITLES = ("parameter", "mean", "sd", "MCSE", "5%", "50%", "95%", "ESS bulk", "ESS tail",
           "R-hat", "check")


def _render(s: Summary) -> str:
    rhat_limit, ess_limit = s.rhat_limit, s.ess_limit
    rows = [_row(s, j, rhat_limit, ess_limit) for j in range(len(s.names))]
    widths = [max(len(t), *(len(r[i]) for r in rows)) for i, t in enumerate(_TITLES)]
    gap = "  "

    def line(cells):
        first = cells[0].ljust(widths[0])
        rest = [c.rjust(w) for c, w in zip(cells[1:-1], widths[1:-1], strict=True)]
        return "  " + gap.join([first, *rest, cells[-1].ljust(widths[-1])]).rstrip()

    spans, col = [], 0
    for title, size in _GROUPS:
        width = sum(widths[col : col + size]) + len(gap) * (size - 1)
        spans.append(f" {title} ".center(width, "-") if title else " " * width)
        col += size
    out = _header(s)
    out += ["", "  " + gap.join(spans), line(list(_TITLES))]
    out += [line(r) for r in rows]
    out.append("")
    if s.warnings:
        out.append(f"  {len(s.warnings)} warning(s)")
        for k, text in enumerate(s.warnings, 1):
            body = textwrap.wrap(text, width=92)
            out.append(f"  [{k}] {body[0]}")
            out += [f"      {more}" for more in body[1:]]
    else:
        out.append(f"  no warnings (R-hat <= {rhat_limit}, ESS >= {ess_limit:.0f}, "
                   "no stuck or separated chain)")
    return "\n".join(out)
