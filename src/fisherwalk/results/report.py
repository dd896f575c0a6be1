"""The summary table a person reads after a walk.

:func:`summarize` turns draws ``(chains, draws, d)`` and the sampler's own figures
(acceptance, scale, expected squared jump distance, faults, seconds, proposal shape)
into a :class:`Summary`: per-parameter estimates with their Monte Carlo standard errors,
diagnostics, a header, and plain-language warnings (:mod:`fisherwalk.results.alerts`) that say
what is wrong, where, and what to do, quoting the numbers as the header and the table
show them. ``str(summary)`` is the printed table; ``summary.to_dict()`` is its
JSON-ready content.

Memory: the statistics are computed one parameter at a time (:mod:`fisherwalk.results.mcse`)
and the correlation matrix in blocks of draws, so the summary needs a small multiple of
one parameter's draws beyond the draws themselves; its work grows linearly with the
number of chains.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from ..errors import InputError, explain
from . import alerts, diagnostics, mcse
from .summary_parts import (
    acceptance_error,
    checked_interval,
    checked_per_chain,
    checked_steps,
    optional_float,
    pooled_correlation,
    proposal_correlation,
)
from .table import check_text, interval_probabilities
from .table import render as _render

__all__ = ["Summary", "summarize"]



class Summary(NamedTuple):
    """Estimates, diagnostics and warnings of one walk; ``str()`` gives the table."""

    names: tuple[str, ...]
    mean: np.ndarray  # (d,) every array below is per parameter
    sd: np.ndarray
    mcse: np.ndarray  # Monte Carlo standard error of the mean (Vehtari et al. 2021)
    mcse_sd: np.ndarray
    interval: float  # probability of the central interval [lower, upper]
    lower: np.ndarray  # quantile (1 - interval) / 2
    median: np.ndarray
    upper: np.ndarray  # quantile (1 + interval) / 2
    mcse_lower: np.ndarray
    mcse_median: np.ndarray
    mcse_upper: np.ndarray
    ess_bulk: np.ndarray
    ess_tail: np.ndarray
    ess_bulk_per_second: np.ndarray | None  # bulk ESS over the run's seconds
    rhat: np.ndarray
    chains: int
    draws: int  # per chain
    used_chains: tuple[int, ...]  # chains the statistics are computed from
    acceptance: np.ndarray | None  # (chains,) realised acceptance per chain
    acceptance_pooled: float | None
    acceptance_mcse: float | None  # Monte Carlo error of the pooled acceptance
    target_acceptance: float | None  # what the acceptance should be at the scale used
    scale: float | None  # the scale l used
    gaussian_acceptance: float | None  # the Gaussian picture's acceptance at that scale
    predicted_jump: float | None  # ESJD per step, whitened units (sum over parameters)
    realised_jump: float | None
    realised_jump_per_chain: np.ndarray | None
    faults: np.ndarray | None  # (chains,) proposals rejected for a NaN/+inf log density
    seconds: float | None  # wall time of the run
    max_rhat: float  # inf if any R-hat is not finite
    min_ess_bulk: float
    min_ess_tail: float
    warnings: tuple[str, ...]
    notes: tuple[str, ...]
    rhat_limit: float = 1.01  # the thresholds the warnings and the check column used
    ess_limit: float = 400.0
    flags: tuple[str, ...] = ()  # per parameter, extra words for the check column
    sampler: str | None = None  # the sampler's name in words, for the header
    setting_label: str = "scale"  # what ``scale`` is: "scale" or "step size"
    acceptance_band: tuple[float, float] | None = None  # acceptances the theory tolerates
    jump_dim: int | None = None  # parameters the jump is summed over (None: len(names))

    def table(self) -> str:
        """The summary as text: header, one row per parameter, warnings."""
        return _render(self)

    def __str__(self) -> str:
        return _render(self)

    def to_csv(self) -> str:
        """One row per parameter with every column (the names, then the numbers of
        :meth:`to_dict`'s rows; empty cells for None and non-finite values)."""
        return csv_text(self)

    def to_dict(self) -> dict:
        """Plain JSON-ready content; non-finite numbers become ``None`` (the warnings
        say why)."""
        columns = ("mean", "sd", "mcse", "mcse_sd", "lower", "median", "upper",
                   "mcse_lower", "mcse_median", "mcse_upper", "ess_bulk", "ess_tail",
                   "ess_bulk_per_second", "rhat")
        rows = [
            {"name": name, **{c: None if getattr(self, c) is None
                              else _plain(getattr(self, c)[j]) for c in columns}}
            for j, name in enumerate(self.names)
        ]
        low, high = interval_probabilities(self.interval)
        return {
            "chains": self.chains,
            "draws": self.draws,
            "used_chains": list(self.used_chains),
            "interval": {"probability": self.interval, "lower": low, "upper": high},
            "seconds": _plain(self.seconds),
            "acceptance": {
                "per_chain": _plain_list(self.acceptance),
                "pooled": _plain(self.acceptance_pooled),
                "mcse": _plain(self.acceptance_mcse),
                "target": _plain(self.target_acceptance),
                "scale": _plain(self.scale),
                "setting": self.setting_label,
                "gaussian": _plain(self.gaussian_acceptance),
                "tolerated": None if self.acceptance_band is None
                else [_plain(v) for v in self.acceptance_band],
            },
            "sampler": self.sampler,
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


CSV_COLUMNS = ("mean", "sd", "mcse", "mcse_sd", "lower", "median", "upper", "mcse_lower",
               "mcse_median", "mcse_upper", "ess_bulk", "ess_tail", "ess_bulk_per_second",
               "rhat")


def csv_text(summary: Summary) -> str:
    """The per-parameter table as CSV text (RFC 4180 quoting; numbers in ``repr`` form, so
    they read back exactly). ``lower``/``upper`` are the central interval's ends."""
    import csv
    import io

    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(("name", *CSV_COLUMNS, "check"))
    for j, name in enumerate(summary.names):
        cells = []
        for column in CSV_COLUMNS:
            values = getattr(summary, column)
            value = None if values is None else _plain(values[j])
            cells.append("" if value is None else repr(value))
        writer.writerow((name, *cells, check_text(summary, j)))
    return out.getvalue()


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


def summarize(
    flat_draws,
    names,
    *,
    interval: float = 0.9,
    target_acceptance: float | None = None,
    scale: float | None = None,
    gaussian_acceptance: float | None = None,
    acceptance=None,
    acceptance_steps=None,
    predicted_jump: float | None = None,
    realised_jump=None,
    faults=None,
    header_notes=(),
    cholesky=None,
    proposal_shape=None,
    seconds: float | None = None,
    rhat_limit: float = 1.01,
    ess_limit: float = 400.0,
    sampler: str | None = None,
    setting_label: str = "scale",
    acceptance_band: tuple[float, float] | None = None,
    jump_dim: int | None = None,
    gradient_faults: bool = False,
) -> Summary:
    """Summarise draws ``(chains, draws, d)`` named ``names`` into a :class:`Summary`.

    Parameters
    ----------
    flat_draws : array (chains, draws, d), or (chains, draws) for one parameter. Any
        floating dtype; it is read one parameter at a time, never copied whole (unless
        some chains hold non-finite draws and are left out).
    names : d parameter names in ravelled order ("beta[3]", "sigma").
    interval : probability of the central interval shown beside the median (0.9: the
        5% and 95% quantiles).
    target_acceptance : the acceptance expected at the scale used: the Gaussian
        picture's prediction at that scale, or what the warm-up adapted the scale to.
    scale : the scale l used; shown with the target.
    gaussian_acceptance : the Gaussian picture's acceptance at ``scale``; when it differs
        from the target (the warm-up moved the scale) both are shown.
    acceptance : (chains,) realised acceptance per chain.
    acceptance_steps : (chains, draws) acceptance of each kept draw (the fraction of its
        steps accepted); gives ``acceptance`` when that is None, and the Monte Carlo error
        of the pooled acceptance behind the acceptance warning.
    predicted_jump, realised_jump : expected squared jump distance per step in whitened
        units (|Lᵀ Δθ|², summed over parameters); ``realised_jump`` may be per chain.
        When it is None and ``cholesky`` (L with L Lᵀ = H) is given, it is measured
        from the draws with :func:`fisherwalk.results.diagnostics.whitened_jump`.
    faults : (chains,) counts of proposals rejected for a NaN or +inf log density.
    gradient_faults : the faults of a gradient sampler, which also count non-finite
        gradients (the warning names both).
    header_notes : extra lines for the header (e.g. the model and the seed).
    proposal_shape : the walker's (d, d) shape S; the proposal's correlations come from
        S Sᵀ and feed the correlation warning (none without it).
    seconds : wall time of the run: gives the bulk ESS per second.
    rhat_limit, ess_limit : warning thresholds (Vehtari et al. 2021 recommend 1.01, 400).
    sampler : the sampler's name in words, shown in the header.
    setting_label : what ``scale`` is ("scale" for the random walk, "step size" for the
        gradient samplers).
    acceptance_band : the acceptances at which the theory keeps most of the best jump
        (:func:`fisherwalk.theory.tolerance.acceptance_band`); inside it no acceptance
        warning fires.
    jump_dim : the number of parameters the jumps are summed over, for the per-parameter
        figure (default: all the names).

    Warnings: see :mod:`fisherwalk.results.alerts` for each rule (R-hat, ESS, stuck chain,
    separated chain, faults, acceptance against the header's target, correlated pairs
    the proposal does not follow). Chains holding non-finite draws are left out of
    every statistic and named.
    """
    where = "summarize(flat_draws, names)"
    try:
        draws = np.asarray(flat_draws)
        if draws.dtype.kind != "f":
            draws = draws.astype(float)
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
    if count < 4:
        raise InputError(explain(f"only {count} draw(s) per chain; the diagnostics need at "
                                 "least 4", where, "run the chains longer (a few hundred "
                                 "draws per chain at the very least)"))
    interval = checked_interval(interval)
    steps = checked_steps(acceptance_steps, chains)
    if acceptance is None and steps is not None:
        acceptance = steps.mean(axis=1)
    acceptance = checked_per_chain(acceptance, chains, "acceptance")
    faults = checked_per_chain(faults, chains, "faults", integer=True)
    target_acceptance = optional_float(target_acceptance, "target_acceptance")
    scale = optional_float(scale, "scale")
    gaussian_acceptance = optional_float(gaussian_acceptance, "gaussian_acceptance")
    predicted_jump = optional_float(predicted_jump, "predicted_jump")
    seconds = optional_float(seconds, "seconds")
    if seconds is not None and seconds <= 0:
        raise InputError(explain(f"seconds is {seconds}", "summarize(..., seconds=...)",
                                 "pass the run's wall time in seconds (> 0) or None"))

    warnings: list[str] = []
    finite_chain = np.ones(chains, dtype=bool)
    for j in range(dim):  # one parameter at a time: a boolean of one slice, not of all
        finite_chain &= np.isfinite(draws[:, :, j]).all(axis=1)
    used = tuple(int(c) for c in np.nonzero(finite_chain)[0])
    if not used:
        raise InputError(explain("every chain holds NaN or inf draws", where,
                                 "find why the sampler produced non-finite positions; "
                                 "check the model's transforms"))
    if len(used) < chains:
        bad = [c for c in range(chains) if c not in used]
        warnings.append(alerts.excluded_warning(bad))
    pick = slice(None) if len(used) == chains else np.array(used)
    low, high = interval_probabilities(interval)
    stats = [mcse.column_statistics(draws[pick, :, j], (low, 0.5, high)) for j in range(dim)]

    def column(field):
        return np.array([getattr(st, field) for st in stats], dtype=float)

    quantiles = np.array([st.quantiles for st in stats]).reshape(dim, 3)
    errors = np.array([st.mcse_quantiles for st in stats]).reshape(dim, 3)
    per_chain = {f: np.stack([getattr(st, f) for st in stats], axis=1)
                 for f in ("chain_means", "chain_sds", "chain_mcse", "chain_moves")}
    mean, ess_b, ess_t, rh = column("mean"), column("ess_bulk"), column("ess_tail"), column("rhat")

    jump_per_chain = None
    if realised_jump is None and cholesky is not None:
        k = np.shape(cholesky)[0]  # the parameters; derived quantities come after them
        measured = diagnostics.whitened_jump(draws[pick, :, :k], cholesky)
        realised = measured.mean
        jump_per_chain = np.full(chains, np.nan)
        jump_per_chain[list(used)] = measured.per_chain
    elif realised_jump is not None and np.ndim(realised_jump) == 1:
        jump_per_chain = checked_per_chain(realised_jump, chains, "realised_jump")
        realised = float(jump_per_chain.mean())
    else:
        realised = optional_float(realised_jump, "realised_jump")

    frozen = ~per_chain["chain_moves"].any(axis=1)  # over the used chains
    warnings += alerts.rhat_warnings(names, rh, rhat_limit)
    warnings += alerts.ess_warnings(names, ess_b, ess_t, ess_limit, len(used), count)
    warnings += alerts.stuck_warnings(chains, {used[i] for i in np.nonzero(frozen)[0]},
                                      acceptance)
    warnings += alerts.separated_chains(names, used, per_chain["chain_means"],
                                        per_chain["chain_sds"], per_chain["chain_mcse"],
                                        frozen)
    warnings += alerts.fault_warnings(faults, gradient=gradient_faults)
    pooled = None if acceptance is None else float(acceptance.mean())
    acceptance_mcse = None if steps is None else acceptance_error(steps)
    if pooled is not None and acceptance_mcse is not None and target_acceptance is not None:
        text = alerts.acceptance_warning(pooled, acceptance_mcse, target_acceptance,
                                         steps.shape[1], scale, gaussian_acceptance,
                                         band=acceptance_band, label=setting_label)
        warnings += [text] if text else []
    k = 0 if proposal_shape is None else np.shape(proposal_shape)[0]  # parameters only
    if k > dim:
        raise InputError(explain(f"proposal_shape is {k} x {k} for {dim} columns",
                                 "summarize(..., proposal_shape=...)",
                                 "pass the walker's (d, d) shape S (tuning.shape); derived "
                                 "columns come after the d parameters"))
    if k > 1:
        pairs = alerts.correlated_pairs(pooled_correlation(draws[:, :, :k], used, mean[:k]),
                                        proposal_correlation(proposal_shape, k))
        text = alerts.correlation_warning(names[:k], pairs)
        warnings += [text] if text else []

    return Summary(
        names=names, mean=mean, sd=column("sd"), mcse=column("mcse_mean"),
        mcse_sd=column("mcse_sd"), interval=interval, lower=quantiles[:, 0],
        median=quantiles[:, 1], upper=quantiles[:, 2], mcse_lower=errors[:, 0],
        mcse_median=errors[:, 1], mcse_upper=errors[:, 2], ess_bulk=ess_b, ess_tail=ess_t,
        ess_bulk_per_second=None if seconds is None else ess_b / seconds,
        rhat=rh, chains=chains, draws=count, used_chains=used, acceptance=acceptance,
        acceptance_pooled=pooled, acceptance_mcse=acceptance_mcse,
        target_acceptance=target_acceptance, scale=scale,
        gaussian_acceptance=gaussian_acceptance, predicted_jump=predicted_jump,
        realised_jump=realised, realised_jump_per_chain=jump_per_chain, faults=faults,
        seconds=seconds,
        max_rhat=float(np.max(rh)) if np.all(np.isfinite(rh)) else float("inf"),
        min_ess_bulk=float(np.min(ess_b)), min_ess_tail=float(np.min(ess_t)),
        warnings=tuple(warnings), notes=tuple(str(n) for n in header_notes),
        rhat_limit=float(rhat_limit), ess_limit=float(ess_limit),
        sampler=None if sampler is None else str(sampler), setting_label=str(setting_label),
        acceptance_band=None if acceptance_band is None
        else (float(acceptance_band[0]), float(acceptance_band[1])),
        jump_dim=None if jump_dim is None else int(jump_dim),
    )
