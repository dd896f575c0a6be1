"""L-BFGS with a backtracking line search, small enough to compile quickly.

The mode search's first phase. The direction is the two-loop recursion over the last
``MEMORY`` curvature pairs (Nocedal & Wright 2006, *Numerical Optimization*, 2nd ed.,
Alg. 7.4, with the initial scaling γ = sᵀy / yᵀy of eq. 7.20); the step length is found by
backtracking from 1 until the sufficient-decrease (Armijo) condition holds (Alg. 3.1,
c₁ = 10⁻⁴). A pair is stored only when sᵀy > 0 relative to |s||y|, which keeps the
implicit inverse Hessian positive definite without a Wolfe line search (the damping-free
skip of Nocedal & Wright §7.2, "common practice" for backtracking L-BFGS). A non-finite
trial point (value or gradient) counts as a failed decrease, so the search backs away
from a region where the log density or its gradient is NaN or infinite.

Everything is one ``lax.while_loop`` holding a single copy of the objective's value and
gradient (inside the line search), so the program compiles in a fraction of the time a
zoom line search needs; the safeguarded Newton steps of :mod:`fisherwalk.fit.search`
polish the end point to a tight tolerance.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import NamedTuple

import jax
import jax.numpy as jnp

__all__ = ["Descent", "minimise"]

MEMORY = 10  # curvature pairs kept
HALVINGS = 40  # backtracking steps before the line search gives up (step 2^-40)
ARMIJO = 1e-4  # sufficient-decrease constant c1 (Nocedal & Wright 2006, section 3.1)


class Descent(NamedTuple):
    """Where one L-BFGS run ended."""

    x: jax.Array  # (d,)
    value: jax.Array  # () objective there
    grad: jax.Array  # (d,)
    iterations: jax.Array  # () int32
    evaluations: jax.Array  # () int32 value-and-gradient evaluations, the start's included
    stalled: jax.Array  # () the line search found no decrease, or the point did not move


class _Memory(NamedTuple):
    s: jax.Array  # (MEMORY, d) steps
    y: jax.Array  # (MEMORY, d) gradient changes
    rho: jax.Array  # (MEMORY,) 1 / sᵀy, 0 for an empty slot
    newest: jax.Array  # () slot of the latest pair


def _direction(g: jax.Array, mem: _Memory) -> jax.Array:
    """-H g by the two-loop recursion (Nocedal & Wright 2006, Alg. 7.4); empty slots
    (rho = 0) drop out. With no pair yet, a steepest-descent step of length at most 1."""

    def newer_to_older(i, carry):
        q, alpha = carry
        j = (mem.newest - i) % MEMORY
        a = mem.rho[j] * jnp.dot(mem.s[j], q)
        return q - a * mem.y[j], alpha.at[j].set(a)

    q, alpha = jax.lax.fori_loop(0, MEMORY, newer_to_older,
                                 (g, jnp.zeros(MEMORY, g.dtype)))
    rho, y = mem.rho[mem.newest], mem.y[mem.newest]
    have = rho > 0
    gamma = 1.0 / jnp.where(have, rho * jnp.dot(y, y), 1.0)  # sᵀy / yᵀy (eq. 7.20)
    r = jnp.where(have, gamma * q, q / jnp.maximum(1.0, jnp.linalg.norm(g)))

    def older_to_newer(i, r):
        j = (mem.newest + 1 + i) % MEMORY
        b = mem.rho[j] * jnp.dot(mem.y[j], r)
        return r + mem.s[j] * (alpha[j] - b)

    return -jax.lax.fori_loop(0, MEMORY, older_to_newer, r)


def minimise(objective: Callable[[jax.Array], jax.Array], x0: jax.Array, f0: jax.Array,
             g0: jax.Array, max_iterations: jax.Array, tol: jax.Array) -> Descent:
    """Minimise ``objective`` from ``x0`` (where its value is ``f0`` and its gradient
    ``g0``): stop when max|∇f| ≤ tol · max(1, |f|), after ``max_iterations`` iterations,
    when the line search stalls, or at a non-finite value.

    Traced and pure; ``max_iterations`` and ``tol`` may be traced scalars.
    """
    value_and_grad = jax.value_and_grad(objective)
    dtype = x0.dtype
    zero = jnp.zeros((), jnp.int32)
    empty = _Memory(jnp.zeros((MEMORY, x0.size), dtype), jnp.zeros((MEMORY, x0.size), dtype),
                    jnp.zeros(MEMORY, dtype), jnp.asarray(MEMORY - 1, jnp.int32))

    def keep_going(carry):
        d, _ = carry
        small = jnp.max(jnp.abs(d.grad)) <= tol * jnp.maximum(1.0, jnp.abs(d.value))
        return (d.iterations < max_iterations) & ~small & ~d.stalled & jnp.isfinite(d.value)

    def iterate(carry):
        d, mem = carry
        p = _direction(d.grad, mem)
        slope = jnp.dot(d.grad, p)
        uphill = ~(slope < 0)  # a direction gone bad in rounding: steepest descent instead
        p = jnp.where(uphill, -d.grad, p)
        slope = jnp.where(uphill, -jnp.dot(d.grad, d.grad), slope)

        def decreased(t, f, g):
            return (jnp.isfinite(f) & jnp.all(jnp.isfinite(g))
                    & (f <= d.value + ARMIJO * t * slope))

        def not_yet(trial):
            t, f, g, k = trial
            return (k < HALVINGS + 1) & ~decreased(t, f, g)

        def halve(trial):
            t, _, _, k = trial
            t = jnp.where(k == 0, t, 0.5 * t)
            f, g = value_and_grad(d.x + t * p)
            return t, f, g, k + 1

        t, f, g, tries = jax.lax.while_loop(
            not_yet, halve, (jnp.ones((), dtype), jnp.full((), jnp.inf, dtype), d.grad, zero))
        ok = decreased(t, f, g)
        x = jnp.where(ok, d.x + t * p, d.x)
        s, y = x - d.x, g - d.grad
        sy = jnp.dot(s, y)
        store = ok & (sy > 1e-10 * jnp.linalg.norm(s) * jnp.linalg.norm(y))
        slot = jnp.where(store, (mem.newest + 1) % MEMORY, mem.newest)
        mem = _Memory(jnp.where(store, mem.s.at[slot].set(s), mem.s),
                      jnp.where(store, mem.y.at[slot].set(y), mem.y),
                      jnp.where(store, mem.rho.at[slot].set(1.0 / jnp.where(store, sy, 1.0)),
                                mem.rho), slot)
        d = Descent(x, jnp.where(ok, f, d.value), jnp.where(ok, g, d.grad),
                    d.iterations + 1, d.evaluations + tries, ~ok | jnp.all(x == d.x))
        return d, mem

    start = Descent(x0, f0, g0, zero, zero + 1, jnp.asarray(False))
    end, _ = jax.lax.while_loop(keep_going, iterate, (start, empty))
    return end
