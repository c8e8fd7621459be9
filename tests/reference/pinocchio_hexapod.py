"""The hexapod rebuilt in Pinocchio as a kinematic tree with loop closures, as an outside reference.

Tree: the platform on a free-flyer joint; per leg j a universal joint at B_j (revolute about the base x
axis, then about the turned y axis), the lower leg body, a prismatic joint along the leg (local z, its
value is the leg length q_j), the upper leg body. Six CONTACT_3D rigid constraints join the end of each
upper body (the prismatic joint's origin) to the platform point P_j. The drives' reflected inertia
J_m (2 pi n / h)^2 is the prismatic joints' armature.

Nothing here comes from :mod:`shadow.robots.hexapod`: the closure is solved by Newton's method on
Pinocchio's own placements and Jacobians, the tree velocity from the constraint Jacobian, and the
leg efforts from Pinocchio's constrained forward dynamics (``constraintDynamics``), which is affine in
the joint efforts: ``qdd_legs(F) = a_0 + G F``, so ``F = G^-1 (qdd - a_0)``.
"""

from __future__ import annotations

import numpy as np
import pinocchio as pin
from numpy.typing import NDArray

from shadow.robots.parameters import HexapodParameters, RigidPayload

Array = NDArray[np.float64]


class PinocchioHexapod:
    """Closed-chain hexapod in Pinocchio; per-sample inverse dynamics in leg coordinates."""

    def __init__(
        self,
        params: HexapodParameters,
        payload: RigidPayload,
        *,
        closure_tolerance_m: float = 1e-13,
        max_iterations: int = 50,
        proximal_mu: float = 1e-9,
    ) -> None:
        self.params = params
        self.closure_tolerance_m = closure_tolerance_m
        self.max_iterations = max_iterations
        model = pin.Model()
        model.gravity = pin.Motion(np.concatenate([np.asarray(params.gravity_m_s2, dtype=float), np.zeros(3)]))
        self.platform_joint = model.addJoint(0, pin.JointModelFreeFlyer(), pin.SE3.Identity(), "platform")
        body = pin.Inertia(
            params.platform_mass_kg,
            np.asarray(params.platform_com_m, dtype=float),
            np.asarray(params.platform_inertia_kg_m2, dtype=float),
        )
        load = pin.Inertia(
            payload.mass_kg, np.asarray(payload.com_m, dtype=float), np.asarray(payload.inertia_kg_m2, dtype=float)
        )
        model.appendBodyToJoint(self.platform_joint, body + load, pin.SE3.Identity())
        lower = pin.Inertia(
            params.lower_leg_mass_kg,
            np.array([0.0, 0.0, params.lower_leg_com_m]),
            np.diag([params.lower_leg_inertia_kg_m2, params.lower_leg_inertia_kg_m2, 0.0]),
        )
        upper = pin.Inertia(
            params.upper_leg_mass_kg,
            np.array([0.0, 0.0, -params.upper_leg_com_m]),
            np.diag([params.upper_leg_inertia_kg_m2, params.upper_leg_inertia_kg_m2, 0.0]),
        )
        self.slide_joints: list[int] = []
        self.swing_joints: list[tuple[int, int]] = []
        self.platform_frames: list[int] = []
        armature: list[tuple[int, float]] = []
        for j in range(6):
            b_j = np.asarray(params.base_joints_m[j], dtype=float)
            p_j = np.asarray(params.platform_joints_m[j], dtype=float)
            jx = model.addJoint(0, pin.JointModelRX(), pin.SE3(np.eye(3), b_j), f"leg{j}_swing_x")
            jy = model.addJoint(jx, pin.JointModelRY(), pin.SE3.Identity(), f"leg{j}_swing_y")
            model.appendBodyToJoint(jy, lower, pin.SE3.Identity())
            js = model.addJoint(jy, pin.JointModelPZ(), pin.SE3.Identity(), f"leg{j}_slide")
            model.appendBodyToJoint(js, upper, pin.SE3.Identity())
            self.platform_frames.append(
                model.addFrame(
                    pin.Frame(
                        f"leg{j}_platform_joint", self.platform_joint, pin.SE3(np.eye(3), p_j), pin.FrameType.OP_FRAME
                    )
                )
            )
            d = params.drives[j]
            armature.append((js, d.rotor_inertia_kg_m2 * (2.0 * np.pi * d.gear_ratio / float(d.screw_lead_m)) ** 2))
            self.slide_joints.append(js)
            self.swing_joints.append((jx, jy))
        arm = np.zeros(model.nv)
        for js, value in armature:
            arm[model.joints[js].idx_v] = value
        model.armature = arm
        self.model = model
        self.data = model.createData()
        self.slide_v = np.array([model.joints[js].idx_v for js in self.slide_joints])
        self.slide_q = np.array([model.joints[js].idx_q for js in self.slide_joints])
        self.free_v = np.setdiff1d(np.arange(model.nv), self.slide_v)
        self.constraint_models = pin.StdVec_RigidConstraintModel()
        for j, js in enumerate(self.slide_joints):
            self.constraint_models.append(
                pin.RigidConstraintModel(
                    pin.ContactType.CONTACT_3D,
                    model,
                    js,
                    pin.SE3.Identity(),
                    self.platform_joint,
                    pin.SE3(np.eye(3), np.asarray(params.platform_joints_m[j], dtype=float)),
                    pin.ReferenceFrame.LOCAL,
                )
            )
        self.constraint_datas = pin.StdVec_RigidConstraintData()
        for cm in self.constraint_models:
            self.constraint_datas.append(cm.createData())
        pin.initConstraintDynamics(model, self.data, self.constraint_models, self.constraint_datas)
        self.prox = pin.ProximalSettings(1e-14, proximal_mu, 200)
        self._q_guess = self._home_configuration()

    # ---------------------------------------------------------------- kinematics

    def _home_configuration(self) -> Array:
        """Tree configuration with the platform at home and each leg pointed at its platform joint."""
        q = pin.neutral(self.model)
        home = np.asarray(self.params.home_position_m, dtype=float)
        q[:3] = home
        for j, (jx, jy) in enumerate(self.swing_joints):
            leg = home + self.params.platform_joints_m[j] - self.params.base_joints_m[j]
            u = leg / np.linalg.norm(leg)
            q[self.model.joints[jx].idx_q] = np.arctan2(-u[1], u[2])  # Rx(a) Ry(b) z = (sin b, -sin a cos b, ...)
            q[self.model.joints[jy].idx_q] = np.arcsin(u[0])
            q[self.slide_q[j]] = np.linalg.norm(leg)
        return q

    def _closure(self, x: Array) -> tuple[Array, Array]:
        """(residual (18,), Jacobian (18, nv)): upper leg end minus platform point, world frame."""
        model, data = self.model, self.data
        pin.forwardKinematics(model, data, x)
        pin.computeJointJacobians(model, data, x)
        pin.updateFramePlacements(model, data)
        res = np.zeros(18)
        jac = np.zeros((18, model.nv))
        world = pin.ReferenceFrame.LOCAL_WORLD_ALIGNED
        for j, js in enumerate(self.slide_joints):
            fid = self.platform_frames[j]
            res[3 * j : 3 * j + 3] = data.oMi[js].translation - data.oMf[fid].translation
            jac[3 * j : 3 * j + 3] = (
                pin.getJointJacobian(model, data, js, world)[:3] - pin.getFrameJacobian(model, data, fid, world)[:3]
            )
        return res, jac

    def configuration(self, q_legs: Array) -> Array:
        """Closed tree configuration (nq,) for leg lengths (6,), by Newton on the 18 closure equations."""
        x = self._q_guess.copy()
        x[self.slide_q] = q_legs
        for _ in range(self.max_iterations):
            res, jac = self._closure(x)
            if np.max(np.abs(res)) < self.closure_tolerance_m:
                return x
            dv = np.zeros(self.model.nv)
            dv[self.free_v] = -np.linalg.solve(jac[:, self.free_v], res)
            x = pin.integrate(self.model, x, dv)
        raise RuntimeError(f"closure did not converge: residual {np.max(np.abs(res)):.3g} m")

    def forward_kinematics(self, q_legs: Array) -> tuple[Array, Array]:
        """Platform (p (3,), R (3, 3)) for leg lengths (6,)."""
        x = self.configuration(np.asarray(q_legs, dtype=float))
        pin.forwardKinematics(self.model, self.data, x)
        placement = self.data.oMi[self.platform_joint]
        return placement.translation.copy(), placement.rotation.copy()

    def velocity(self, x: Array, qd_legs: Array) -> Array:
        """Tree velocity (nv,) with the closures kept (``J_c v = 0``) and the slides at qd_legs."""
        _, jac = self._closure(x)
        v = np.zeros(self.model.nv)
        v[self.slide_v] = qd_legs
        v[self.free_v] = -np.linalg.solve(jac[:, self.free_v], jac[:, self.slide_v] @ qd_legs)
        return v

    # ---------------------------------------------------------------- dynamics

    def _slide_accelerations(self, x: Array, v: Array, efforts: Array) -> Array:
        tau = np.zeros(self.model.nv)
        tau[self.slide_v] = efforts
        a = pin.constraintDynamics(
            self.model, self.data, x, v, tau, self.constraint_models, self.constraint_datas, self.prox
        )
        return np.asarray(a)[self.slide_v]

    def inverse_dynamics(self, q: Array, qd: Array, qdd: Array, *, probe_effort_n: float = 100.0) -> Array:
        """Leg efforts F (6,) [N] for leg positions, velocities and accelerations (each (6,))."""
        x = self.configuration(np.asarray(q, dtype=float))
        v = self.velocity(x, np.asarray(qd, dtype=float))
        a0 = self._slide_accelerations(x, v, np.zeros(6))
        g = np.column_stack(
            [(self._slide_accelerations(x, v, probe_effort_n * e) - a0) / probe_effort_n for e in np.eye(6)]
        )
        return np.linalg.solve(g, np.asarray(qdd, dtype=float) - a0)

    def kinetic_energy(self, q: Array, qd: Array) -> float:
        """T [J] of the closed chain (tree kinetic energy at the closure-consistent velocity)."""
        x = self.configuration(np.asarray(q, dtype=float))
        v = self.velocity(x, np.asarray(qd, dtype=float))
        return float(pin.computeKineticEnergy(self.model, self.data, x, v))
