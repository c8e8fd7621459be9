"""The delta robot rebuilt in Pinocchio (the outside rigid-body reference for our own model).

A kinematic tree with three loop closures:

* per leg i: a revolute actuator joint at ``B_i`` about ``u_i`` (frame axes ``[r_i, u_i, z]``, joint
  about local y, so the Pinocchio angle equals theta_i), the upper arm body (m_a at c_a along the arm,
  inertia J_a about the axis), armature ``J_m n^2`` (reflected rotor inertia);
* at the elbow a universal joint made of two revolutes (about the arm's local y, then the new local x)
  carrying the forearm rod along its local -z: mass m_f, centre at L_f / 2, inertia
  ``diag(m L^2/12, m L^2/12, 0)`` about the centre ("rod") or two halves at the ends,
  ``diag(m L^2/4, m L^2/4, 0)`` ("lumped");
* the platform (m_p + payload) on a 3-DOF translation joint from the world;
* three ``CONTACT_3D`` constraints joining each rod end to its platform point ``R_p r_i``.

Actuator efforts come from Pinocchio's constrained forward dynamics (``constraintDynamics``), which is
affine in the efforts: qdd_act = a0 + L tau, so tau = L^-1 (qdd - a0) from four calls.
Tree coordinates are built from our own kinematics and verified in Pinocchio: the distance between
each rod end and its platform point, from Pinocchio's frame placements, must be below ``closure_tol_m``.
"""

from __future__ import annotations

import numpy as np
import pinocchio as pin
from numpy.typing import NDArray

from shadow.robots.delta import DeltaModel
from shadow.robots.parameters import DeltaParameters

Array = NDArray[np.float64]


def _rot_y(angle: float) -> Array:
    c, s = np.cos(angle), np.sin(angle)
    return np.array([[c, 0.0, s], [0.0, 1.0, 0.0], [-s, 0.0, c]])


class PinocchioDelta:
    """Pinocchio tree-with-closures model of a delta robot, evaluated one sample at a time."""

    def __init__(
        self,
        params: DeltaParameters,
        payload_mass_kg: float,
        forearm_model: str = "rod",
        *,
        closure_tol_m: float = 1e-10,
    ) -> None:
        self.params = params
        self.closure_tol_m = closure_tol_m
        self._own = DeltaModel(params, forearm_model=forearm_model)  # used for tree coordinates only
        p = params
        La, Lf, m_f = p.upper_arm_length_m, p.forearm_length_m, p.forearm_mass_kg
        model = pin.Model()
        model.gravity.linear = np.asarray(p.gravity_m_s2, dtype=float)
        r, u = self._own.radial_directions, self._own.axis_directions
        z = np.array([0.0, 0.0, 1.0])
        self._frame_rot = [np.column_stack([r[i], u[i], z]) for i in range(3)]
        self._arm_joints: list[int] = []
        self._elbow_joints: list[int] = []
        self._rod_joints: list[int] = []
        self._rod_end_frames: list[int] = []
        i_axis = p.upper_arm_inertia_kg_m2 - p.upper_arm_mass_kg * p.upper_arm_com_m**2  # parallel-axis theorem
        if forearm_model == "rod":
            i_rod = m_f * Lf**2 / 12.0  # slender rod about its centre (handbook)
        elif forearm_model == "lumped":
            i_rod = m_f * Lf**2 / 4.0  # two m/2 points at +-L/2
        else:
            raise ValueError(f"forearm_model: expected 'rod' or 'lumped', got {forearm_model!r}")
        for i in range(3):
            arm = model.addJoint(
                0, pin.JointModelRY(), pin.SE3(self._frame_rot[i], p.base_radius_m * r[i]), f"actuator_{i}"
            )
            model.appendBodyToJoint(
                arm,
                pin.Inertia(
                    p.upper_arm_mass_kg,
                    np.array([p.upper_arm_com_m, 0.0, 0.0]),
                    np.diag([1e-6, i_axis, i_axis]),
                ),
                pin.SE3.Identity(),
            )
            drive = p.drives[i]
            model.armature[model.joints[arm].idx_v] = drive.rotor_inertia_kg_m2 * drive.gear_ratio**2
            elbow_a = model.addJoint(
                arm, pin.JointModelRY(), pin.SE3(np.eye(3), np.array([La, 0.0, 0.0])), f"elbow_a_{i}"
            )
            rod = model.addJoint(elbow_a, pin.JointModelRX(), pin.SE3.Identity(), f"elbow_b_{i}")
            model.appendBodyToJoint(
                rod,
                pin.Inertia(m_f, np.array([0.0, 0.0, -Lf / 2.0]), np.diag([i_rod, i_rod, 0.0])),
                pin.SE3.Identity(),
            )
            self._arm_joints.append(arm)
            self._elbow_joints.append(elbow_a)
            self._rod_joints.append(rod)
        plat = model.addJoint(0, pin.JointModelTranslation(), pin.SE3.Identity(), "platform")
        model.appendBodyToJoint(
            plat, pin.Inertia(p.platform_mass_kg + payload_mass_kg, np.zeros(3), np.zeros((3, 3))), pin.SE3.Identity()
        )
        self._plat_joint = plat
        self._plat_frames: list[int] = []
        self.constraint_models = pin.StdVec_RigidConstraintModel()
        for i in range(3):
            end = pin.SE3(np.eye(3), np.array([0.0, 0.0, -Lf]))
            pt = pin.SE3(np.eye(3), p.platform_radius_m * r[i])
            self._rod_end_frames.append(
                model.addFrame(pin.Frame(f"rod_end_{i}", self._rod_joints[i], end, pin.FrameType.OP_FRAME))
            )
            self._plat_frames.append(model.addFrame(pin.Frame(f"platform_point_{i}", plat, pt, pin.FrameType.OP_FRAME)))
            cm = pin.RigidConstraintModel(
                pin.ContactType.CONTACT_3D, model, self._rod_joints[i], end, plat, pt, pin.ReferenceFrame.LOCAL
            )
            self.constraint_models.append(cm)
        self.model = model
        self.data = model.createData()
        self.constraint_datas = pin.StdVec_RigidConstraintData()
        for cm in self.constraint_models:
            self.constraint_datas.append(cm.createData())
        pin.initConstraintDynamics(self.model, self.data, self.constraint_models, self.constraint_datas)
        self.prox = pin.ProximalSettings(1e-14, 0.0, 10)
        self.actuated_v = np.array([model.joints[j].idx_v for j in self._arm_joints])
        self.passive_v = np.setdiff1d(np.arange(model.nv), self.actuated_v)

    # ------------------------------------------------------------------ kinematics
    def tree_configuration(self, q: Array) -> Array:
        """Tree coordinates (nq,) for actuator angles q (3,), checked against Pinocchio's frame placements."""
        p = self.params
        q = np.asarray(q, dtype=float)
        x = self._own.forward_kinematics(q[None])[0]
        E = self._own.elbows(q[None])[0]
        r = self._own.radial_directions
        qt = np.zeros(self.model.nq)
        for i in range(3):
            R_arm = self._frame_rot[i] @ _rot_y(q[i])
            d_loc = R_arm.T @ (x + p.platform_radius_m * r[i] - E[i]) / p.forearm_length_m
            # rod direction in the arm frame: Ry(alpha) Rx(beta) (0, 0, -1) = (-sa cb, sb, -ca cb)
            beta = np.arcsin(np.clip(d_loc[1], -1.0, 1.0))
            alpha = np.arctan2(-d_loc[0], -d_loc[2])
            qt[self.model.joints[self._arm_joints[i]].idx_q] = q[i]
            qt[self.model.joints[self._elbow_joints[i]].idx_q] = alpha
            qt[self.model.joints[self._rod_joints[i]].idx_q] = beta
        qt[self.model.joints[self._plat_joint].idx_q : self.model.joints[self._plat_joint].idx_q + 3] = x
        residual = self.closure_residual(qt)
        if residual > self.closure_tol_m:
            raise RuntimeError(f"tree configuration does not close the loops: residual {residual:.3g} m")
        return qt

    def closure_residual(self, q_tree: Array) -> float:
        """Largest rod-end-to-platform-point distance [m] from Pinocchio's frame placements."""
        pin.framesForwardKinematics(self.model, self.data, q_tree)
        gaps = [
            np.linalg.norm(self.data.oMf[a].translation - self.data.oMf[b].translation)
            for a, b in zip(self._rod_end_frames, self._plat_frames, strict=True)
        ]
        return float(max(gaps))

    def platform_position(self, q_tree: Array) -> Array:
        """Platform position (3,) [m] read from the tree coordinates."""
        i0 = self.model.joints[self._plat_joint].idx_q
        return np.asarray(q_tree[i0 : i0 + 3], dtype=float)

    def platform_velocity(self, v_tree: Array) -> Array:
        """Platform velocity (3,) [m/s] read from a tree velocity."""
        i0 = self.model.joints[self._plat_joint].idx_v
        return np.asarray(v_tree[i0 : i0 + 3], dtype=float)

    def constraint_jacobian(self, q_tree: Array) -> Array:
        """Pinocchio's stacked closure Jacobian (9, nv)."""
        pin.computeJointJacobians(self.model, self.data, q_tree)
        pin.framesForwardKinematics(self.model, self.data, q_tree)
        for k, cm in enumerate(self.constraint_models):
            cm.calc(self.model, self.data, self.constraint_datas[k])  # placements at q_tree; read back by index
        return np.array(
            pin.getConstraintsJacobian(self.model, self.data, self.constraint_models, self.constraint_datas)
        )

    def tree_velocity(self, q_tree: Array, qd: Array) -> Array:
        """Tree velocity (nv,) consistent with the closures, from Pinocchio's constraint Jacobian."""
        Jc = self.constraint_jacobian(q_tree)
        v = np.zeros(self.model.nv)
        v[self.actuated_v] = qd
        v[self.passive_v] = -np.linalg.solve(Jc[:, self.passive_v], Jc[:, self.actuated_v] @ qd)
        return v

    # ------------------------------------------------------------------ dynamics
    def forward_dynamics(self, q_tree: Array, v_tree: Array, tau: Array) -> Array:
        """Constrained tree accelerations (nv,) for actuator efforts tau (3,)."""
        tau_tree = np.zeros(self.model.nv)
        tau_tree[self.actuated_v] = tau
        return np.array(
            pin.constraintDynamics(
                self.model,
                self.data,
                q_tree,
                v_tree,
                tau_tree,
                self.constraint_models,
                self.constraint_datas,
                self.prox,
            )
        )

    def inverse_dynamics(self, q: Array, qd: Array, qdd: Array) -> Array:
        """Actuator efforts tau (3,) [N m] for the motion (q, qd, qdd), from constrained forward dynamics."""
        q_tree = self.tree_configuration(q)
        v_tree = self.tree_velocity(q_tree, np.asarray(qd, dtype=float))
        a0 = self.forward_dynamics(q_tree, v_tree, np.zeros(3))[self.actuated_v]
        gain = np.column_stack(
            [self.forward_dynamics(q_tree, v_tree, np.eye(3)[k])[self.actuated_v] - a0 for k in range(3)]
        )
        return np.linalg.solve(gain, np.asarray(qdd, dtype=float) - a0)
