"""Hexapod kinematics and rigid-body dynamics against identities, physical laws and scipy.

The geometry and masses below are an invented demonstration robot (plausible sizes only).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import simpson
from scipy.spatial.transform import Rotation

from shadow.errors import ConvergenceError, NonFiniteError, ShapeError, SingularPoseError, UnreachablePoseError
from shadow.robots.hexapod import HexapodModel
from shadow.robots.parameters import Drive, HexapodParameters, RigidPayload
from shadow.robots.rotations import (
    angular_acceleration_from_xyz_rates,
    angular_velocity_from_xyz_rates,
    exp_rotation,
    log_rotation,
    rotation_from_xyz_angles,
    skew,
    xyz_angles_from_rotation,
)

HOME_M = np.array([0.0, 0.0, 0.35])


def hexapod_params(**changes: object) -> HexapodParameters:
    """Invented demonstration hexapod: base joints in 3 pairs on r = 0.25 m, platform joints on r = 0.15 m."""
    base_rad = np.deg2rad([-15.0, 15.0, 105.0, 135.0, 225.0, 255.0])
    platform_rad = np.deg2rad([-45.0, 45.0, 75.0, 165.0, 195.0, 285.0])
    drives = tuple(
        Drive(
            rotor_inertia_kg_m2=5e-5 * (1.0 + 0.05 * j),  # legs differ a little so index mix-ups show
            gear_ratio=1.0 + 0.2 * j,
            efficiency=0.9,
            torque_constant_nm_per_a=0.12,
            current_loop_bandwidth_hz=1000.0,
            rated_effort=2000.0,
            screw_lead_m=0.005,
        )
        for j in range(6)
    )
    values: dict[str, object] = dict(
        base_joints_m=np.column_stack([0.25 * np.cos(base_rad), 0.25 * np.sin(base_rad), np.zeros(6)]),
        platform_joints_m=np.column_stack([0.15 * np.cos(platform_rad), 0.15 * np.sin(platform_rad), np.zeros(6)]),
        lower_leg_mass_kg=1.5,
        lower_leg_com_m=0.12,
        lower_leg_inertia_kg_m2=0.012,
        upper_leg_mass_kg=0.8,
        upper_leg_com_m=0.10,
        upper_leg_inertia_kg_m2=0.006,
        platform_mass_kg=8.0,
        platform_com_m=np.array([0.002, -0.001, 0.03]),
        platform_inertia_kg_m2=np.array([[0.05, 0.001, -0.002], [0.001, 0.055, 0.0015], [-0.002, 0.0015, 0.09]]),
        drives=drives,
        leg_lower_m=0.30,
        leg_upper_m=0.50,
        home_position_m=HOME_M.copy(),
    )
    values.update(changes)
    return HexapodParameters(**values)  # type: ignore[arg-type]


@pytest.fixture
def model() -> HexapodModel:
    return HexapodModel(hexapod_params())


def random_payload(rng: np.random.Generator) -> RigidPayload:
    a = rng.normal(size=(3, 3))
    return RigidPayload(
        mass_kg=float(rng.uniform(0.5, 4.0)),
        com_m=rng.uniform(-0.04, 0.04, 3) + np.array([0.0, 0.0, 0.06]),
        inertia_kg_m2=0.002 * (a @ a.T) + 0.004 * np.eye(3),
    )


def random_poses(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    p = HOME_M + rng.uniform(-1.0, 1.0, (n, 3)) * np.array([0.04, 0.04, 0.03])
    R = rotation_from_xyz_angles(rng.uniform(-1.0, 1.0, (n, 3)) * np.deg2rad(8.0))
    return p, R


def random_motion(rng: np.random.Generator, n: int) -> tuple[np.ndarray, ...]:
    p, R = random_poses(rng, n)
    twist = rng.normal(size=(n, 6)) * np.array([0.1, 0.1, 0.1, 0.4, 0.4, 0.4])
    accel = rng.normal(size=(n, 6)) * np.array([1.0, 1.0, 1.0, 3.0, 3.0, 3.0])
    return p, R, twist, accel


# ---------------------------------------------------------------------------------------- rotations


def test_rotation_helpers_match_scipy(rng: np.random.Generator) -> None:
    # Reference: scipy.spatial.transform.Rotation ("xyz" lower case = extrinsic, fixed axes)
    angles = rng.uniform(-1.0, 1.0, (50, 3)) * np.array([np.pi, np.pi / 2 * 0.99, np.pi])
    R = rotation_from_xyz_angles(angles)
    assert_allclose(R, Rotation.from_euler("xyz", angles).as_matrix(), rtol=0, atol=1e-14)
    assert_allclose(xyz_angles_from_rotation(R), angles, rtol=0, atol=1e-12)
    phi = rng.normal(size=(50, 3))
    phi *= (rng.uniform(0.0, np.pi * 0.999, 50) / np.linalg.norm(phi, axis=1))[:, None]
    phi[0] = [1e-9, -2e-9, 0.5e-9]  # small-angle branch
    phi[1] = [0.0, np.pi - 1e-7, 0.0]  # near pi
    assert_allclose(exp_rotation(phi), Rotation.from_rotvec(phi).as_matrix(), rtol=0, atol=1e-14)
    assert_allclose(log_rotation(exp_rotation(phi)), phi, rtol=0, atol=1e-8)
    locked = np.array([[0.3, np.pi / 2, 0.5], [-0.2, -np.pi / 2, 1.0]])  # gimbal lock: only yaw -+ roll is defined
    R_locked = rotation_from_xyz_angles(locked)
    assert_allclose(rotation_from_xyz_angles(xyz_angles_from_rotation(R_locked)), R_locked, rtol=0, atol=1e-12)
    v, w = rng.normal(size=(2, 5, 3))
    assert_allclose(np.einsum("nij,nj->ni", skew(v), w), np.cross(v, w), rtol=0, atol=1e-15)


def test_angular_velocity_and_acceleration_from_rates(rng: np.random.Generator) -> None:
    # Reference: dR/dt = [omega]x R (Murray, Li, Sastry 1994, section 2.2), by central differences in time
    n, h = 20, 1e-5
    a0, a1, a2 = rng.uniform(-0.5, 0.5, (3, n, 3))

    def angles(t: float) -> np.ndarray:
        return a0 + a1 * t + a2 * t**2

    omega = angular_velocity_from_xyz_rates(angles(0.0), a1)
    r_dot = (rotation_from_xyz_angles(angles(h)) - rotation_from_xyz_angles(angles(-h))) / (2 * h)
    w_fd = r_dot @ np.swapaxes(rotation_from_xyz_angles(angles(0.0)), 1, 2)
    assert_allclose(skew(omega), w_fd, rtol=0, atol=1e-9)
    alpha = angular_acceleration_from_xyz_rates(angles(0.0), a1, 2 * a2)
    w_plus = angular_velocity_from_xyz_rates(angles(h), a1 + 2 * a2 * h)
    w_minus = angular_velocity_from_xyz_rates(angles(-h), a1 - 2 * a2 * h)
    assert_allclose(alpha, (w_plus - w_minus) / (2 * h), rtol=0, atol=1e-9)


# ---------------------------------------------------------------------------------------- kinematics


def test_ik_fk_round_trip(model: HexapodModel, rng: np.random.Generator) -> None:
    # Identity: FK(IK(pose)) == pose
    p, R = random_poses(rng, 200)
    q = model.inverse_kinematics(p, R)
    model.check_reachable(q)
    sol = model.solve_forward_kinematics(q)
    assert_allclose(sol.p, p, rtol=0, atol=1e-10)
    assert_allclose(sol.R, R, rtol=0, atol=1e-10)
    assert_allclose(model.inverse_kinematics(sol.p, sol.R), q, rtol=0, atol=1e-12)
    # restarting from a nearby pose (the previous sample) converges too, in fewer steps
    warm = model.solve_forward_kinematics(q, initial_p=p + 1e-4, initial_R=exp_rotation(np.full((200, 3), 1e-4)) @ R)
    assert_allclose(warm.p, p, rtol=0, atol=1e-10)
    assert warm.iterations.max() <= sol.iterations.max()


def test_fk_starts_from_the_linearised_home_pose(model: HexapodModel, rng: np.random.Generator) -> None:
    # the first-order start xi = J(home) (q - q(home)) is Newton's first step from home, without its solve
    p, R = random_poses(rng, 200)
    q = model.inverse_kinematics(p, R)
    predicted = model.solve_forward_kinematics(q)
    home_p = np.tile(np.asarray(model.params.home_position_m), (200, 1))
    from_home = model.solve_forward_kinematics(q, initial_p=home_p, initial_R=np.tile(np.eye(3), (200, 1, 1)))
    assert_allclose(predicted.p, from_home.p, rtol=0, atol=1e-11)
    assert_allclose(predicted.R, from_home.R, rtol=0, atol=1e-11)
    assert predicted.iterations.sum() < from_home.iterations.sum()


def test_inverse_jacobian_matches_finite_differences(model: HexapodModel, rng: np.random.Generator) -> None:
    # Reference: definition of the derivative; central differences along the twist (v, omega base frame)
    p, R = random_poses(rng, 30)
    twist = rng.normal(size=(30, 6))
    h = 1e-6

    def q_at(s: float) -> np.ndarray:
        return model.inverse_kinematics(p + s * twist[:, :3], exp_rotation(s * twist[:, 3:]) @ R)

    qd_fd = (q_at(h) - q_at(-h)) / (2 * h)
    assert_allclose(np.einsum("nij,nj->ni", model.inverse_jacobian(p, R), twist), qd_fd, rtol=0, atol=1e-8)


def test_platform_jacobian_matches_forward_kinematics(model: HexapodModel, rng: np.random.Generator) -> None:
    # Reference: central differences of FK along qd; omega from log(R+ R-^T) / 2h
    p, R = random_poses(rng, 20)
    q = model.inverse_kinematics(p, R)
    qd = rng.normal(size=(20, 6)) * 0.05
    h = 1e-5
    p_plus, r_plus = model.forward_kinematics(q + h * qd)
    p_minus, r_minus = model.forward_kinematics(q - h * qd)
    twist = np.einsum("nij,nj->ni", model.platform_jacobian(q), qd)
    assert_allclose(twist[:, :3], (p_plus - p_minus) / (2 * h), rtol=0, atol=1e-7)
    assert_allclose(twist[:, 3:], log_rotation(r_plus @ np.swapaxes(r_minus, 1, 2)) / (2 * h), rtol=0, atol=1e-7)
    assert_allclose(
        model.platform_jacobian(q) @ model.inverse_jacobian(p, R), np.tile(np.eye(6), (20, 1, 1)), atol=1e-12
    )
    assert np.all(model.jacobian_condition(p, R) > 1.0)


def test_actuator_motion_matches_finite_differences(model: HexapodModel, rng: np.random.Generator) -> None:
    # Reference: central differences of IK along a pose path with constant twist derivative
    p, R, twist, accel = random_motion(rng, 10)
    h = 1e-4

    def pose(s: float) -> tuple[np.ndarray, np.ndarray]:
        pos = p + s * twist[:, :3] + 0.5 * s**2 * accel[:, :3]
        # R(s) = exp([w s + alpha s^2 / 2]x) R has omega(0) = w and d(omega)/dt(0) = alpha (second order)
        return pos, exp_rotation(s * twist[:, 3:] + 0.5 * s**2 * accel[:, 3:]) @ R

    q0 = model.inverse_kinematics(*pose(0.0))
    qp, qm = model.inverse_kinematics(*pose(h)), model.inverse_kinematics(*pose(-h))
    q, qd, qdd = model.actuator_motion(p, R, twist, accel)
    assert_allclose(q, q0, rtol=0, atol=1e-15)
    assert_allclose(qd, (qp - qm) / (2 * h), rtol=0, atol=1e-8)
    assert_allclose(qdd, (qp - 2 * q0 + qm) / h**2, rtol=0, atol=1e-5)
    p2, r2, twist2, accel2 = model.platform_motion(q, qd, qdd)
    assert_allclose(twist2, twist, rtol=0, atol=1e-10)
    assert_allclose(accel2, accel, rtol=0, atol=1e-9)


# ---------------------------------------------------------------------------------------- dynamics


def test_mass_matrix_symmetric_positive_definite(model: HexapodModel, rng: np.random.Generator) -> None:
    # Identity: M = M^T > 0 (kinetic energy is a positive definite quadratic form)
    p, R = random_poses(rng, 50)
    theta = random_payload(rng).standard_parameters()
    M = model.mass_matrix(model.inverse_kinematics(p, R), theta)
    assert_allclose(M, np.swapaxes(M, 1, 2), rtol=0, atol=1e-12)
    assert np.linalg.eigvalsh(M).min() > 0.0


def test_inverse_dynamics_equals_mass_matrix_plus_bias(model: HexapodModel, rng: np.random.Generator) -> None:
    # Identity: Newton-Euler ID == M qdd + h, with M from the kinetic energy (Lagrange), an independent route
    p, R, twist, accel = random_motion(rng, 40)
    theta = random_payload(rng).standard_parameters()
    q, qd, qdd = model.actuator_motion(p, R, twist, accel)
    tau = model.inverse_dynamics(q, qd, qdd, theta)
    M = model.mass_matrix(q, theta)
    h = model.bias_efforts(q, qd, theta)
    assert_allclose(tau, np.einsum("nij,nj->ni", M, qdd) + h, rtol=1e-10, atol=1e-9)
    assert_allclose(tau, model.inverse_dynamics_from_platform(p, R, twist, accel, theta), rtol=1e-9, atol=1e-8)
    # kinetic energy body by body == qd^T M qd / 2
    T = model.kinetic_energy(q, qd, theta)
    assert_allclose(T, 0.5 * np.einsum("ni,nij,nj->n", qd, M, qd), rtol=1e-11)


def test_mass_matrix_rate_matches_finite_differences(model: HexapodModel, rng: np.random.Generator) -> None:
    # Reference: central differences of M along q + s qd
    p, R = random_poses(rng, 20)
    q = model.inverse_kinematics(p, R)
    qd = rng.normal(size=(20, 6)) * 0.05
    theta = random_payload(rng).standard_parameters()
    h = 1e-4
    m_dot_fd = (model.mass_matrix(q + h * qd, theta) - model.mass_matrix(q - h * qd, theta)) / (2 * h)
    m_dot = model.mass_matrix_rate(q, qd, theta)
    assert_allclose(m_dot, m_dot_fd, rtol=0, atol=1e-6 * np.abs(m_dot).max())
    # Identity: dM/dt - 2 C is skew, so qd^T (dM/dt qd / 2 - (h(qd) - h(0))) == 0 (power of Coriolis forces)
    c_qd = model.bias_efforts(q, qd, theta) - model.bias_efforts(q, np.zeros_like(qd), theta)
    power = np.einsum("ni,ni->n", qd, c_qd - 0.5 * np.einsum("nij,nj->ni", m_dot, qd))
    assert_allclose(power, 0.0, atol=1e-9 * np.abs(c_qd * qd).sum(axis=1).max())


def test_regressor_matches_merged_platform(rng: np.random.Generator) -> None:
    # Reference: parallel-axis theorem (Steiner); a payload fixed to the platform is the same as a heavier platform
    params = hexapod_params()
    payload = random_payload(rng)
    m_p, c_p, m_l, c_l = params.platform_mass_kg, params.platform_com_m, payload.mass_kg, payload.com_m
    m_t = m_p + m_l
    c_t = (m_p * c_p + m_l * c_l) / m_t

    def shifted(inertia: np.ndarray, mass: float, d: np.ndarray) -> np.ndarray:
        return inertia + mass * (d @ d * np.eye(3) - np.outer(d, d))

    i_t = shifted(params.platform_inertia_kg_m2, m_p, c_p - c_t) + shifted(payload.inertia_kg_m2, m_l, c_l - c_t)
    merged = HexapodModel(
        dataclasses.replace(params, platform_mass_kg=m_t, platform_com_m=c_t, platform_inertia_kg_m2=i_t)
    )
    model = HexapodModel(params)
    p, R, twist, accel = random_motion(rng, 30)
    q, qd, qdd = model.actuator_motion(p, R, twist, accel)
    tau_known, y_p = model.rigid_regressor(q, qd, qdd)
    expected = merged.inverse_dynamics(q, qd, qdd, np.zeros(10))
    assert_allclose(tau_known + y_p @ payload.standard_parameters(), expected, rtol=1e-10, atol=1e-9)
    assert_allclose(model.inverse_dynamics(q, qd, qdd, payload.standard_parameters()), expected, rtol=1e-10, atol=1e-9)
    assert_allclose(tau_known, model.inverse_dynamics(q, qd, qdd, np.zeros(10)), rtol=1e-12, atol=1e-10)


def test_virtual_work_for_a_static_external_wrench(model: HexapodModel, rng: np.random.Generator) -> None:
    # Reference: principle of virtual work, tau_ext = J^T w with xi = J qd; w is the wrench (about the platform
    # origin, base frame) the legs must add to hold a payload at rest: [-m g; -(R c) x m g]
    p, R = random_poses(rng, 25)
    q = model.inverse_kinematics(p, R)
    payload = random_payload(rng)
    g = model.params.gravity_m_s2
    zero = np.zeros((25, 6))
    extra = model.inverse_dynamics(q, zero, zero, payload.standard_parameters()) - model.inverse_dynamics(
        q, zero, zero, np.zeros(10)
    )
    weight = payload.mass_kg * g
    w = np.concatenate([-np.tile(weight, (25, 1)), -np.cross(R @ payload.com_m, weight)], axis=1)
    J = model.platform_jacobian(q)
    assert_allclose(extra, np.einsum("nji,nj->ni", J, w), rtol=1e-10, atol=1e-9)
    qd = rng.normal(size=(25, 6))
    # power balance: tau^T qd == w^T xi
    assert_allclose(np.einsum("ni,ni->n", extra, qd), np.einsum("ni,ni->n", w, np.einsum("nij,nj->ni", J, qd)))


def test_static_symmetric_hand_worked_case() -> None:
    # Hand-worked statics: massless legs, platform and payload centred on the axis, at home. The six legs are
    # equivalent under the D3 symmetry, so each takes F = (m_p + m) g / (6 u_z), u_z = h / |l| (vertical balance)
    params = hexapod_params(
        lower_leg_mass_kg=0.0,
        upper_leg_mass_kg=0.0,
        lower_leg_inertia_kg_m2=0.0,
        upper_leg_inertia_kg_m2=0.0,
        platform_com_m=np.array([0.0, 0.0, 0.02]),
        platform_inertia_kg_m2=np.diag([0.05, 0.05, 0.09]),
    )
    model = HexapodModel(params)
    payload = RigidPayload(mass_kg=3.0, com_m=np.array([0.0, 0.0, 0.08]), inertia_kg_m2=np.diag([0.01, 0.01, 0.02]))
    q = model.inverse_kinematics(HOME_M[None, :], np.eye(3)[None])
    zero = np.zeros((1, 6))
    F = model.inverse_dynamics(q, zero, zero, payload.standard_parameters())
    leg = HOME_M + params.platform_joints_m[0] - params.base_joints_m[0]
    u_z = HOME_M[2] / np.linalg.norm(leg)
    expected = (params.platform_mass_kg + payload.mass_kg) * 9.80665 / (6.0 * u_z)
    assert_allclose(F, np.full((1, 6), expected), rtol=1e-9)
    # with leg masses the six efforts are still equal by symmetry
    heavy = HexapodModel(dataclasses.replace(params, lower_leg_mass_kg=1.5, upper_leg_mass_kg=0.8))
    f_heavy = heavy.inverse_dynamics(q, zero, zero, payload.standard_parameters())
    assert_allclose(f_heavy, np.full((1, 6), f_heavy[0, 0]), rtol=1e-9)
    assert f_heavy[0, 0] > expected


def test_energy_balance_along_multisine_trajectory(model: HexapodModel, rng: np.random.Generator) -> None:
    # Physical law (work-energy theorem): integral of F . qd dt == change of kinetic + potential energy
    t = np.linspace(0.0, 2.0, 8001)[:, None]
    freqs = np.array([0.7, 1.3, 2.1])
    amp_p = rng.uniform(0.005, 0.012, (3, 3))  # (harmonic, axis) [m]
    amp_a = rng.uniform(0.01, 0.03, (3, 3))  # [rad]
    phase = rng.uniform(0.0, 2 * np.pi, (2, 3, 3))
    w = 2 * np.pi * freqs

    def multisine(amp: np.ndarray, ph: np.ndarray) -> tuple[np.ndarray, ...]:
        arg = w[None, :, None] * t[:, :, None] + ph[None]  # (T, harmonic, axis)
        x = (amp * np.sin(arg)).sum(axis=1)
        xd = (amp * w[:, None] * np.cos(arg)).sum(axis=1)
        xdd = (-amp * (w**2)[:, None] * np.sin(arg)).sum(axis=1)
        return x, xd, xdd

    pos, vel, acc = multisine(amp_p, phase[0])
    ang, rate, ang_acc = multisine(amp_a, phase[1])
    p = HOME_M + pos
    R = rotation_from_xyz_angles(ang)
    twist = np.concatenate([vel, angular_velocity_from_xyz_rates(ang, rate)], axis=1)
    accel = np.concatenate([acc, angular_acceleration_from_xyz_rates(ang, rate, ang_acc)], axis=1)
    theta = random_payload(rng).standard_parameters()
    F = model.inverse_dynamics_from_platform(p, R, twist, accel, theta)
    _, qd, _ = model.actuator_motion(p, R, twist, accel)
    power = np.einsum("ni,ni->n", F, qd)
    work = simpson(power, x=t[:, 0])
    energy = model.kinetic_energy_from_platform(p, R, twist, theta) + model.potential_energy_from_platform(p, R, theta)
    scale = simpson(np.abs(power), x=t[:, 0])
    assert_allclose(work, energy[-1] - energy[0], rtol=0, atol=1e-9 * scale)


# ---------------------------------------------------------------------------------------- batches and errors


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500])  # 3 and 6 catch shape confusion
def test_batch_matches_loop(model: HexapodModel, rng: np.random.Generator, n_samples: int) -> None:
    p, R, twist, accel = random_motion(rng, n_samples)
    theta = random_payload(rng).standard_parameters()
    q, qd, qdd = model.actuator_motion(p, R, twist, accel)
    tau = model.inverse_dynamics(q, qd, qdd, theta)
    M = model.mass_matrix(q, theta)
    m_dot = model.mass_matrix_rate(q, qd, theta)
    p_fk, _ = model.forward_kinematics(q)
    assert tau.shape == (n_samples, 6) and M.shape == (n_samples, 6, 6) and p_fk.shape == (n_samples, 3)
    for i in range(n_samples):
        s = slice(i, i + 1)
        assert_allclose(tau[s], model.inverse_dynamics(q[s], qd[s], qdd[s], theta), rtol=1e-12, atol=1e-10)
    for i in range(0, n_samples, max(1, n_samples // 20)):  # the matrices on every 25th sample keep the test fast
        s = slice(i, i + 1)
        assert_allclose(M[s], model.mass_matrix(q[s], theta), rtol=1e-12, atol=1e-10)
        assert_allclose(m_dot[s], model.mass_matrix_rate(q[s], qd[s], theta), rtol=1e-12, atol=1e-10)
        assert_allclose(p_fk[s], model.forward_kinematics(q[s])[0], rtol=0, atol=1e-14)


def test_mechanism_sizes(model: HexapodModel) -> None:
    assert (model.n_actuators, model.n_payload_parameters, model.platform_dof()) == (6, 10, 6)
    # J_eq = J_m (2 pi n / h)^2, ideal ball screw (common practice, no source)
    assert_allclose(model.reflected_inertia_kg[0], 5e-5 * (2 * np.pi / 0.005) ** 2, rtol=1e-15)


def test_rejects_wrong_shapes_and_values(model: HexapodModel) -> None:
    q = model.inverse_kinematics(HOME_M[None, :], np.eye(3)[None])
    with pytest.raises(ShapeError, match=r"q: expected shape \(N, 6\), got \(6,\)"):
        model.inverse_dynamics(q[0], q, q, np.zeros(10))
    with pytest.raises(ShapeError, match=r"qd: expected shape \(1, 6\), got \(2, 6\)"):
        model.inverse_dynamics(q, np.zeros((2, 6)), q, np.zeros(10))
    with pytest.raises(ShapeError, match=r"theta_p: expected shape \(10,\)"):
        model.inverse_dynamics(q, q, q, np.zeros(3))
    with pytest.raises(ShapeError, match=r"R: expected shape \(1, 3, 3\), got \(3, 3\)"):
        model.inverse_kinematics(HOME_M[None, :], np.eye(3))
    with pytest.raises(NonFiniteError, match="qdd: non-finite value"):
        model.inverse_dynamics(q, q * 0, q * np.nan, np.zeros(10))


def test_unreachable_and_singular_messages(model: HexapodModel) -> None:
    q = model.inverse_kinematics(np.tile(HOME_M, (3, 1)), np.tile(np.eye(3), (3, 1, 1)))
    q[2, 4] = 0.29
    with pytest.raises(UnreachablePoseError, match=r"sample 2, leg 4: length 0.29 m is 0.01 m below the shortest"):
        model.check_reachable(q)
    with pytest.raises(UnreachablePoseError, match=r"sample 0, leg 0: .* above the longest leg length 0.5 m"):
        model.check_pose(np.array([[0.0, 0.0, 0.6]]), np.eye(3)[None])
    # lengths inside the limits that no platform pose can take (two legs of one pair far apart)
    bad = q[:1].copy()
    bad[0, :2] = [0.31, 0.49]
    bad[0, 2:] = 0.31
    with pytest.raises(UnreachablePoseError, match="cannot be closed"):
        model.check_reachable(bad)
    with pytest.raises(ConvergenceError, match="sample 0: forward kinematics did not converge in 1 iterations"):
        model.forward_kinematics(q[:1] + 0.02, max_iterations=1)
    # all platform joints in one point: rows [u_j, 0] of J_inv have rank 3, a true singularity
    degenerate = HexapodModel(hexapod_params(platform_joints_m=np.zeros((6, 3))))
    pose = (HOME_M[None, :], np.eye(3)[None])
    assert degenerate.jacobian_condition(*pose)[0] > 1e12
    with pytest.raises(SingularPoseError, match="sample 0: inverse Jacobian condition number"):
        degenerate.inverse_dynamics_from_platform(*pose, np.zeros((1, 6)), np.zeros((1, 6)), np.zeros(10))
    strict = HexapodModel(model.params, max_condition=1.0)
    with pytest.raises(SingularPoseError, match="sample 0: inverse Jacobian condition number .* max_condition"):
        strict.mass_matrix(q[:1], np.zeros(10))


def test_momentum_terms_equal_the_separate_methods(model: HexapodModel, rng: np.random.Generator) -> None:
    # one forward kinematics must give what mass_matrix, bias_efforts and mass_matrix_rate give one by one
    p, R = random_poses(rng, 25)
    q = model.inverse_kinematics(p, R)
    qd = rng.normal(size=(25, 6)) * 0.05
    theta = random_payload(rng).standard_parameters()
    M, beta = model.momentum_terms(q, qd, theta)
    Md = model.mass_matrix_rate(q, qd, theta)
    expected = model.bias_efforts(q, qd, theta) - np.einsum("nij,nj->ni", Md, qd)
    assert_allclose(M, model.mass_matrix(q, theta), rtol=1e-12, atol=1e-12 * np.abs(M).max())
    assert_allclose(beta, expected, rtol=1e-10, atol=1e-10 * np.abs(expected).max())
    with pytest.raises(ShapeError, match="theta_p"):
        model.momentum_terms(q, qd, theta[:4])
