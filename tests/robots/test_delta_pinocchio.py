"""Our delta model against Pinocchio's constrained rigid-body dynamics (tree + three CONTACT_3D closures)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

pytest.importorskip("pinocchio")

from shadow.robots.delta import DeltaModel  # noqa: E402
from shadow.robots.parameters import DeltaParameters, Drive  # noqa: E402
from tests.reference.pinocchio_delta import PinocchioDelta  # noqa: E402

PAYLOAD_KG = 0.8
N_STATES = 60


def _drive(rotor_inertia_kg_m2: float, gear_ratio: float) -> Drive:
    return Drive(
        rotor_inertia_kg_m2=rotor_inertia_kg_m2,
        gear_ratio=gear_ratio,
        efficiency=0.92,
        torque_constant_nm_per_a=0.6,
        current_loop_bandwidth_hz=1200.0,
        rated_effort=55.0,
    )


@pytest.fixture
def delta_params() -> DeltaParameters:
    """An invented but plausible picker with unequal drives (one replaced motor and gearbox)."""
    return DeltaParameters(
        base_radius_m=0.2,
        platform_radius_m=0.05,
        upper_arm_length_m=0.35,
        forearm_length_m=0.8,
        first_leg_azimuth_rad=0.3,
        upper_arm_mass_kg=1.2,
        upper_arm_com_m=0.15,
        upper_arm_inertia_kg_m2=0.045,
        forearm_mass_kg=0.4,
        platform_mass_kg=0.5,
        drives=(_drive(1.2e-4, 30.0), _drive(1.2e-4, 30.0), _drive(1.6e-4, 25.0)),
        joint_lower_rad=np.full(3, -1.0),
        joint_upper_rad=np.full(3, 1.6),
        gravity_m_s2=np.array([0.0, 0.3, -9.80665]),  # a slightly tilted mounting
    )


def random_states(model: DeltaModel, rng: np.random.Generator, n: int) -> tuple[np.ndarray, ...]:
    """(q, qd, qdd) from platform positions in a cylinder inside the workspace; fast pick-and-place rates."""
    radius = 0.25 * np.sqrt(rng.uniform(0.0, 1.0, n))
    azimuth = rng.uniform(0.0, 2.0 * np.pi, n)
    x = np.column_stack([radius * np.cos(azimuth), radius * np.sin(azimuth), rng.uniform(-0.95, -0.6, n)])
    return model.inverse_kinematics(x), rng.normal(0.0, 4.0, (n, 3)), rng.normal(0.0, 150.0, (n, 3))


def test_tree_configuration_closes_the_loops(delta_params: DeltaParameters, rng: np.random.Generator) -> None:
    # our closed-form kinematics, rebuilt as tree coordinates, closes Pinocchio's loops (frame placements)
    model = DeltaModel(delta_params)
    reference = PinocchioDelta(delta_params, PAYLOAD_KG)
    q = random_states(model, rng, N_STATES)[0]
    x = model.forward_kinematics(q)
    for k in range(N_STATES):
        q_tree = reference.tree_configuration(q[k])
        assert reference.closure_residual(q_tree) < 1e-10
        assert_allclose(reference.platform_position(q_tree), x[k], rtol=0, atol=1e-12)


def test_platform_jacobian_matches_pinocchio_constraint_jacobian(
    delta_params: DeltaParameters, rng: np.random.Generator
) -> None:
    # platform velocity from the null space of Pinocchio's closure Jacobian (getConstraintsJacobian)
    model = DeltaModel(delta_params)
    reference = PinocchioDelta(delta_params, PAYLOAD_KG)
    q, qd, _ = random_states(model, rng, N_STATES)
    xd = np.einsum("nij,nj->ni", model.platform_jacobian(q), qd)
    for k in range(N_STATES):
        v_tree = reference.tree_velocity(reference.tree_configuration(q[k]), qd[k])
        assert_allclose(reference.platform_velocity(v_tree), xd[k], rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("forearm_model", ["rod", "lumped"])
def test_inverse_dynamics_matches_pinocchio(
    delta_params: DeltaParameters, rng: np.random.Generator, forearm_model: str
) -> None:
    # Pinocchio constraintDynamics (forward, with closures) inverted for tau; rotor inertia as armature
    model = DeltaModel(delta_params, forearm_model=forearm_model)  # type: ignore[arg-type]
    reference = PinocchioDelta(delta_params, PAYLOAD_KG, forearm_model)
    q, qd, qdd = random_states(model, rng, N_STATES)
    tau = model.inverse_dynamics(q, qd, qdd, np.array([PAYLOAD_KG]))
    tau_ref = np.array([reference.inverse_dynamics(q[k], qd[k], qdd[k]) for k in range(N_STATES)])
    rel = np.linalg.norm(tau - tau_ref, axis=1) / np.linalg.norm(tau_ref, axis=1)
    assert rel.max() < 1e-8


def test_static_and_gravity_only_match_pinocchio(delta_params: DeltaParameters, rng: np.random.Generator) -> None:
    model = DeltaModel(delta_params)
    reference = PinocchioDelta(delta_params, PAYLOAD_KG)
    q = random_states(model, rng, 10)[0]
    zero = np.zeros_like(q)
    tau = model.inverse_dynamics(q, zero, zero, np.array([PAYLOAD_KG]))
    tau_ref = np.array([reference.inverse_dynamics(q[k], zero[k], zero[k]) for k in range(10)])
    assert_allclose(tau, tau_ref, rtol=1e-9, atol=1e-9)


def test_lumped_forearm_error_against_exact_reference(delta_params: DeltaParameters, rng: np.random.Generator) -> None:
    # the lumped simplification misses the rods' rotational inertia: measurable against the exact reference
    lumped = DeltaModel(delta_params, forearm_model="lumped")
    reference = PinocchioDelta(delta_params, PAYLOAD_KG, "rod")
    q, qd, qdd = random_states(lumped, rng, 20)
    tau = lumped.inverse_dynamics(q, qd, qdd, np.array([PAYLOAD_KG]))
    tau_ref = np.array([reference.inverse_dynamics(q[k], qd[k], qdd[k]) for k in range(20)])
    rel = np.linalg.norm(tau - tau_ref) / np.linalg.norm(tau_ref)
    assert rel > 1e-4
