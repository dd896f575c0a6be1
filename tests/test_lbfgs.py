"""The mode search's L-BFGS (fisherwalk.fit.lbfgs) against known minima."""

import jax
import jax.numpy as jnp
import numpy as np
import scipy.optimize

from fisherwalk.fit.lbfgs import minimise

jax.config.update("jax_enable_x64", True)


def _run(objective, x0, iterations=500, tol=1e-10):
    x0 = jnp.asarray(x0, jnp.float64)
    f0, g0 = jax.value_and_grad(objective)(x0)
    return jax.jit(lambda x, f, g: minimise(objective, x, f, g, iterations, tol))(x0, f0, g0)


def test_rosenbrock_reaches_its_known_minimum():
    # Rosenbrock (1960, "An automatic method for finding the greatest or least value of a
    # function", Computer Journal 3(3)): minimum 0 at (1, ..., 1); scipy's rosen as the
    # reference function and its L-BFGS-B as the reference optimiser
    def rosen(x):
        return jnp.sum(100.0 * (x[1:] - x[:-1] ** 2) ** 2 + (1.0 - x[:-1]) ** 2)

    x0 = np.array([-1.2, 1.0, -0.5, 0.8, 1.5])
    end = _run(rosen, x0)
    assert float(rosen(end.x)) == scipy.optimize.rosen(np.asarray(end.x))
    reference = scipy.optimize.minimize(scipy.optimize.rosen, x0, method="L-BFGS-B",
                                        jac=scipy.optimize.rosen_der,
                                        options={"gtol": 1e-10, "ftol": 1e-15})
    assert np.allclose(np.asarray(end.x), 1.0, atol=1e-6)
    assert np.allclose(np.asarray(end.x), reference.x, atol=1e-5)
    assert not bool(end.stalled) or float(jnp.max(jnp.abs(end.grad))) < 1e-6
    assert 0 < int(end.iterations) < 500 and int(end.evaluations) > int(end.iterations)


def test_a_quadratic_ends_at_the_linear_solve():
    # minimum of ½ xᵀAx - bᵀx is A⁻¹b (numpy's solve as the reference)
    rng = np.random.default_rng(3)
    m = rng.standard_normal((20, 20))
    a = m @ m.T + 20 * np.eye(20)
    b = rng.standard_normal(20)
    end = _run(lambda x: 0.5 * x @ jnp.asarray(a) @ x - jnp.asarray(b) @ x, np.zeros(20))
    assert np.allclose(np.asarray(end.x), np.linalg.solve(a, b), atol=1e-8)


def test_a_region_of_nan_gradient_is_backed_out_of_not_entered():
    # the objective is finite everywhere, its gradient NaN for x[0] < 0.1; the minimum of
    # the smooth part is at x[0] = 0: the search must stop at a finite point, not return NaN
    def band(x):
        return 0.5 * jnp.sum(x**2) + 0.0 * jnp.sqrt(jnp.maximum(x[0] - 0.1, 0.0))

    end = _run(band, np.array([2.0, 1.0]))
    assert np.isfinite(np.asarray(end.x)).all() and np.isfinite(float(end.value))
    assert np.isfinite(np.asarray(end.grad)).all() and float(end.x[0]) >= 0.1


def test_the_iteration_budget_is_kept():
    end = _run(lambda x: jnp.sum((x - 3.0) ** 4), np.zeros(3), iterations=4)
    assert int(end.iterations) == 4
