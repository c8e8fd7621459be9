"""The plant's warm-started hexapod kinematics and the shared-payload routes give the rigid model's own values."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.errors import ConfigurationError
from shadow.robots.description import build_model, example_paths, load_description
from shadow.robots.hexapod import HexapodModel
from shadow.robots.rotations import exp_rotation
from simulators.kinematics import WarmStartHexapod, plant_mechanism
from simulators.plant import bias_terms, mass_terms, shared_payload


def _model(family: str):
    return build_model(load_description(next(p for p in example_paths() if family in p.name)))


def _hexapod_path(model: HexapodModel, rng: np.random.Generator, n: int, offset_m: float = 0.0) -> np.ndarray:
    """Leg lengths (n, 1, 6) along a smooth motion of about 1 cm and 1 degree about home shifted by ``offset_m``."""
    home = np.asarray(model.params.home_position_m, dtype=float) + offset_m
    s = np.linspace(0.0, 1.0, n)[:, None]
    p = home + 0.01 * np.sin(2.0 * np.pi * s * rng.uniform(0.5, 1.5, size=3))
    rot = exp_rotation(0.02 * np.sin(2.0 * np.pi * s * rng.uniform(0.5, 1.5, size=3)))
    return model.inverse_kinematics(p, rot)[:, None, :]


def test_warm_start_finds_the_cold_start_pose(rng):
    cold = _model("hexapod")
    warm = plant_mechanism(cold)
    assert isinstance(warm, WarmStartHexapod)
    for q in _hexapod_path(cold, rng, 40):
        p_w, r_w = warm.forward_kinematics(q)
        p_c, r_c = cold.forward_kinematics(q)
        # both are Newton solutions to 1e-12 m in leg length; the pose agrees to the same order
        assert_allclose(p_w, p_c, rtol=0, atol=1e-11)
        assert_allclose(r_w, r_c, rtol=0, atol=1e-10)
        assert np.abs(warm.inverse_kinematics(p_w, r_w) - q).max() <= 1e-12


def test_warm_start_takes_fewer_newton_steps(rng):
    cold = _model("hexapod")
    warm = plant_mechanism(cold)
    path = _hexapod_path(cold, rng, 200, offset_m=0.03)  # about 0.3 mm between samples, as a plant asks
    warm.forward_kinematics(path[0])
    steps_cold = steps_warm = 0
    for previous, q in zip(path[:-1], path[1:], strict=True):
        steps_cold += int(cold.solve_forward_kinematics(q).iterations.sum())
        p0, r0 = warm.forward_kinematics(previous)  # the remembered pose
        steps_warm += int(cold.solve_forward_kinematics(q, initial_p=p0, initial_R=r0).iterations.sum())
        warm.forward_kinematics(q)
    assert steps_warm < steps_cold


def test_same_q_returns_the_remembered_pose_and_a_far_q_starts_cold(rng):
    model = WarmStartHexapod(_model("hexapod").params, warm_start_limit_m=1e-3)
    q = _hexapod_path(model, rng, 2)[0]
    p1, r1 = model.forward_kinematics(q)
    p1[:] = np.nan  # the caller's copy: the remembered pose must not change
    p2, r2 = model.forward_kinematics(q.copy())
    assert np.isfinite(p2).all()
    assert_allclose(r2, r1, rtol=0, atol=0)
    far = q + 0.02  # 20 mm on every leg: beyond the limit, solved from home as the base model does
    p_far, r_far = model.forward_kinematics(far)
    p_ref, r_ref = HexapodModel(model.params).forward_kinematics(far)
    assert_allclose(p_far, p_ref, rtol=0, atol=0)
    assert_allclose(r_far, r_ref, rtol=0, atol=0)


def test_rejects_a_negative_warm_start_limit():
    with pytest.raises(ConfigurationError, match="warm_start_limit_m"):
        WarmStartHexapod(_model("hexapod").params, warm_start_limit_m=-1.0)


def test_delta_is_left_as_it_is():
    delta = _model("delta")
    assert plant_mechanism(delta) is delta


@pytest.mark.parametrize("family", ["delta", "hexapod"])
def test_shared_payload_route_equals_the_per_row_routes(family, rng):
    model = _model(family)
    if family == "delta":
        x = np.asarray(load_description(next(p for p in example_paths() if "delta" in p.name)).home_position_m)
        q = model.inverse_kinematics(x + rng.uniform(-0.05, 0.05, size=(3, 3)))
        theta = np.full((3, 1), 0.8)
    else:
        q = _hexapod_path(model, rng, 3)[:, 0]
        theta = np.tile(rng.uniform(0.1, 0.3, size=10), (3, 1))
    qd = rng.normal(scale=0.2, size=q.shape)
    assert shared_payload(theta) is not None
    assert shared_payload(np.vstack([theta[:1], 1.1 * theta[1:]])) is None
    for route in ("affine", "regressor"):  # the per-row routes (any payload per row) against the shared one
        assert_allclose(mass_terms(model, q, theta), mass_terms(model, q, theta, route=route), rtol=1e-11, atol=1e-12)
    tau_known, y_p = model.rigid_regressor(q, qd, np.zeros_like(q))
    per_row = tau_known + np.einsum("bap,bp->ba", y_p, theta)
    assert_allclose(bias_terms(model, q, qd, theta), per_row, rtol=1e-10, atol=1e-10)
