"""Friction regressor: layout, linearity in the parameters and the limiting cases of the model."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.errors import OutOfRangeError, ShapeError
from shadow.robots.friction import (
    friction_effort,
    friction_regressor,
    parameter_names,
    parameters_per_actuator,
)


def direct_friction(qd: np.ndarray, theta: np.ndarray, v_s: float, v_st: float | None) -> np.ndarray:
    """The model written per actuator from its definition (Armstrong-Helouvry et al., Automatica 1994)."""
    k = parameters_per_actuator(stribeck=v_st is not None)
    out = np.zeros_like(qd)
    for i in range(qd.shape[1]):
        p = theta[i * k : (i + 1) * k]
        v = qd[:, i]
        s = np.tanh(v / v_s)
        out[:, i] = p[0] * s + p[1] * v + p[2]
        if v_st is not None:
            out[:, i] += p[3] * s * np.exp(-((v / v_st) ** 2))
    return out


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500])
@pytest.mark.parametrize("n_act", [3, 6])
@pytest.mark.parametrize("stribeck", [None, 0.05])
def test_regressor_times_parameters(
    rng: np.random.Generator, n_samples: int, n_act: int, stribeck: float | None
) -> None:
    k = parameters_per_actuator(stribeck=stribeck is not None)
    qd = rng.normal(0.0, 0.5, (n_samples, n_act))
    theta = rng.uniform(0.0, 2.0, k * n_act)
    y_f = friction_regressor(qd, smooth_velocity=0.01, stribeck_velocity=stribeck)
    assert y_f.shape == (n_samples, n_act, k * n_act)
    tau = friction_effort(qd, theta, smooth_velocity=0.01, stribeck_velocity=stribeck)
    assert_allclose(tau, np.einsum("nij,j->ni", y_f, theta), rtol=1e-14, atol=1e-15)
    assert_allclose(tau, direct_friction(qd, theta, 0.01, stribeck), rtol=1e-13, atol=1e-14)


def test_block_diagonal_layout(rng: np.random.Generator) -> None:
    qd = rng.normal(size=(5, 3))
    y_f = friction_regressor(qd, smooth_velocity=0.02)
    for i in range(3):
        own = np.zeros(9, dtype=bool)
        own[3 * i : 3 * i + 3] = True
        assert np.all(y_f[:, i, ~own] == 0.0)
        assert_allclose(y_f[:, i, 3 * i + 1], qd[:, i], rtol=0)  # viscous column is qd itself
        assert_allclose(y_f[:, i, 3 * i + 2], 1.0, rtol=0)  # offset column
    assert parameter_names(2) == ["coulomb_1", "viscous_1", "offset_1", "coulomb_2", "viscous_2", "offset_2"]
    assert parameter_names(1, stribeck=True)[-1] == "stribeck_1"


def test_smooth_sign_tends_to_coulomb_sign() -> None:
    # Coulomb friction is F_c sign(qd) away from rest (common practice, no source): tanh(x) > 0.98 for x > 2.3.
    qd = np.array([[-1.0, -0.05, 0.05, 1.0]])
    y_f = friction_regressor(qd, smooth_velocity=0.01)
    coulomb = y_f[0, np.arange(4), 3 * np.arange(4)]
    assert_allclose(coulomb, np.sign(qd[0]), atol=1e-4)
    at_rest = friction_regressor(np.zeros((1, 2)), smooth_velocity=0.01)
    assert np.all(at_rest[0, :, [0, 3]] == 0.0)  # no jump at zero velocity


def test_stribeck_term_vanishes_at_speed() -> None:
    # exp(-(qd / v_st)^2) -> 0 for |qd| >> v_st: static friction only matters near rest.
    y_f = friction_regressor(np.array([[1.0]]), smooth_velocity=0.01, stribeck_velocity=0.05)
    assert abs(y_f[0, 0, 3]) < 1e-150


def test_per_actuator_smoothing(rng: np.random.Generator) -> None:
    qd = rng.normal(size=(4, 2))
    y_f = friction_regressor(qd, smooth_velocity=[0.01, 0.5])
    assert_allclose(y_f[:, 1, 3], np.tanh(qd[:, 1] / 0.5), rtol=1e-14)


def test_errors() -> None:
    with pytest.raises(ShapeError, match=r"qd: expected shape \(N, n\)"):
        friction_regressor(np.zeros(3), smooth_velocity=0.01)
    with pytest.raises(OutOfRangeError, match="smooth_velocity: must be finite and > 0"):
        friction_regressor(np.zeros((2, 3)), smooth_velocity=0.0)
    with pytest.raises(ShapeError, match=r"smooth_velocity: expected shape \(3,\)"):
        friction_regressor(np.zeros((2, 3)), smooth_velocity=[0.1, 0.1])
    with pytest.raises(ShapeError, match=r"theta_f: expected shape \(9,\)"):
        friction_effort(np.zeros((2, 3)), np.zeros(8), smooth_velocity=0.01)
