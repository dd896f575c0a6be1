"""The random-walk Metropolis family: theta' = theta + (l / sqrt(d)) S z, z ~ N(0, I_d).

Theory: the scale l and the acceptance that maximise the expected squared jump in the
Gaussian limit, for this d and the spectrum of A = Sᵀ P S (Roberts, Gelman & Gilks 1997,
Ann. Appl. Probab. 7(1); :mod:`fisherwalk.theory.randomwalk`). Compiled advance: the
engine of :mod:`fisherwalk.engine.loop`, whose random numbers come from the host's
counter-based generator (:func:`fisherwalk.base.keys.step_noise`): the family's private
detail, which keeps its draws bit-identical however a run is chunked or resumed.
Warm-up: Robbins-Monro adaptation of the log scale (Andrieu & Thoms 2008, Statistics and
Computing 18), then either the theoretical scale (every check agrees) or a second phase
of adaptation, and a third one when the acceptance at the theoretical scale departs from
the prediction (see :mod:`fisherwalk.prepare.warmup`).
"""

from __future__ import annotations

import hashlib
import math
from collections import OrderedDict
from collections.abc import Callable

import blackjax
import jax
import jax.numpy as jnp
import numpy as np
from blackjax.mcmc.random_walk import RWState

from ..base.keys import stream
from ..engine import loop as rw_engine
from ..engine import proposal
from ..engine.loop import ChainState, make_engine, run_chunks
from ..engine.metric import spectrum_of
from ..results.diagnostics import ess_mean
from ..theory.gradient import predicted_ess_per_evaluation
from ..theory.randomwalk import expected_acceptance, expected_jump, is_matched, optimal_scale
from ..theory.tolerance import acceptance_band
from .family import Family, Phase, Settled

__all__ = ["FAMILY", "ADAPTATION_RATE", "SCALE_TOLERANCE", "LATE_ADAPTATION"]

ADAPTATION_RATE = 1.0  # Robbins-Monro gain constant: gain_t = rate * (t + 1)^-0.6
SCALE_TOLERANCE = 0.10  # |log(adapted / predicted scale)| beyond this says the picture is off
LATE_ADAPTATION = 50  # a third phase starts its gain at (50 + 1)^-0.6: near the optimum already

_MEMO: OrderedDict[bytes, dict] = OrderedDict()
_MEMO_SIZE = 128


def _memo(key: bytes, compute: Callable[[], dict]) -> dict:
    if key in _MEMO:
        _MEMO.move_to_end(key)
        return _MEMO[key]
    value = _MEMO[key] = compute()
    if len(_MEMO) > _MEMO_SIZE:
        _MEMO.popitem(last=False)
    return value


def geometry(tuning) -> dict:
    """Spectrum, whether matched, and the optimal scale choice (memoised by content)."""
    shape, whitening = np.asarray(tuning.shape), np.asarray(tuning.whitening)
    h = hashlib.blake2b(digest_size=20)
    for part in (shape, whitening):
        h.update(str(part.dtype).encode() + repr(part.shape).encode())
        h.update(np.ascontiguousarray(part).tobytes())
    h.update(tuning.criterion.encode())

    def compute() -> dict:
        spectrum = spectrum_of(shape, whitening)
        matched = is_matched(spectrum)
        choice = (optimal_scale(shape.shape[0]) if matched
                  else optimal_scale(shape.shape[0], spectrum, criterion=tuning.criterion))
        return {"spectrum": spectrum, "matched": matched, "choice": choice, "key": key}

    key = h.digest()
    return _memo(key, compute)


def _derived(tuning) -> dict:
    """The geometry, and the acceptance and jump predicted at the tuning's scale."""
    geo = geometry(tuning)
    choice, scale = geo["choice"], float(tuning.scale)

    def compute() -> dict:
        if scale == choice.scale:
            acceptance, jump = choice.acceptance, choice.jump_distance
        else:
            sp = None if geo["matched"] else geo["spectrum"]
            acceptance = float(expected_acceptance(scale, choice.dim, sp))
            jump = float(expected_jump(scale, choice.dim, sp))
        return {**geo, "acceptance": float(acceptance), "jump": float(jump)}

    return _memo(geo["key"] + repr(scale).encode(), compute)


def _initial(draft):
    return draft._replace(scale=float(geometry(draft)["choice"].scale))


def _ess_per_step(tuning) -> float:
    """Bulk ESS per step of one chain in its slowest direction, J / (4 - J)."""
    geo = geometry(tuning)
    spectrum = None if geo["matched"] else geo["spectrum"]
    jumps = expected_jump(float(tuning.scale), tuning.dim, spectrum, per_direction=True)
    slowest = min(max(float(np.min(jumps)), 1e-12), 2.0)
    return slowest / (4.0 - slowest)


def _engine(flat_logdensity, tuning, mode_flat, chains, devices=None):
    return make_engine(flat_logdensity, chains, devices)


def _init(engine, positions, logdensity, evaluate, names):
    positions = np.asarray(positions)
    if logdensity is None:
        logdensity = np.asarray(evaluate(positions))
    return ChainState(positions, np.asarray(logdensity))


def _positions(engine, state) -> np.ndarray:
    return np.asarray(state.position)


def _chunks(engine, tuning, key, state, draws, chunk, thin, done):
    """walk()'s chunks; a last chunk that overshoots ends at its last kept draw."""
    dtype = np.asarray(state.logdensity).dtype
    ctrl = jax.device_put(rw_engine.control(dtype=dtype))  # moved to the device once
    factor = jax.device_put(tuning.factor)
    for keep, out in run_chunks(engine, stream(key, 0), state, factor, ctrl, draws,
                                chunk=chunk, thin=thin, done=done):
        if keep < chunk:
            out = out._replace(state=ChainState(np.asarray(out.position[keep - 1]),
                                                np.asarray(out.logdensity[keep - 1])))
        yield keep, out


def _run(context, noise_key, state, factor, steps, adapt_from, target,
         rate_constant=ADAPTATION_RATE):
    """Adapt the scale multiplier for ``steps`` steps; return draws and the path."""
    dtype = np.asarray(state.logdensity).dtype
    pieces, rates, paths = [], [], []
    ctrl = rw_engine.control(log_multiplier=0.0, target=target, rate=rate_constant,
                             adapt_step=adapt_from, dtype=dtype)
    for keep, out in run_chunks(context.model.engine, noise_key, state, factor, ctrl, steps):
        state = out.state
        pieces.append(np.asarray(out.position))
        rates.append(np.asarray(out.acceptance_rate))
        paths.append(np.asarray(out.log_multiplier_path))
        if context.bar is not None:
            context.bar.update(keep)
    draws = np.swapaxes(np.concatenate(pieces), 0, 1)  # (chains, steps, d)
    rate = np.concatenate(rates)  # (steps, chains)
    path = np.concatenate(paths)  # (steps,)
    half = steps // 2
    # Acceptance: over the second half while adapting (the scale has settled), over the
    # whole phase at a fixed scale; with its Monte Carlo error (ESS of the probabilities).
    used = rate if rate_constant == 0.0 else rate[half:]
    mcse = float(used.std() / math.sqrt(max(float(ess_mean(used.T)), 1.0)))
    return state, draws, float(used.mean()), float(path[half:].mean()), mcse


def _phase(context, key, state, steps) -> Phase:
    tuning0 = context.tuning
    state, draws, acc1, log_m1, _ = _run(context, stream(key, 1), state, tuning0.factor,
                                         steps, 0, tuning0.choice.acceptance)
    theory = tuning0.choice.scale  # the optimum for this shape in the Gaussian picture
    scale1 = tuning0.scale * math.exp(log_m1)
    reasons = ()
    if abs(math.log(scale1 / theory)) > SCALE_TOLERANCE:
        reasons = (f"the adapted scale {scale1:.3f} is {scale1 / theory:.2f} x the "
                   f"predicted optimum {theory:.3f}",)
    return Phase(state, draws, acc1, scale1, 0, reasons, log_m1)


def _reshape(context, phase1, flat_logdensity, mode_flat, chains, learned, shape,
             precision_chol):
    """The shape learned from draws (run.metric_repair) at its theory scale; phase 2
    continues from the window adaptation's chains, which have travelled further into the
    tails than phase 1's: its scale then fits the whole posterior."""
    draft = context.tuning._replace(shape=shape, whitening=precision_chol,
                                    shape_kind="warm-up", criterion="slowest")
    dtype = np.asarray(shape).dtype
    state = ChainState(np.asarray(learned.position).astype(dtype),
                       np.asarray(learned.logdensity).astype(dtype))
    return _initial(draft), context.model.engine, state


def _settle(context, key, tuning1, state, phase1, steps, reasons, reshaped) -> Settled:
    tuning0, bar, half = context.tuning, context.bar, steps
    reasons, notes = list(reasons), []
    if reshaped:
        log_m_start, rate = 0.0, ADAPTATION_RATE
    elif reasons:
        tuning1, log_m_start, rate = tuning0, phase1.carry, ADAPTATION_RATE
        notes.append("Kept the proposal shape; the scale keeps adapting because "
                     + "; ".join(reasons) + ".")
    else:
        # Every check agrees with the Gaussian picture, where the theoretical scale is
        # exact: keep it (the adapted one differs from it only by Monte Carlo noise) and
        # let phase 2 measure the acceptance at that scale.
        theory = tuning0.choice.scale
        tuning1, log_m_start, rate = tuning0._replace(scale=float(theory)), 0.0, 0.0
        notes.append("Every check agreed with the Gaussian picture: kept the proposal "
                     f"shape and the theoretical scale {theory:.3f}.")
    target = tuning1.choice.acceptance  # the optimum for this shape
    state2, _, acc2, log_m2, mcse2 = _run(context, stream(key, 2), state,
                                          tuning1.factor * math.exp(log_m_start), half, half,
                                          target, rate)
    total = 2 * half
    if rate == 0.0 and abs(acc2 - target) > 3.0 * mcse2:
        # At the theoretical scale the chains accept more or less often than the Gaussian
        # picture predicts, beyond Monte Carlo error: take the adapted scale.
        reasons.append(f"at the theoretical scale the acceptance was {acc2:.3f}, not the "
                       f"predicted {target:.3f} (Monte Carlo error {mcse2:.3f})")
        if bar is not None:  # the third phase adds steps to the bar's total
            bar.total += half
            bar.refresh()
        notes[-1] = ("Kept the proposal shape; adapted the scale in a third phase of "
                     f"{half} steps because " + reasons[-1] + ".")
        state2, _, acc2, log_m2, _ = _run(context, stream(key, 3), state2, tuning1.factor,
                                          half, LATE_ADAPTATION, target)
        total += half
    scale_final = tuning1.scale * math.exp(log_m_start + log_m2)
    final = tuning1._replace(scale=float(scale_final))
    aimed = f"aimed at {target:.3f}, the optimum for this shape"
    if abs(final.target_acceptance - target) > 5e-4:  # the summary's target is this one
        aimed += (f"; at the refined scale the Gaussian picture predicts "
                  f"{final.target_acceptance:.3f}, the summary's target")
    notes.append(f"Scale {tuning0.scale:.3f} -> {scale_final:.3f}; acceptance in the last "
                 f"quarter {acc2:.3f} ({aimed}); {context.khat}.")
    state2 = ChainState(np.asarray(state2.position), np.asarray(state2.logdensity))
    return Settled(final, state2, acc2, float(target), total, 0, tuple(reasons), tuple(notes))


def _blackjax(logdensity_fn, tuning, engine):
    return proposal.blackjax_algorithm(logdensity_fn, tuning.factor)


def _blackjax_states(positions, logdensity, engine, state, unravel_many):
    return RWState(positions, jnp.asarray(logdensity))


FAMILY = Family(
    name="rwm",
    label="random-walk Metropolis",
    parameter="scale",
    evaluation="logdensity",
    extra_compile_seconds=0.0,
    initial=_initial,
    choice=lambda tuning: geometry(tuning)["choice"],
    target_acceptance=lambda tuning: _derived(tuning)["acceptance"],
    predicted_jump=lambda tuning: _derived(tuning)["jump"],
    ess_per_step=_ess_per_step,
    ess_per_evaluation=lambda dim: predicted_ess_per_evaluation("rwm", dim),
    describe=lambda tuning: "",
    acceptance_band=lambda tuning: acceptance_band("rwm", tuning.dim, tuning.spectrum),
    engine=_engine,
    init=_init,
    positions=_positions,
    chunks=_chunks,
    stores_state=False,
    phase=_phase,
    reshape=_reshape,
    settle=_settle,
    covariance_of_squares=False,
    blackjax=_blackjax,
    blackjax_states=_blackjax_states,
    blackjax_parameters=lambda tuning: {"sigma": np.asarray(tuning.factor)},
    blackjax_api=blackjax.additive_step_random_walk,
    relies_on_limit=True,
)
