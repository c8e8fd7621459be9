"""The plant against physical laws: energy conservation, inverse dynamics, virtual work, two-mass mode, heating.

The small mechanism used here is the planar two-link arm with a point payload at the tip, whose mass matrix,
Coriolis and gravity terms are textbook closed forms (Spong, Hutchinson, Vidyasagar, *Robot Modeling and
Control*, 2006, Sec. 7.4.2, eqs. for the two-link planar elbow manipulator; the point payload is the same
form with link length l2, no own inertia).
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.errors import ConfigurationError, ShapeError
from simulators.effects import CompliantCoupling, DriveThermal, StribeckFriction, coupling_for_mode
from simulators.integrators import Method
from simulators.plant import HalfSinePulse, MassUpdate, Plant, PlantConfig, mass_terms, rigid_terms

G = 9.80665


class TwoLinkArm:
    """Planar 2R arm in a vertical plane (gravity along -y); theta_p = [tip payload mass]; q from horizontal."""

    n_actuators = 2
    n_payload_parameters = 1

    def __init__(self, rotor_inertia: float = 0.0, gravity: float = G) -> None:
        self.g = gravity
        self.m1, self.m2, self.l1, self.l2, self.lc1, self.lc2 = 2.0, 1.5, 0.5, 0.4, 0.25, 0.2
        self.i1, self.i2 = 0.05, 0.03
        self.jr = rotor_inertia  # reflected rotor inertia on each joint, part of M

    def platform_dof(self) -> int:
        return 2

    def _terms(self, q, qd, mp):
        c2, s2 = np.cos(q[:, 1]), np.sin(q[:, 1])
        c1, c12 = np.cos(q[:, 0]), np.cos(q[:, 0] + q[:, 1])
        a = self.m1 * self.lc1**2 + self.m2 * (self.l1**2 + self.lc2**2) + self.i1 + self.i2
        a += mp * (self.l1**2 + self.l2**2)
        b = self.m2 * self.l1 * self.lc2 + mp * self.l1 * self.l2
        d = self.m2 * self.lc2**2 + self.i2 + mp * self.l2**2
        m = np.empty((q.shape[0], 2, 2))
        m[:, 0, 0] = a + 2 * b * c2 + self.jr  # d11
        m[:, 0, 1] = m[:, 1, 0] = d + b * c2  # d12
        m[:, 1, 1] = d + self.jr  # d22
        hh = -b * s2  # Spong's h = -m2 l1 lc2 sin q2 (with the payload term)
        cor = np.stack([hh * qd[:, 1] ** 2 + 2 * hh * qd[:, 0] * qd[:, 1], -hh * qd[:, 0] ** 2], axis=1)
        g1 = (self.m1 * self.lc1 + (self.m2 + mp) * self.l1) * self.g * c1 + (
            self.m2 * self.lc2 + mp * self.l2
        ) * self.g * c12
        g2 = (self.m2 * self.lc2 + mp * self.l2) * self.g * c12
        return m, cor + np.stack([g1, g2], axis=1)

    def mass_matrix(self, q, theta_p):
        return self._terms(q, np.zeros_like(q), float(theta_p[0]))[0]

    def bias_efforts(self, q, qd, theta_p):
        return self._terms(q, qd, float(theta_p[0]))[1]

    def inverse_dynamics(self, q, qd, qdd, theta_p):
        m, h = self._terms(q, qd, float(theta_p[0]))
        return np.einsum("nij,nj->ni", m, qdd) + h

    def rigid_regressor(self, q, qd, qdd):
        tau0 = self.inverse_dynamics(q, qd, qdd, np.zeros(1))
        y = self.inverse_dynamics(q, qd, qdd, np.ones(1)) - tau0  # linear in the payload mass
        return tau0, y[:, :, None]

    def mass_matrix_rate(self, q, qd, theta_p):
        b = self.m2 * self.l1 * self.lc2 + float(theta_p[0]) * self.l1 * self.l2
        s2 = -b * np.sin(q[:, 1]) * qd[:, 1]
        out = np.zeros((q.shape[0], 2, 2))
        out[:, 0, 0], out[:, 0, 1], out[:, 1, 0] = 2 * s2, s2, s2
        return out

    def platform_jacobian(self, q):
        s1, c1 = np.sin(q[:, 0]), np.cos(q[:, 0])
        s12, c12 = np.sin(q[:, 0] + q[:, 1]), np.cos(q[:, 0] + q[:, 1])
        jac = np.empty((q.shape[0], 2, 2))
        jac[:, 0, 0] = -self.l1 * s1 - self.l2 * s12
        jac[:, 0, 1] = -self.l2 * s12
        jac[:, 1, 0] = self.l1 * c1 + self.l2 * c12
        jac[:, 1, 1] = self.l2 * c12
        return jac

    def check_reachable(self, q):
        return None

    def kinetic_energy(self, q, qd, theta_p):
        m = self.mass_matrix(q, theta_p)
        return 0.5 * np.einsum("ni,nij,nj->n", qd, m, qd)

    def potential_energy(self, q, theta_p):
        mp = float(theta_p[0])
        y1 = np.sin(q[:, 0])
        y12 = np.sin(q[:, 0] + q[:, 1])
        return self.g * (
            (self.m1 * self.lc1 + (self.m2 + mp) * self.l1) * y1 + (self.m2 * self.lc2 + mp * self.l2) * y12
        )


def rigid_config(n: int = 2, **kw) -> PlantConfig:
    return PlantConfig(rotor_inertia=np.zeros(n), current_time_constant_s=np.zeros(n), **kw)


def free_swing(plant: Plant, q0: np.ndarray, theta: np.ndarray, n_samples: int, substeps: int):
    state = plant.initial_state(q0, theta, temperature_c=40.0)
    state = type(state)(state.t_s, state.position, state.velocity, np.zeros_like(state.effort), state.temperature_c)
    states = [state]
    for _ in range(n_samples):
        state = plant.advance(state, np.zeros_like(state.effort), theta, n_steps=substeps)
        states.append(state)
    return states


@pytest.mark.parametrize("method, tol", [(Method.RK4, 1e-7), (Method.HEUN, 1e-3), (Method.SYMPLECTIC, 1e-2)])
def test_energy_is_conserved_without_effort(rng, method, tol):
    # physical law: with tau = 0 and no friction the rigid plant keeps T + V constant
    arm = TwoLinkArm()
    plant = Plant(arm, rigid_config(), internal_step_s=2.5e-4, method=method)
    q0 = rng.uniform(-1.0, 1.0, size=(4, 2))
    theta = np.full((4, 1), 0.7)
    states = free_swing(plant, q0, theta, n_samples=250, substeps=4)  # 0.25 s of swinging
    energy = np.array(
        [arm.kinetic_energy(s.position, s.velocity, [0.7]) + arm.potential_energy(s.position, [0.7]) for s in states]
    )
    swing = np.ptp(np.array([arm.kinetic_energy(s.position, s.velocity, [0.7]) for s in states]), axis=0)
    assert swing.min() > 1.0  # the arm really swings (joules of kinetic energy exchanged)
    assert_allclose(energy, np.broadcast_to(energy[0], energy.shape), rtol=0, atol=tol * swing.max())


def test_rigid_terms_match_model(rng):
    arm = TwoLinkArm(rotor_inertia=0.02)
    q, qd = rng.normal(size=(6, 2)), rng.normal(size=(6, 2))
    theta = rng.uniform(0, 2, size=(6, 1))
    m, h = rigid_terms(arm, q, qd, theta)
    for i in range(6):
        assert_allclose(m[i], arm.mass_matrix(q[i : i + 1], theta[i])[0], rtol=1e-13, atol=1e-13)
        assert_allclose(h[i], arm.bias_efforts(q[i : i + 1], qd[i : i + 1], theta[i])[0], rtol=1e-13, atol=1e-12)


def test_mass_matrix_routes_agree(rng):
    arm = TwoLinkArm(rotor_inertia=0.02)
    q, theta = rng.normal(size=(6, 2)), rng.uniform(0, 2, size=(6, 1))
    assert_allclose(
        mass_terms(arm, q, theta, route="affine"), mass_terms(arm, q, theta, route="regressor"), rtol=1e-13, atol=1e-13
    )
    with pytest.raises(ConfigurationError, match="route"):
        mass_terms(arm, q, theta, route="guess")


def test_held_mass_matrix_converges_at_second_order(rng):
    # MassUpdate.EVERY_STEP against the exact-order RK4 after 0.2 s of free swinging: the gap is O(h^2),
    # so halving the step divides it by about 4 (order of a consistent one-step method, Hairer-Norsett-Wanner 1993)
    arm = TwoLinkArm()
    q0 = rng.uniform(-1.0, 1.0, size=(3, 2))
    theta = np.full((3, 1), 0.5)
    gaps = []
    for step in (1e-3, 5e-4):
        ends = []
        for update in MassUpdate:
            plant = Plant(arm, rigid_config(), internal_step_s=step, mass_update=update)
            ends.append(free_swing(plant, q0, theta, n_samples=100, substeps=round(2e-3 / step))[-1].position)
        gaps.append(np.abs(ends[0] - ends[1]).max())
    assert 0 < gaps[1] < gaps[0]
    assert 3.0 < gaps[0] / gaps[1] < 5.5


def test_inverse_dynamics_reproduces_applied_effort(rng):
    # identity: the forward dynamics the plant integrates inverts the model's inverse dynamics
    arm = TwoLinkArm(rotor_inertia=0.02)
    plant = Plant(arm, rigid_config(), internal_step_s=1e-4)
    q, qd, tau = rng.normal(size=(5, 2)), rng.normal(size=(5, 2)), rng.normal(scale=5.0, size=(5, 2))
    theta = np.full((5, 1), 0.4)
    qdd = plant.acceleration(q, qd, tau, theta, np.full((5, 2), 40.0), None)
    assert_allclose(arm.inverse_dynamics(q, qd, qdd, [0.4]), tau, rtol=1e-12, atol=1e-12)


def test_simulated_motion_satisfies_inverse_dynamics(rng):
    # along an integrated motion under a time-varying effort, ID(q, qd, qdd) with qdd from central differences
    # of the simulated velocity reproduces the applied effort (finite-difference error O(h^2))
    arm = TwoLinkArm()
    step = 1e-4
    plant = Plant(arm, rigid_config(), internal_step_s=step)
    theta = np.full((2, 1), 0.3)
    state = plant.initial_state(np.array([[0.2, 0.5], [-0.4, 1.0]]), theta, temperature_c=40.0)
    taus, qs, qds = [], [state.position], [state.velocity]
    for k in range(300):
        tau = np.array([[8.0, 2.0], [-3.0, 4.0]]) * np.sin(2 * np.pi * 3 * k * step)
        tau = tau + rigid_terms(arm, state.position, 0 * state.velocity, theta)[1]  # plus the gravity load
        state = plant.advance(state, tau, theta, n_steps=1)
        taus.append(tau)
        qs.append(state.position)
        qds.append(state.velocity)
    qds_a = np.array(qds)
    # effort is piecewise constant over each step: use the mid-step acceleration of each step
    qdd_mid = (qds_a[1:] - qds_a[:-1]) / step
    q_mid = 0.5 * (np.array(qs)[1:] + np.array(qs)[:-1])
    qd_mid = 0.5 * (qds_a[1:] + qds_a[:-1])
    tau_id = arm.inverse_dynamics(q_mid.reshape(-1, 2), qd_mid.reshape(-1, 2), qdd_mid.reshape(-1, 2), [0.3])
    assert_allclose(tau_id, np.array(taus).reshape(-1, 2), rtol=0, atol=1e-4)


def test_impact_maps_through_jacobian_transpose(rng):
    # principle of virtual work: a tip force f gives joint efforts J^T f; at rest with gravity held,
    # the initial acceleration is M^-1 J^T f
    arm = TwoLinkArm()
    plant = Plant(arm, rigid_config(), internal_step_s=1e-4)
    q = rng.uniform(-1, 1, size=(3, 2))
    theta = np.zeros((3, 1))
    pulse = HalfSinePulse(
        start_s=np.zeros(3),
        duration_s=np.full(3, 0.01),
        peak=np.array([50.0, 0.0, 20.0]),
        direction=np.array([[1.0, 0.0], [0.0, 1.0], [0.6, 0.8]]),
    )
    w = pulse.wrench(0.005)
    assert_allclose(w[0], [50.0, 0.0], rtol=1e-12)  # sin(pi/2) = 1 at mid-pulse
    h = arm.bias_efforts(q, np.zeros_like(q), [0.0])
    qdd = plant.acceleration(q, np.zeros_like(q), h, theta, np.zeros((3, 2)), w)
    expected = np.linalg.solve(
        arm.mass_matrix(q, [0.0]), np.einsum("nki,nk->ni", arm.platform_jacobian(q), w)[..., None]
    )[..., 0]
    assert_allclose(qdd, expected, rtol=1e-12, atol=1e-12)
    assert pulse.wrench(0.02) is None


def test_two_mass_mode_frequencies(rng):
    # linear vibration theory: small oscillations about rest solve K phi = omega^2 M phi with the mass matrix
    # diag(M - J_r, J_r) and the coupling stiffness [[k, -k], [-k, k]] per joint (no gravity, so no other
    # stiffness); the coupling deflection rings at the two non-zero eigenfrequencies
    from scipy.linalg import eigh

    jr = 0.02
    arm = TwoLinkArm(rotor_inertia=jr, gravity=0.0)
    q0 = np.array([[0.3, 1.2]])
    m_load = arm.mass_matrix(q0, [0.0])[0] - jr * np.eye(2)
    coupling = coupling_for_mode(np.array([35.0, 50.0]), 0.0, np.full(2, jr), np.diag(m_load))
    k = np.diag(coupling.stiffness)
    mass = np.block([[m_load, np.zeros((2, 2))], [np.zeros((2, 2)), jr * np.eye(2)]])
    stiff = np.block([[k, -k], [-k, k]])
    omega2 = eigh(stiff, mass, eigvals_only=True)
    expected_hz = np.sqrt(np.clip(omega2[omega2 > 1.0], 0, None)) / (2 * np.pi)
    config = PlantConfig(rotor_inertia=np.full(2, jr), current_time_constant_s=np.zeros(2), coupling=coupling)
    plant = Plant(arm, config, internal_step_s=5e-4)  # omega h = 0.16: RK4 phase error ~1e-5
    theta = np.zeros((1, 1))
    state = plant.initial_state(q0, theta, temperature_c=40.0)
    kick = state.velocity.copy()
    kick[0, 2:] += [1e-3, 1e-3]  # kick both motors so that both modes ring
    state = type(state)(state.t_s, state.position, kick, state.effort, state.temperature_c)
    trace = []
    for _ in range(600):  # 0.6 s at 1 kHz
        state = plant.advance(state, state.effort, theta, n_steps=2)
        trace.append(state.position[0, 2:] - state.position[0, :2])
    signal = (np.array(trace) - np.mean(trace, axis=0)) * np.hanning(len(trace))[:, None]  # Hann against leakage
    spectrum = np.abs(np.fft.rfft(signal, n=32 * len(signal), axis=0)).sum(axis=1)  # zero-padded
    freqs = np.fft.rfftfreq(32 * len(signal), 1e-3)
    is_peak = (spectrum[1:-1] > spectrum[:-2]) & (spectrum[1:-1] > spectrum[2:])
    peak_idx = np.flatnonzero(is_peak) + 1
    two_largest = np.sort(freqs[peak_idx[np.argsort(spectrum[peak_idx])[-2:]]])
    assert len(expected_hz) == 2
    assert_allclose(two_largest, expected_hz, rtol=0, atol=0.3)  # bin 1.25 Hz, Hann main lobe well resolved


def test_friction_dissipates_energy(rng):
    # second law: with friction on and no drive effort the mechanical energy never rises
    arm = TwoLinkArm()
    friction = StribeckFriction(
        coulomb=np.full(2, 0.5),
        static=np.full(2, 0.7),
        stribeck_velocity=np.full(2, 0.1),
        viscous_ref=np.full(2, 0.2),
        viscosity_temperature_coefficient_per_k=np.full(2, 0.025),
        smoothing_velocity=0.05,
    )
    plant = Plant(arm, rigid_config(friction=friction), internal_step_s=2.5e-4)
    theta = np.zeros((3, 1))
    states = free_swing(plant, rng.uniform(-1, 1, size=(3, 2)), theta, n_samples=150, substeps=4)
    energy = np.array(
        [arm.kinetic_energy(s.position, s.velocity, [0.0]) + arm.potential_energy(s.position, [0.0]) for s in states]
    )
    assert (np.diff(energy, axis=0) < 1e-9).all()
    assert (energy[-1] < energy[0] - 0.05).all()  # and it really loses some


def test_viscous_friction_falls_with_temperature():
    # Reynolds (1886): b(T) = b_ref exp(-beta (T - T_ref))
    fr = StribeckFriction(
        coulomb=np.array([1.0]),
        static=np.array([1.2]),
        stribeck_velocity=np.array([0.1]),
        viscous_ref=np.array([0.5]),
        viscosity_temperature_coefficient_per_k=np.array([0.02]),
        reference_temperature_c=40.0,
    )
    assert_allclose(fr.viscous(np.array([[60.0]])), 0.5 * np.exp(-0.4), rtol=1e-14)
    # far above the Stribeck velocity the curve is F_c + b v (Armstrong-Helouvry 1994)
    assert_allclose(fr.effort(np.array([[10.0]]), np.array([[40.0]])), 1.0 + 5.0, rtol=1e-12)
    with pytest.raises(ConfigurationError, match="static: breakaway"):
        StribeckFriction(
            coulomb=np.array([1.0]),
            static=np.array([0.5]),
            stribeck_velocity=np.array([0.1]),
            viscous_ref=np.array([0.5]),
            viscosity_temperature_coefficient_per_k=np.array([0.02]),
        )


def test_thermal_step_matches_closed_form():
    # first-order RC network: T(t) = T_inf + (T_0 - T_inf) exp(-t / RC), T_inf = T_amb + R P
    th = DriveThermal(
        thermal_resistance_k_per_w=np.array([0.5]),
        thermal_capacitance_j_per_k=np.array([4000.0]),
        winding_resistance_20c_ohm=np.array([1.0]),
    )
    temperature = np.array([[25.0]])
    for _ in range(3600):
        temperature = th.step(temperature, np.array([[40.0]]), np.array([[25.0]]), 1.0)
    assert_allclose(temperature, 25.0 + 20.0 * (1 - np.exp(-3600.0 / 2000.0)), rtol=1e-12)
    # copper: R(T) = R_20 (1 + 0.00393 (T - 20)) (CRC Handbook)
    assert_allclose(th.copper_loss_w(np.array([[2.0]]), np.array([[120.0]])), 4.0 * 1.393, rtol=1e-12)


def test_backlash_dead_zone():
    cp = CompliantCoupling(stiffness=np.array([100.0]), damping=np.array([1.0]), backlash=0.02)
    assert_allclose(cp.effort(np.array([[0.005]]), np.array([[3.0]])), 0.0, atol=0)
    assert_allclose(cp.effort(np.array([[0.03]]), np.array([[0.0]])), 100.0 * 0.02, rtol=1e-12)
    assert_allclose(cp.effort(np.array([[-0.03]]), np.array([[1.0]])), -2.0 + 1.0, rtol=1e-12)


def test_current_loop_is_first_order_lag():
    # step response of a first-order lag: 1 - exp(-t/T) (Franklin-Powell-Workman 1998)
    arm = TwoLinkArm()
    plant = Plant(
        arm, PlantConfig(rotor_inertia=np.zeros(2), current_time_constant_s=np.full(2, 1e-3)), internal_step_s=1e-4
    )
    out = plant.effort_at(np.zeros((1, 2)), np.ones((1, 2)), 2e-3)
    assert_allclose(out, 1 - np.exp(-2.0), rtol=1e-14)


@pytest.mark.parametrize("n_batch", [1, 3, 6, 500])
def test_batch_matches_loop(rng, n_batch):
    arm = TwoLinkArm(rotor_inertia=0.02)
    coupling = CompliantCoupling(stiffness=np.full(2, 800.0), damping=np.full(2, 0.5))
    plant = Plant(
        arm,
        PlantConfig(rotor_inertia=np.full(2, 0.02), current_time_constant_s=np.full(2, 3e-4), coupling=coupling),
        internal_step_s=2.5e-4,
    )
    q0 = rng.uniform(-1, 1, size=(n_batch, 2))
    theta = rng.uniform(0, 1, size=(n_batch, 1))
    u = rng.normal(size=(n_batch, 2))
    state = plant.initial_state(q0, theta, temperature_c=30.0)
    batch = plant.advance(state, state.effort + u, theta, n_steps=4)
    for i in [0, n_batch - 1]:
        one = plant.initial_state(q0[i : i + 1], theta[i : i + 1], temperature_c=30.0)
        one = plant.advance(one, one.effort + u[i : i + 1], theta[i : i + 1], n_steps=4)
        assert_allclose(batch.position[i], one.position[0], rtol=1e-12, atol=1e-14)
        assert_allclose(batch.velocity[i], one.velocity[0], rtol=1e-12, atol=1e-12)


def test_rejects_wrong_shapes():
    arm = TwoLinkArm()
    plant = Plant(arm, rigid_config(), internal_step_s=1e-4)
    state = plant.initial_state(np.zeros((2, 2)), np.zeros((2, 1)), temperature_c=20.0)
    with pytest.raises(ShapeError, match="command: expected shape"):
        plant.advance(state, np.zeros((3, 2)), np.zeros((2, 1)), n_steps=1)
    with pytest.raises(ConfigurationError, match="internal_step_s"):
        Plant(arm, rigid_config(), internal_step_s=0.0)


def test_delta_plant_conserves_energy_under_constant_effort(rng):
    # physical law on the real delta model: a constant effort tau_0 is conservative, so with no friction
    # T + V - tau_0 . (q - q_0) stays constant (T, V from the model's own energy functions, a code path
    # independent of M and h)
    from shadow.robots.delta import DeltaModel
    from shadow.robots.description import example_paths, load_description
    from shadow.robots.drives import reflected_inertias

    desc = load_description(next(p for p in example_paths() if "delta" in p.name))
    model = DeltaModel(desc.parameters)
    plant = Plant(
        model,
        PlantConfig(rotor_inertia=reflected_inertias(desc.parameters.drives), current_time_constant_s=np.zeros(3)),
        internal_step_s=5e-4,
    )
    x0 = desc.home_position_m + rng.uniform(-0.05, 0.05, size=(3, 3))
    q0 = model.inverse_kinematics(x0)
    theta = np.full((3, 1), 0.5)
    state = plant.initial_state(q0, theta, temperature_c=30.0, qd0=rng.normal(scale=1.0, size=(3, 3)))
    tau0 = state.effort + rng.normal(scale=2.0, size=(3, 3))  # static load plus an unbalanced part
    energy, kinetic = [], []
    for _ in range(100):  # 0.1 s
        q, qd = plant.load_side(state)
        kinetic.append(model.kinetic_energy(q, qd, [0.5]))
        energy.append(
            model.kinetic_energy(q, qd, [0.5]) + model.potential_energy(q, [0.5]) - np.sum(tau0 * (q - q0), axis=1)
        )
        state = plant.advance(state, tau0, theta, n_steps=2)
    energy = np.array(energy)
    swing = np.ptp(np.array(kinetic), axis=0)
    assert swing.min() > 1e-3  # joules really change hands between kinetic and potential energy
    assert_allclose(energy, np.broadcast_to(energy[0], energy.shape), rtol=0, atol=1e-6 * swing.max())
