"""The hexapod model against Pinocchio's closed-chain dynamics (tests/reference/pinocchio_hexapod.py)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

pytest.importorskip("pinocchio")

from shadow.robots.hexapod import HexapodModel  # noqa: E402
from tests.reference.pinocchio_hexapod import PinocchioHexapod  # noqa: E402
from tests.robots import test_hexapod as hx  # noqa: E402

N_STATES = 60


@pytest.fixture
def setup(rng: np.random.Generator) -> tuple[HexapodModel, PinocchioHexapod, object]:
    params = hx.hexapod_params()
    payload = hx.random_payload(rng)
    return HexapodModel(params), PinocchioHexapod(params, payload), payload


def test_kinematics_match_pinocchio(setup: tuple, rng: np.random.Generator) -> None:
    # Reference: Pinocchio 4 placements of the closed tree (closure solved by Newton on Pinocchio's Jacobians)
    model, ref, _ = setup
    p, R = hx.random_poses(rng, N_STATES)
    q = model.inverse_kinematics(p, R)
    p_fk, r_fk = model.forward_kinematics(q)
    for i in range(N_STATES):
        p_ref, r_ref = ref.forward_kinematics(q[i])
        assert_allclose(p_fk[i], p_ref, rtol=0, atol=1e-10)
        assert_allclose(r_fk[i], r_ref, rtol=0, atol=1e-10)


def test_inverse_dynamics_matches_pinocchio(setup: tuple, rng: np.random.Generator) -> None:
    # Reference: Pinocchio 4 constraintDynamics with CONTACT_3D loop closures and armature for the rotors
    model, ref, payload = setup
    p, R, twist, accel = hx.random_motion(rng, N_STATES)
    q, qd, qdd = model.actuator_motion(p, R, twist, accel)
    theta = payload.standard_parameters()
    tau = model.inverse_dynamics(q, qd, qdd, theta)
    T = model.kinetic_energy(q, qd, theta)
    for i in range(N_STATES):
        tau_ref = ref.inverse_dynamics(q[i], qd[i], qdd[i])
        assert np.linalg.norm(tau[i] - tau_ref) / np.linalg.norm(tau_ref) < 1e-8
        assert_allclose(T[i], ref.kinetic_energy(q[i], qd[i]), rtol=1e-10)


def test_mass_matrix_matches_pinocchio(setup: tuple, rng: np.random.Generator) -> None:
    # Reference: columns of M from Pinocchio's inverse dynamics at rest, M e_k = F(q, 0, e_k) - F(q, 0, 0)
    model, ref, payload = setup
    p, R = hx.random_poses(rng, 5)
    q = model.inverse_kinematics(p, R)
    M = model.mass_matrix(q, payload.standard_parameters())
    zero = np.zeros(6)
    for i in range(5):
        f0 = ref.inverse_dynamics(q[i], zero, zero)
        m_ref = np.column_stack([ref.inverse_dynamics(q[i], zero, e) - f0 for e in np.eye(6)])
        assert_allclose(M[i], m_ref, rtol=1e-9, atol=1e-9 * np.abs(m_ref).max())
