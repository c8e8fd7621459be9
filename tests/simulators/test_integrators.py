"""Convergence order of the fixed-step integrators, measured on a pendulum.

Reference solution: scipy.integrate.solve_ivp (DOP853, rtol = atol = 1e-12). The error of a method of order p
falls like h^p (Hairer, Norsett, Wanner, Solving ODEs I, 1993, Sec. II.3, Theorem 3.4), so the slope of
log(error) over log(h) is p.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import solve_ivp

from shadow.errors import ShapeError
from simulators.integrators import Method, integrate, lag_factor

OMEGA2 = 9.80665 / 0.8  # g / L of a 0.8 m pendulum [1/s^2]


def pendulum(t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
    """theta'' = -(g/L) sin(theta) - c theta' + a sin(3 t): damped and driven, so nothing cancels by symmetry."""
    return -OMEGA2 * np.sin(q) - 0.3 * v + 2.0 * np.sin(3.0 * t)


def reference(q0: np.ndarray, v0: np.ndarray, t_end: float) -> np.ndarray:
    out = []
    for a, b in zip(q0, v0, strict=True):
        sol = solve_ivp(
            lambda t, y: [y[1], pendulum(t, np.array(y[0]), np.array(y[1]))],
            (0.0, t_end),
            [a, b],
            method="DOP853",
            rtol=1e-12,
            atol=1e-12,
        )
        out.append(sol.y[:, -1])
    return np.array(out)


@pytest.mark.parametrize("method", [Method.RK4, Method.HEUN, Method.SYMPLECTIC])
def test_error_falls_at_stated_order(method):
    q0 = np.array([[1.2], [-0.5], [2.5]])  # three amplitudes side by side in one batch
    v0 = np.array([[0.0], [1.0], [-0.3]])
    t_end = 2.0
    ref = reference(q0[:, 0], v0[:, 0], t_end)
    steps = np.array([0.04, 0.02, 0.01, 0.005])
    errors = []
    for h in steps:
        qs, vs = integrate(pendulum, q0, v0, t0_s=0.0, step_s=h, n_steps=round(t_end / h), method=method)
        errors.append(np.max(np.abs(np.concatenate([qs[-1], vs[-1]], axis=1) - ref)))
    slope = np.polyfit(np.log(steps), np.log(errors), 1)[0]
    assert abs(slope - method.order) < 0.25, (slope, errors)


def test_rk4_is_accurate_at_fine_step():
    q0, v0 = np.array([[1.0]]), np.array([[0.0]])
    qs, vs = integrate(pendulum, q0, v0, t0_s=0.0, step_s=1e-3, n_steps=2000)
    assert_allclose(np.concatenate([qs[-1], vs[-1]], axis=1), reference(q0[:, 0], v0[:, 0], 2.0), rtol=0, atol=1e-10)


def test_lag_factor_is_exact_step_response():
    # first-order lag step response y(t) = 1 - exp(-t/T) (Franklin-Powell-Workman 1998, eq. 4.59):
    # ten exact steps of h reproduce one step of 10 h
    alpha = lag_factor(0.01, 1e-3)
    y = 0.0
    for _ in range(10):
        y = 1.0 + (y - 1.0) * alpha
    assert_allclose(y, 1.0 - np.exp(-1.0), rtol=1e-14)


def test_integrate_rejects_mismatched_shapes():
    with pytest.raises(ShapeError, match="q0, v0: expected equal shapes"):
        integrate(pendulum, np.zeros((2, 1)), np.zeros((3, 1)), t0_s=0.0, step_s=0.1, n_steps=1)
