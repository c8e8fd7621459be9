"""Delta kinematics and rigid-body dynamics: identities, physical laws, a case worked by hand, batching, errors."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import simpson

from shadow.errors import DescriptionError, ShapeError, SingularPoseError, UnreachablePoseError
from shadow.robots.delta import DeltaModel
from shadow.robots.parameters import STANDARD_GRAVITY_M_S2, DeltaParameters, Drive

PAYLOAD = np.array([0.8])  # kg


def _drive(rotor_inertia_kg_m2: float) -> Drive:
    return Drive(
        rotor_inertia_kg_m2=rotor_inertia_kg_m2,
        gear_ratio=30.0,
        efficiency=0.92,
        torque_constant_nm_per_a=0.6,
        current_loop_bandwidth_hz=1200.0,
        rated_effort=55.0,
    )


@pytest.fixture
def delta_params() -> DeltaParameters:
    """An invented but plausible picker; the third motor has a heavier rotor (replacement part)."""
    return DeltaParameters(
        base_radius_m=0.2,
        platform_radius_m=0.05,
        upper_arm_length_m=0.35,
        forearm_length_m=0.8,
        first_leg_azimuth_rad=-np.pi / 2.0,
        upper_arm_mass_kg=1.2,
        upper_arm_com_m=0.15,
        upper_arm_inertia_kg_m2=0.045,
        forearm_mass_kg=0.4,
        platform_mass_kg=0.5,
        drives=(_drive(1.2e-4), _drive(1.2e-4), _drive(1.6e-4)),
        joint_lower_rad=np.full(3, -1.0),
        joint_upper_rad=np.full(3, 1.6),
    )


@pytest.fixture
def model(delta_params: DeltaParameters) -> DeltaModel:
    return DeltaModel(delta_params)


def random_positions(rng: np.random.Generator, n: int) -> np.ndarray:
    """Platform positions in a cylinder well inside the workspace (radius 0.25 m, z in [-0.95, -0.6] m)."""
    radius = 0.25 * np.sqrt(rng.uniform(0.0, 1.0, n))
    azimuth = rng.uniform(0.0, 2.0 * np.pi, n)
    return np.column_stack([radius * np.cos(azimuth), radius * np.sin(azimuth), rng.uniform(-0.95, -0.6, n)])


def random_states(model: DeltaModel, rng: np.random.Generator, n: int) -> tuple[np.ndarray, ...]:
    """(q, qd, qdd) with q from reachable platform positions."""
    q = model.inverse_kinematics(random_positions(rng, n))
    return q, rng.normal(0.0, 3.0, (n, 3)), rng.normal(0.0, 50.0, (n, 3))


def mv(M: np.ndarray, v: np.ndarray) -> np.ndarray:
    return np.einsum("nij,nj->ni", M, v)


# ---------------------------------------------------------------------- kinematics


def test_ik_fk_round_trip(model: DeltaModel, rng: np.random.Generator) -> None:
    # identity: FK inverts IK on the elbow-out branch
    x = random_positions(rng, 400)
    q = model.inverse_kinematics(x)
    model.check_reachable(q)
    assert_allclose(model.forward_kinematics(q), x, rtol=0, atol=1e-10)
    assert_allclose(model.inverse_kinematics(model.forward_kinematics(q)), q, rtol=0, atol=1e-10)
    # closure |P_i - E_i| = L_f (definition of the mechanism)
    p = model.params
    P = x[:, None, :] + p.platform_radius_m * model.radial_directions[None]
    assert_allclose(np.linalg.norm(P - model.elbows(q), axis=2), p.forearm_length_m, rtol=1e-12)


def test_elbow_out_branch(model: DeltaModel) -> None:
    # centre of the workspace: the elbows lie farther from the z axis than the actuator axes
    q = model.inverse_kinematics(np.array([[0.0, 0.0, -0.75]]))
    radial = np.einsum("nik,ik->ni", model.elbows(q), model.radial_directions)
    assert np.all(radial > model.params.base_radius_m)


def test_jacobian_matches_central_differences_of_fk(model: DeltaModel, rng: np.random.Generator) -> None:
    q = random_states(model, rng, 50)[0]
    step = 1e-6
    J = model.platform_jacobian(q)
    for k in range(3):
        dq = np.zeros(3)
        dq[k] = step
        column = (model.forward_kinematics(q + dq) - model.forward_kinematics(q - dq)) / (2 * step)
        assert_allclose(J[:, :, k], column, rtol=0, atol=1e-8)  # definition of J; central differences, O(step^2)


def test_jacobian_condition(model: DeltaModel, rng: np.random.Generator) -> None:
    q = random_states(model, rng, 20)[0]
    kappa = model.jacobian_condition(q)
    assert_allclose(kappa, np.linalg.cond(model.platform_jacobian(q)), rtol=1e-10)
    assert np.all(kappa >= 1.0)


def test_singular_pose_threshold(model: DeltaModel) -> None:
    q = model.inverse_kinematics(np.array([[0.1, 0.0, -0.7]]))
    with pytest.raises(SingularPoseError, match="max_condition"):
        model.platform_jacobian(q, max_condition=1.0)
    with pytest.raises(SingularPoseError, match=r"> max_condition 1\.01"):
        model.inverse_dynamics_from_platform(
            np.array([[0.1, 0.0, -0.7]]), np.zeros((1, 3)), np.zeros((1, 3)), PAYLOAD, max_condition=1.01
        )


# ---------------------------------------------------------------------- dynamics identities


def test_mass_matrix_symmetric_positive_definite(model: DeltaModel, rng: np.random.Generator) -> None:
    # physical law: kinetic energy 1/2 qd^T M qd > 0 for every qd != 0
    q = random_states(model, rng, 200)[0]
    M = model.mass_matrix(q, PAYLOAD)
    assert_allclose(M, np.swapaxes(M, 1, 2), rtol=0, atol=1e-14)
    assert np.all(np.linalg.eigvalsh(M) > 0.0)


def test_mass_matrix_rate_matches_central_differences(model: DeltaModel, rng: np.random.Generator) -> None:
    # definition of the total derivative dM/dt = sum_k dM/dq_k qd_k; central differences along qd
    q, qd, _ = random_states(model, rng, 50)
    step = 1e-6
    fd = (model.mass_matrix(q + step * qd, PAYLOAD) - model.mass_matrix(q - step * qd, PAYLOAD)) / (2 * step)
    assert_allclose(model.mass_matrix_rate(q, qd, PAYLOAD), fd, rtol=0, atol=1e-7)


def test_inverse_dynamics_is_mass_matrix_plus_bias(model: DeltaModel, rng: np.random.Generator) -> None:
    # identity of Lagrange's equations tau = M qdd + h; ID comes from point accelerations, M and h are assembled
    q, qd, qdd = random_states(model, rng, 100)
    tau = model.inverse_dynamics(q, qd, qdd, PAYLOAD)
    expected = mv(model.mass_matrix(q, PAYLOAD), qdd) + model.bias_efforts(q, qd, PAYLOAD)
    assert_allclose(tau, expected, rtol=1e-12, atol=1e-10)


def test_velocity_terms_are_quadratic(model: DeltaModel, rng: np.random.Generator) -> None:
    # ID(q, s qd, 0) - ID(q, 0, 0) = s^2 (ID(q, qd, 0) - ID(q, 0, 0)): Coriolis/centrifugal C(q, qd) qd
    q, qd, _ = random_states(model, rng, 100)
    zero = np.zeros_like(q)
    gravity = model.inverse_dynamics(q, zero, zero, PAYLOAD)
    base = model.inverse_dynamics(q, qd, zero, PAYLOAD) - gravity
    for s in (2.0, -0.5):
        scaled = model.inverse_dynamics(q, s * qd, zero, PAYLOAD) - gravity
        assert_allclose(scaled, s**2 * base, rtol=1e-10, atol=1e-10)


def test_momentum_identity(model: DeltaModel, rng: np.random.Generator) -> None:
    # qd^T (dM/dt - 2 C) qd = 0, C qd = h(q, qd) - h(q, 0): energy conservation of the velocity terms
    # (skew-symmetry property; Siciliano et al., Robotics: Modelling, Planning and Control, 2009, ch. 7)
    q, qd, _ = random_states(model, rng, 100)
    zero = np.zeros_like(q)
    coriolis = model.bias_efforts(q, qd, PAYLOAD) - model.bias_efforts(q, zero, PAYLOAD)
    power = np.einsum("ni,ni->n", qd, mv(model.mass_matrix_rate(q, qd, PAYLOAD), qd) - 2.0 * coriolis)
    assert_allclose(power, 0.0, atol=1e-10)


def test_payload_regressor(model: DeltaModel, rng: np.random.Generator) -> None:
    # linearity of the dynamics in the inertial parameters (here the payload mass): tau = tau_known + Y_p theta_p
    q, qd, qdd = random_states(model, rng, 100)
    tau_known, Y = model.rigid_regressor(q, qd, qdd)
    assert Y.shape == (100, 3, 1)
    for mass in (0.0, 0.8, 3.5):
        theta = np.array([mass])
        assert_allclose(tau_known + Y @ theta, model.inverse_dynamics(q, qd, qdd, theta), rtol=1e-12, atol=1e-10)


def test_static_efforts_are_gradient_of_potential(model: DeltaModel, rng: np.random.Generator) -> None:
    # principle of virtual work: at rest tau = dV/dq
    q = random_states(model, rng, 30)[0]
    step = 1e-6
    zero = np.zeros_like(q)
    tau = model.inverse_dynamics(q, zero, zero, PAYLOAD)
    for k in range(3):
        dq = np.zeros(3)
        dq[k] = step
        grad = (model.potential_energy(q + dq, PAYLOAD) - model.potential_energy(q - dq, PAYLOAD)) / (2 * step)
        assert_allclose(tau[:, k], grad, rtol=0, atol=1e-6)


def test_external_force_virtual_work(model: DeltaModel, rng: np.random.Generator) -> None:
    # principle of virtual work: a force f on the platform loads the actuators with tau_ext = J^T f,
    # i.e. the derivative of the work f . x(q); here f is the weight of an added mass
    q = random_states(model, rng, 30)[0]
    f = rng.normal(0.0, 20.0, (30, 3))
    step = 1e-6
    tau_ext = np.einsum("nki,nk->ni", model.platform_jacobian(q), f)
    for k in range(3):
        dq = np.zeros(3)
        dq[k] = step
        work = np.einsum("nk,nk->n", f, model.forward_kinematics(q + dq) - model.forward_kinematics(q - dq))
        assert_allclose(tau_ext[:, k], work / (2 * step), rtol=0, atol=1e-6)
    zero = np.zeros_like(q)
    extra_kg = 1.2  # its weight extra_kg g acts on the platform; the drives must supply -J^T (extra_kg g)
    heavier = np.array([PAYLOAD[0] + extra_kg])
    added = model.inverse_dynamics(q, zero, zero, heavier) - model.inverse_dynamics(q, zero, zero, PAYLOAD)
    weight = extra_kg * model.params.gravity_m_s2
    assert_allclose(added, -np.einsum("nki,k->ni", model.platform_jacobian(q), weight), rtol=1e-12, atol=1e-12)


# ---------------------------------------------------------------------- physical law and hand case


def test_energy_balance_along_trajectory(delta_params: DeltaParameters) -> None:
    # work-energy theorem: integral of tau . qd dt = change of T + V (conservative rigid system)
    for forearm in ("rod", "lumped"):
        model = DeltaModel(delta_params, forearm_model=forearm)
        t = np.linspace(0.0, 1.5, 15001)[:, None]
        amp = np.array([[0.25, 0.2, 0.15], [0.08, 0.1, 0.12]])
        omega = np.array([[5.0, 6.5, 8.0], [13.0, 11.0, 17.0]])
        phase = np.array([[0.1, 1.2, 2.3], [0.5, 0.9, 0.2]])
        q = 0.45 + sum(amp[k] * np.sin(omega[k] * t + phase[k]) for k in range(2))
        qd = sum(amp[k] * omega[k] * np.cos(omega[k] * t + phase[k]) for k in range(2))
        qdd = sum(-amp[k] * omega[k] ** 2 * np.sin(omega[k] * t + phase[k]) for k in range(2))
        model.check_reachable(q)
        power = np.einsum("ni,ni->n", model.inverse_dynamics(q, qd, qdd, PAYLOAD), qd)
        work = simpson(power, x=t[:, 0])  # composite Simpson's rule
        energy = model.kinetic_energy(q, qd, PAYLOAD) + model.potential_energy(q, PAYLOAD)
        scale = simpson(np.abs(power), x=t[:, 0])
        assert abs(work - (energy[-1] - energy[0])) < 1e-11 * scale
        # and pointwise: d(T + V)/dt = tau . qd (central differences of the energy on the fine grid)
        dE = np.gradient(energy, t[:, 0])
        assert_allclose(dE[2:-2], power[2:-2], rtol=0, atol=1e-4 * np.abs(power).max())


def test_static_centre_case_worked_by_hand(delta_params: DeltaParameters) -> None:
    # Hand derivation (principle of virtual work), platform on the axis, all theta_i = theta:
    #   delta = R_b + L_a cos(theta) - R_p        radial gap from platform point to elbow
    #   h     = -sqrt(L_f^2 - delta^2)           height of P_i above E_i (negative), d_i = -delta r_i + h z
    #   z0    = h - L_a sin(theta)                platform height
    #   b     = d_i . dE_i/dtheta = L_a (delta sin(theta) - h cos(theta)); equal rates give zd = (b / h) thetad,
    #           so by symmetry dz/dtheta_i = b / (3 h)
    #   tau_i = dV/dtheta_i = -g (m_a c_a + m_f L_a / 2) cos(theta) + g (m_p + m + 3 m_f / 2) b / (3 h)
    p = delta_params
    model = DeltaModel(p)
    theta, m = 0.35, 1.7
    g = STANDARD_GRAVITY_M_S2
    delta = p.base_radius_m + p.upper_arm_length_m * np.cos(theta) - p.platform_radius_m
    h = -np.sqrt(p.forearm_length_m**2 - delta**2)
    z0 = h - p.upper_arm_length_m * np.sin(theta)
    b = p.upper_arm_length_m * (delta * np.sin(theta) - h * np.cos(theta))
    tau_hand = -g * (p.upper_arm_mass_kg * p.upper_arm_com_m + p.forearm_mass_kg * p.upper_arm_length_m / 2) * np.cos(
        theta
    ) + g * (p.platform_mass_kg + m + 1.5 * p.forearm_mass_kg) * b / (3 * h)
    q = model.inverse_kinematics(np.array([[0.0, 0.0, z0]]))
    assert_allclose(q, theta, rtol=0, atol=1e-12)
    tau = model.inverse_dynamics(q, np.zeros((1, 3)), np.zeros((1, 3)), np.array([m]))
    assert_allclose(tau, tau_hand, rtol=1e-9)


def test_lumped_forearm_differs_on_fast_motion(delta_params: DeltaParameters, rng: np.random.Generator) -> None:
    # the lumped simplification drops the rods' rotational inertia: visible at pick-and-place speeds
    rod, lumped = DeltaModel(delta_params), DeltaModel(delta_params, forearm_model="lumped")
    q = rod.inverse_kinematics(random_positions(rng, 200))
    qd, qdd = rng.normal(0.0, 6.0, (200, 3)), rng.normal(0.0, 300.0, (200, 3))
    tau_rod = rod.inverse_dynamics(q, qd, qdd, PAYLOAD)
    rel = np.linalg.norm(lumped.inverse_dynamics(q, qd, qdd, PAYLOAD) - tau_rod) / np.linalg.norm(tau_rod)
    assert rel > 1e-4
    zero = np.zeros_like(q)  # at rest the two agree: the same centres of mass
    assert_allclose(
        lumped.inverse_dynamics(q, zero, zero, PAYLOAD), rod.inverse_dynamics(q, zero, zero, PAYLOAD), rtol=1e-12
    )


def test_inverse_dynamics_from_platform(model: DeltaModel) -> None:
    # a smooth platform path with exact derivatives; qd, qdd checked against central differences of IK
    t = np.linspace(0.0, 1.0, 2001)[:, None]
    w = np.array([4.0, 5.0, 7.0])
    x = np.array([0.05, -0.03, -0.75]) + np.array([0.15, 0.12, 0.1]) * np.sin(w * t)
    xd = np.array([0.15, 0.12, 0.1]) * w * np.cos(w * t)
    xdd = -np.array([0.15, 0.12, 0.1]) * w**2 * np.sin(w * t)
    q, qd, qdd, tau = model.inverse_dynamics_from_platform(x, xd, xdd, PAYLOAD)
    dt = float(t[1, 0] - t[0, 0])
    assert_allclose(qd[1:-1], (q[2:] - q[:-2]) / (2 * dt), rtol=0, atol=1e-5)
    assert_allclose(qdd[1:-1], (q[2:] - 2 * q[1:-1] + q[:-2]) / dt**2, rtol=0, atol=1e-3)
    assert_allclose(mv(model.platform_jacobian(q), qd), xd, rtol=0, atol=1e-12)
    assert_allclose(tau, model.inverse_dynamics(q, qd, qdd, PAYLOAD), rtol=1e-12, atol=1e-10)


# ---------------------------------------------------------------------- batching, shapes, errors


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500])
def test_batch_matches_loop(model: DeltaModel, rng: np.random.Generator, n_samples: int) -> None:
    q, qd, qdd = random_states(model, rng, n_samples)
    batch = {
        "tau": model.inverse_dynamics(q, qd, qdd, PAYLOAD),
        "M": model.mass_matrix(q, PAYLOAD),
        "h": model.bias_efforts(q, qd, PAYLOAD),
        "Md": model.mass_matrix_rate(q, qd, PAYLOAD),
        "J": model.platform_jacobian(q),
        "x": model.forward_kinematics(q),
        "T": model.kinetic_energy(q, qd, PAYLOAD),
        "V": model.potential_energy(q, PAYLOAD),
        "Y": model.rigid_regressor(q, qd, qdd)[1],
    }
    for k in range(n_samples):
        s = slice(k, k + 1)
        single = {
            "tau": model.inverse_dynamics(q[s], qd[s], qdd[s], PAYLOAD),
            "M": model.mass_matrix(q[s], PAYLOAD),
            "h": model.bias_efforts(q[s], qd[s], PAYLOAD),
            "Md": model.mass_matrix_rate(q[s], qd[s], PAYLOAD),
            "J": model.platform_jacobian(q[s]),
            "x": model.forward_kinematics(q[s]),
            "T": model.kinetic_energy(q[s], qd[s], PAYLOAD),
            "V": model.potential_energy(q[s], PAYLOAD),
            "Y": model.rigid_regressor(q[s], qd[s], qdd[s])[1],
        }
        for name, value in single.items():
            assert value.shape[0] == 1
            assert_allclose(batch[name][s], value, rtol=1e-13, atol=1e-13, err_msg=name)


def test_shape_errors(model: DeltaModel) -> None:
    q = model.inverse_kinematics(np.array([[0.0, 0.0, -0.7]]))
    with pytest.raises(ShapeError, match=r"q: expected shape \(N, 3\)"):
        model.mass_matrix(q[0], PAYLOAD)
    with pytest.raises(ShapeError, match=r"qd: expected shape \(N, 3\)"):
        model.inverse_dynamics(q, np.zeros((1, 2)), np.zeros((1, 3)), PAYLOAD)
    with pytest.raises(ShapeError, match=r"theta_p: expected shape \(1,\)"):
        model.inverse_dynamics(q, np.zeros((1, 3)), np.zeros((1, 3)), np.array([1.0, 2.0]))
    with pytest.raises(ShapeError, match="sample counts differ"):
        model.bias_efforts(q, np.zeros((2, 3)), PAYLOAD)
    with pytest.raises(ShapeError, match=r"x: expected shape"):
        model.inverse_kinematics(np.zeros(3))


def test_unreachable_pose_messages(model: DeltaModel) -> None:
    x = np.array([[0.0, 0.0, -0.7], [0.0, 0.0, -1.5]])  # the second is far below the reach
    with pytest.raises(UnreachablePoseError, match=r"x\[1\]: leg 0 .* misses it by 0\.\d+ m"):
        model.inverse_kinematics(x)
    # hand geometry: forearms shortened to 0.3 m, arms horizontal: the sphere centres E_i - R_p r_i lie on a
    # horizontal circle of radius R_b + L_a - R_p = 0.5 m, whose centre is the nearest common point: miss 0.2 m
    short = DeltaModel(dataclasses.replace(model.params, forearm_length_m=0.3))
    with pytest.raises(UnreachablePoseError, match=r"q\[1\]: the forearms cannot close.* miss by 0\.2 m"):
        short.forward_kinematics(np.array([[1.2, 1.2, 1.2], [0.0, 0.0, 0.0]]))
    with pytest.raises(UnreachablePoseError, match=r"q\[1\]: actuator 2 at 1\.7 rad is outside its limits"):
        model.check_reachable(np.array([[0.4, 0.4, 0.4], [0.4, 0.4, 1.7]]))


def test_miss_distance_is_metres(model: DeltaModel) -> None:
    # hand geometry: straight below the base centre, the platform point is rho = sqrt(gap^2 + z^2) from each
    # actuator axis; the elbow circle brings the forearm no nearer than rho - L_a, so it misses by rho - L_a - L_f
    p = model.params
    gap = p.base_radius_m - p.platform_radius_m
    z = -1.3
    miss = np.hypot(gap, z) - p.upper_arm_length_m - p.forearm_length_m
    with pytest.raises(UnreachablePoseError, match=rf"misses it by {miss:.6g} m"):
        model.inverse_kinematics(np.array([[0.0, 0.0, z]]))


def test_rejects_unknown_forearm_model(delta_params: DeltaParameters) -> None:
    with pytest.raises(DescriptionError, match="forearm_model"):
        DeltaModel(delta_params, forearm_model="beam")  # type: ignore[arg-type]


def test_momentum_terms_equal_the_separate_methods_at_each_samples_payload(
    model: DeltaModel, rng: np.random.Generator
) -> None:
    # one pass of the kinematics must give what mass_matrix, bias_efforts and mass_matrix_rate give one by one
    q = rng.uniform(-0.3, 0.6, size=(40, 3))
    qd = rng.normal(scale=2.0, size=(40, 3))
    mass = rng.uniform(0.0, 1.5, size=40)
    M, beta = model.momentum_terms(q, qd, mass)
    for k in range(0, 40, 7):
        th = mass[k : k + 1]
        Md = model.mass_matrix_rate(q[k : k + 1], qd[k : k + 1], th)[0]
        assert_allclose(M[k], model.mass_matrix(q[k : k + 1], th)[0], rtol=1e-13, atol=1e-13)
        expected = model.bias_efforts(q[k : k + 1], qd[k : k + 1], th)[0] - Md @ qd[k]
        assert_allclose(beta[k], expected, rtol=1e-12, atol=1e-12)
    with pytest.raises(ShapeError, match="payload_mass_kg"):
        model.momentum_terms(q, qd, mass[:5])
