"""Kinematics and exact rigid-body inverse dynamics of the six-leg screw-driven hexapod (UPS legs).

Conventions are those of :mod:`shadow.robots.parameters`. Every array carries the sample axis N first.

Symbols
-------
B_j, P_j  : (6, 3) base joints (base frame) and platform joints (platform frame) [m]
p, R      : (N, 3) platform-frame origin [m], (N, 3, 3) platform orientation (base <- platform)
r_j       : (N, 6, 3) ``R P_j``, platform joint relative to the platform origin, base axes [m]
l_j       : (N, 6, 3) leg vector ``l_j = p + R P_j - B_j`` [m]; ``q_j = |l_j|`` [m]; ``u_j = l_j / q_j``
xi        : (N, 6) platform twist ``[v; omega]``, v of the platform origin, omega angular, base frame [m/s, rad/s]
xi_dot    : (N, 6) ``[a; alpha] = d xi / dt`` [m/s^2, rad/s^2]
J_inv     : (N, 6, 6) inverse Jacobian, ``qd = J_inv xi``, row j ``[u_j^T, (r_j x u_j)^T]``
J         : (N, 6, 6) platform Jacobian ``J = J_inv^-1``, ``xi = J qd``
omega_j   : (N, 6, 3) leg angular velocity ``u_j x ld_j / q_j`` (no spin about the leg axis) [rad/s]
theta     : (10,) standard inertial parameters about the platform origin, platform frame
            ``[m, m c_x, m c_y, m c_z, I_xx, I_xy, I_xz, I_yy, I_yz, I_zz]`` [kg, kg m, kg m^2]
Y_w       : (N, 6, 10) platform wrench regressor, the wrench the legs must apply to a body with
            parameters theta: ``w = Y_w theta`` [N, N m]
M_x       : (N, 6, 6) platform-space mass matrix, kinetic energy ``T = xi^T M_x xi / 2`` (legs included)
M, h      : (N, 6, 6) actuator-space mass matrix ``J^T M_x J`` [kg]; (N, 6) bias efforts [N]
F         : (N, 6) leg efforts [N], positive extending, reflected rotor inertia included

Method
------
Inverse dynamics by Newton-Euler: the platform and payload need the wrench ``w = Y_w theta``
(Newton-Euler equations of a rigid body about a body-fixed point, e.g. Featherstone, *Rigid Body
Dynamics Algorithms* (2008), chapter 2). Each leg's moment balance about its base joint B_j (lower +
upper part) gives the component of the platform joint force transverse to the leg; the axial
components follow from the platform balance ``J_inv^T t = w + sum_j [f_perp_j; r_j x f_perp_j]``
and the upper part's axial Newton equation then gives the effort. This is the scheme of Dasgupta and
Mruthyunjaya, "A Newton-Euler formulation for the inverse dynamics of the Stewart platform
manipulator", Mech. Mach. Theory 33 (1998) (citation from memory), here with both leg parts
rotating with ``u_j`` and written for a leading sample axis.
The mass matrix comes independently from the kinetic energy (Lagrange): a leg adds
``G_j^T [kappa_j (1 - u u^T) + mu_j u u^T] G_j`` to M_x with ``G_j = [1, -[r_j]x]``,
``kappa_j = (m_1 e_1^2 + I_1 + I_2 + m_2 (q_j - e_2)^2) / q_j^2`` and ``mu_j = m_2 + J_eq,j`` (from
``T_j = (kappa_j q_j^2 |du_j/dt|^2 + mu_j qd_j^2) / 2``, since ``|omega_j| = |du_j/dt|``); the drive adds
``J_eq = J_m (2 pi n / h)^2`` [kg] (ideal screw and gearbox: motor speed ``2 pi n qd / h``). dM/dt is the
exact time derivative of ``J^T M_x J``, no finite differences.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from shadow.errors import (
    ConvergenceError,
    SingularPoseError,
    UnreachablePoseError,
    expect_finite,
    expect_shape,
)
from shadow.robots.parameters import HexapodParameters, RigidPayload
from shadow.robots.rotations import cross, exp_rotation, skew

Array = NDArray[np.float64]

DEFAULT_MAX_CONDITION = 1e8  # largest accepted 1-norm condition number of J_inv (mixed units: m^0 and m)


@dataclass(frozen=True, slots=True)
class ForwardKinematicsResult:
    """Pose found by :meth:`HexapodModel.solve_forward_kinematics`.

    ``p`` (N, 3) [m], ``R`` (N, 3, 3), ``iterations`` (N,) Newton steps taken per sample,
    ``residual_m`` (N,) largest leg-length error left [m].
    """

    p: Array
    R: Array
    iterations: NDArray[np.int64]
    residual_m: Array


@dataclass(frozen=True, slots=True)
class _LegMotion:
    """Per-leg kinematic quantities of a platform motion (all base frame)."""

    r: Array  # (N, 6, 3) R P_j
    q: Array  # (N, 6) leg lengths
    u: Array  # (N, 6, 3) unit leg directions
    qd: Array  # (N, 6)
    ud: Array  # (N, 6, 3) du/dt
    omega: Array  # (N, 6, 3) leg angular velocity
    qdd: Array  # (N, 6)
    udd: Array  # (N, 6, 3) d2u/dt2
    alpha: Array  # (N, 6, 3) leg angular acceleration


def _checked(name: str, a: Array, shape: tuple[int | None, ...]) -> Array:
    """As float array, with shape and finiteness checked."""
    a = np.asarray(a, dtype=float)
    expect_shape(name, a, shape)
    expect_finite(name, a)
    return a


def _solve(A: Array, b: Array) -> Array:
    """Batched ``A^-1 b`` for A (N, k, k) and b (N, k)."""
    return np.linalg.solve(A, b[..., None])[..., 0]


def _mv(A: Array, b: Array) -> Array:
    """Batched ``A b`` for A (N, k, m) and b (N, m)."""
    return np.einsum("nij,nj->ni", A, b)


def _safe_inverse(A: Array) -> Array:
    """Batched inverse; an exactly singular matrix gives NaN instead of stopping the whole batch."""
    try:
        return np.linalg.inv(A)
    except np.linalg.LinAlgError:
        det = np.linalg.det(A)
        out = np.full_like(A, np.nan)
        ok = det != 0.0
        if ok.any():
            out[ok] = np.linalg.inv(A[ok])
        return out


def _condition_1(A: Array, A_inv: Array) -> Array:
    """1-norm condition number ``|A|_1 |A^-1|_1`` (N,) (Golub and Van Loan, *Matrix Computations*, section 2.6)."""
    return np.abs(A).sum(axis=1).max(axis=1) * np.abs(A_inv).sum(axis=1).max(axis=1)


def _inertia_map(x: Array) -> Array:
    """L(x) (N, 3, 6) with ``I x = L(x) [I_xx, I_xy, I_xz, I_yy, I_yz, I_zz]`` for symmetric I."""
    out = np.zeros((x.shape[0], 3, 6))
    out[:, 0, 0], out[:, 0, 1], out[:, 0, 2] = x[:, 0], x[:, 1], x[:, 2]
    out[:, 1, 1], out[:, 1, 3], out[:, 1, 4] = x[:, 0], x[:, 1], x[:, 2]
    out[:, 2, 2], out[:, 2, 4], out[:, 2, 5] = x[:, 0], x[:, 1], x[:, 2]
    return out


def _dot(a: Array, b: Array) -> Array:
    """Row-wise dot product over the last axis."""
    return np.einsum("...i,...i->...", a, b)


def platform_wrench_regressor(R: Array, twist: Array, accel: Array, gravity_m_s2: Array) -> Array:
    """Y_w (N, 6, 10): wrench ``[f; n]`` about the platform origin (base frame) that moves a rigid body.

    For parameters theta (platform frame, about the origin), with ``h = R [m c]`` and ``I_O = R I R^T``:
    ``f = m (a - g) + alpha x h + omega x (omega x h)`` and
    ``n = I_O alpha + omega x (I_O omega) + h x (a - g)`` (Newton-Euler about a body-fixed
    point; gravity enters as a fictitious acceleration -g of the base).
    """
    w = twist[:, 3:]
    a_g = accel[:, :3] - gravity_m_s2  # a - g
    alpha = accel[:, 3:]
    s_w = skew(w)
    R_t = np.swapaxes(R, 1, 2)
    Y = np.zeros((R.shape[0], 6, 10))
    Y[:, :3, 0] = a_g  # m (a - g)
    Y[:, :3, 1:4] = (skew(alpha) + s_w @ s_w) @ R  # (alpha x + omega x omega x) R (m c)
    Y[:, 3:, 1:4] = -skew(a_g) @ R  # h x (a - g) = -(a - g) x R (m c)
    alpha_l = np.einsum("nij,nj->ni", R_t, alpha)  # platform-frame alpha
    omega_l = np.einsum("nij,nj->ni", R_t, w)
    Y[:, 3:, 4:] = R @ _inertia_map(alpha_l) + s_w @ R @ _inertia_map(omega_l)  # R I R^T alpha + w x R I R^T w
    return Y


class HexapodModel:
    """Rigid-body model of a six-leg UPS hexapod with screw-driven legs; implements ``Mechanism``.

    Parameters
    ----------
    params : HexapodParameters
    max_condition : float
        Largest 1-norm condition number of J_inv accepted where it must be inverted;
        beyond it :class:`SingularPoseError` is raised.
    """

    n_actuators = 6
    n_payload_parameters = 10

    def __init__(self, params: HexapodParameters, *, max_condition: float = DEFAULT_MAX_CONDITION) -> None:
        self.params = params
        self.max_condition = float(max_condition)
        self._B = np.asarray(params.base_joints_m, dtype=float)
        self._P = np.asarray(params.platform_joints_m, dtype=float)
        self._g = np.asarray(params.gravity_m_s2, dtype=float)
        # reflected rotor inertia J_eq = J_m (2 pi n / h)^2 [kg] (ideal screw: x = h phi_screw / (2 pi))
        self._j_eq = np.array(
            [d.rotor_inertia_kg_m2 * (2.0 * np.pi * d.gear_ratio / float(d.screw_lead_m)) ** 2 for d in params.drives]
        )
        self._theta_platform = RigidPayload(
            params.platform_mass_kg, params.platform_com_m, params.platform_inertia_kg_m2
        ).standard_parameters()
        # forward kinematics starts from the home pose moved by its linearisation, xi = J(home) (q - q(home)):
        # one Newton step for the price of a 6x6 product (None when home is singular: plain home start)
        home_p = np.asarray(params.home_position_m, dtype=float)[None, :]
        self._home_q = self.inverse_kinematics(home_p, np.eye(3)[None])[0]
        try:
            self._home_jac: Array | None = np.linalg.inv(self._inverse_jacobian(home_p, np.eye(3)[None])[0])
        except np.linalg.LinAlgError:
            self._home_jac = None

    def platform_dof(self) -> int:
        """k = 6: ``[v; omega]``."""
        return 6

    @property
    def reflected_inertia_kg(self) -> Array:
        """(6,) J_eq of each leg's drive [kg]."""
        return self._j_eq.copy()

    # ------------------------------------------------------------------ kinematics

    def _pose(self, p: Array, R: Array) -> tuple[Array, Array]:
        p = _checked("p", p, (None, 3))
        R = _checked("R", R, (p.shape[0], 3, 3))
        return p, R

    def leg_vectors(self, p: Array, R: Array) -> Array:
        """l_j = p + R P_j - B_j, (N, 6, 3) [m]."""
        p, R = self._pose(p, R)
        return p[:, None, :] + np.einsum("nik,jk->nji", R, self._P) - self._B

    def leg_directions(self, p: Array, R: Array) -> Array:
        """u_j = l_j / |l_j|, (N, 6, 3)."""
        legs = self.leg_vectors(p, R)
        return legs / np.linalg.norm(legs, axis=2, keepdims=True)

    def inverse_kinematics(self, p: Array, R: Array) -> Array:
        """q_j = |p + R P_j - B_j|, (N, 6) [m]."""
        return np.linalg.norm(self.leg_vectors(p, R), axis=2)

    def inverse_jacobian(self, p: Array, R: Array) -> Array:
        """J_inv (N, 6, 6), ``qd = J_inv xi``; row j = ``[u_j^T, (R P_j x u_j)^T]``."""
        p, R = self._pose(p, R)
        return self._inverse_jacobian(p, R)

    def _inverse_jacobian(self, p: Array, R: Array) -> Array:
        r = np.einsum("nik,jk->nji", R, self._P)
        legs = p[:, None, :] + r - self._B
        u = legs / np.linalg.norm(legs, axis=2, keepdims=True)
        return np.concatenate([u, cross(r, u)], axis=2)

    def jacobian_condition(self, p: Array, R: Array) -> Array:
        """1-norm condition number of J_inv (N,), a unit-dependent closeness-to-singularity measure; inf if singular."""
        j_inv = self.inverse_jacobian(p, R)
        with np.errstate(all="ignore"):
            cond = _condition_1(j_inv, _safe_inverse(j_inv))
        return np.where(np.isnan(cond), np.inf, cond)

    def _checked_inverse(self, j_inv: Array) -> Array:
        """J = J_inv^-1 (N, 6, 6); SingularPoseError beyond ``max_condition``."""
        with np.errstate(all="ignore"):
            jac = _safe_inverse(j_inv)
            cond = _condition_1(j_inv, jac)
        bad = ~(cond <= self.max_condition)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise SingularPoseError(
                f"sample {i}: inverse Jacobian condition number {cond[i]:.3g} exceeds max_condition "
                f"{self.max_condition:.3g} (pose at or near a singularity)"
            )
        return jac

    def solve_forward_kinematics(
        self,
        q: Array,
        *,
        initial_p: Array | None = None,
        initial_R: Array | None = None,
        tolerance_m: float = 1e-12,
        max_iterations: int = 50,
    ) -> ForwardKinematicsResult:
        """Platform pose from leg lengths by Newton's method on the pose.

        Step: ``dxi = J_inv^-1 (q - q(p, R))``, ``p += dv``, ``R <- exp([d omega]x) R`` (the increment is a
        twist in the base frame, so J_inv is the exact derivative). Starts from the home pose moved by the
        first-order twist ``J(home) (q - q(home))`` (Newton's first step from home, with the Jacobian of home
        computed once), or from ``initial_p`` (N, 3) / ``initial_R`` (N, 3, 3), e.g. the previous sample's pose.
        Converged when ``max_j |q_j - q_j(p, R)| <= tolerance_m``.

        Raises
        ------
        ConvergenceError
            naming the first sample not converged within ``max_iterations``.
        """
        q = _checked("q", q, (None, 6))
        n = q.shape[0]
        predicted = None
        if (initial_p is None or initial_R is None) and self._home_jac is not None:
            predicted = (q - self._home_q) @ self._home_jac.T  # (N, 6) twist from home, first order
            if not np.isfinite(predicted).all():
                predicted = None
        if initial_p is not None:
            p = _checked("initial_p", initial_p, (n, 3)).copy()
        elif predicted is not None:
            p = np.asarray(self.params.home_position_m, dtype=float) + predicted[:, :3]
        else:
            p = np.tile(np.asarray(self.params.home_position_m, dtype=float), (n, 1))
        if initial_R is not None:
            R = _checked("initial_R", initial_R, (n, 3, 3)).copy()
        elif predicted is not None:
            R = exp_rotation(predicted[:, 3:])
        else:
            R = np.tile(np.eye(3), (n, 1, 1))
        iterations = np.zeros(n, dtype=np.int64)
        for _ in range(max_iterations + 1):
            res = q - np.linalg.norm(p[:, None, :] + np.einsum("nik,jk->nji", R, self._P) - self._B, axis=2)
            err = np.max(np.abs(res), axis=1)
            active = ~(err <= tolerance_m)  # NaN counts as not converged
            if not active.any() or iterations.max(initial=0) >= max_iterations:
                break
            idx = np.flatnonzero(active)
            j_inv = self._inverse_jacobian(p[idx], R[idx])
            try:
                step = _solve(j_inv, res[idx])  # J_inv dxi = dq
            except np.linalg.LinAlgError as exc:
                raise ConvergenceError(
                    f"samples {idx[:5].tolist()}...: forward kinematics met a singular inverse Jacobian"
                ) from exc
            if not np.isfinite(step).all():
                i = int(idx[np.flatnonzero(~np.isfinite(step).all(axis=1))[0]])
                raise ConvergenceError(f"sample {i}: forward kinematics diverged (non-finite Newton step)")
            p[idx] += step[:, :3]
            R[idx] = exp_rotation(step[:, 3:]) @ R[idx]
            iterations[idx] += 1
        if active.any():
            i = int(np.flatnonzero(active)[0])
            raise ConvergenceError(
                f"sample {i}: forward kinematics did not converge in {max_iterations} iterations "
                f"(leg length error {err[i]:.3g} m > tolerance_m {tolerance_m:.3g} m)"
            )
        return ForwardKinematicsResult(p=p, R=R, iterations=iterations, residual_m=err)

    def forward_kinematics(
        self,
        q: Array,
        *,
        initial_p: Array | None = None,
        initial_R: Array | None = None,
        tolerance_m: float = 1e-12,
        max_iterations: int = 50,
    ) -> tuple[Array, Array]:
        """(p (N, 3), R (N, 3, 3)) for leg lengths q (N, 6); see :meth:`solve_forward_kinematics`."""
        sol = self.solve_forward_kinematics(
            q, initial_p=initial_p, initial_R=initial_R, tolerance_m=tolerance_m, max_iterations=max_iterations
        )
        return sol.p, sol.R

    def platform_jacobian(self, q: Array) -> Array:
        """J (N, 6, 6) with ``xi = J qd``, through forward kinematics; SingularPoseError near singularities."""
        p, R = self.forward_kinematics(q)
        return self.platform_jacobian_at_pose(p, R)

    def platform_jacobian_at_pose(self, p: Array, R: Array) -> Array:
        """J = J_inv^-1 (N, 6, 6) at a known pose."""
        j_inv = self.inverse_jacobian(p, R)
        return self._checked_inverse(j_inv)

    def check_reachable(self, q: Array) -> None:
        """Raise UnreachablePoseError if a leg leaves [leg_lower_m, leg_upper_m] or the platform cannot be closed."""
        q = _checked("q", q, (None, 6))
        self._check_limits(q)
        try:
            self.solve_forward_kinematics(q)
        except ConvergenceError as exc:
            raise UnreachablePoseError(f"q: the legs cannot be closed on a platform pose: {exc}") from exc

    def check_pose(self, p: Array, R: Array) -> None:
        """Raise UnreachablePoseError if the pose needs a leg outside [leg_lower_m, leg_upper_m]."""
        self._check_limits(self.inverse_kinematics(p, R))

    def _check_limits(self, q: Array) -> None:
        lo, hi = self.params.leg_lower_m, self.params.leg_upper_m
        for bound, miss, word in ((lo, lo - q, "below the shortest"), (hi, q - hi, "above the longest")):
            if (miss > 0.0).any():
                i, j = (int(k) for k in np.argwhere(miss > 0.0)[0])
                raise UnreachablePoseError(
                    f"sample {i}, leg {j}: length {q[i, j]:.6g} m is {miss[i, j]:.3g} m {word} leg length {bound:.6g} m"
                )

    # ------------------------------------------------------------------ motion

    def _leg_motion(self, p: Array, R: Array, twist: Array, accel: Array) -> _LegMotion:
        """Leg kinematics (``ld = v + omega x r``, ``ldd = a + alpha x r + omega x (omega x r)``)."""
        r = np.einsum("nik,jk->nji", R, self._P)
        legs = p[:, None, :] + r - self._B
        q = np.linalg.norm(legs, axis=2)
        u = legs / q[..., None]
        v, w = twist[:, None, :3], twist[:, None, 3:]
        a, al = accel[:, None, :3], accel[:, None, 3:]
        ld = v + cross(w, r)
        ldd = a + cross(al, r) + cross(w, cross(w, r))
        qd = _dot(u, ld)  # qd = u . ld
        ud = (ld - qd[..., None] * u) / q[..., None]  # du/dt = (1 - u u^T) ld / q
        omega = cross(u, ld) / q[..., None]  # leg angular velocity, no axial spin
        qdd = _dot(u, ldd) + (_dot(ld, ld) - qd**2) / q  # d2q/dt2 = u . ldd + |ud|^2 q
        alpha = (cross(u, ldd) - 2.0 * qd[..., None] * omega) / q[..., None]  # d omega / dt
        udd = cross(alpha, u) + cross(omega, cross(omega, u))  # d2u/dt2
        return _LegMotion(r=r, q=q, u=u, qd=qd, ud=ud, omega=omega, qdd=qdd, udd=udd, alpha=alpha)

    def _twist_accel(self, p: Array, R: Array, twist: Array, accel: Array) -> tuple[Array, Array, Array, Array]:
        p, R = self._pose(p, R)
        n = p.shape[0]
        twist = _checked("twist", twist, (n, 6))
        accel = _checked("accel", accel, (n, 6))
        return p, R, twist, accel

    def actuator_motion(self, p: Array, R: Array, twist: Array, accel: Array) -> tuple[Array, Array, Array]:
        """(q, qd, qdd), each (N, 6), of a platform motion (pose, twist (N, 6), accel (N, 6))."""
        m = self._leg_motion(*self._twist_accel(p, R, twist, accel))
        return m.q, m.qd, m.qdd

    def platform_motion(self, q: Array, qd: Array, qdd: Array) -> tuple[Array, Array, Array, Array]:
        """(p, R, xi, xi_dot) from actuator motion, through forward kinematics.

        ``xi = J_inv^-1 qd``; ``xi_dot = J_inv^-1 (qdd - c)`` with the velocity product
        ``c_j = u_j . (omega x (omega x r_j)) + (|ld_j|^2 - qd_j^2) / q_j``.
        """
        q = _checked("q", q, (None, 6))
        qd = _checked("qd", qd, (q.shape[0], 6))
        qdd = _checked("qdd", qdd, (q.shape[0], 6))
        p, R = self.forward_kinematics(q)
        j_inv = self._inverse_jacobian(p, R)
        jac = self._checked_inverse(j_inv)
        twist = _mv(jac, qd)
        c = self._leg_motion(p, R, twist, np.zeros_like(twist)).qdd  # qdd at zero accel = c
        accel = _mv(jac, qdd - c)
        return p, R, twist, accel

    # ------------------------------------------------------------------ dynamics

    def _theta(self, theta_p: Array) -> Array:
        return _checked("theta_p", theta_p, (10,))

    def _dynamics_terms(self, p: Array, R: Array, twist: Array, accel: Array) -> tuple[Array, Array, Array, Array]:
        """(J_inv, Y_w, w_legs, F_axial): ``F = J_inv^-T (Y_w theta + w_legs) + F_axial``."""
        prm = self.params
        m1, e1, i1 = prm.lower_leg_mass_kg, prm.lower_leg_com_m, prm.lower_leg_inertia_kg_m2
        m2, e2, i2 = prm.upper_leg_mass_kg, prm.upper_leg_com_m, prm.upper_leg_inertia_kg_m2
        g = self._g
        m = self._leg_motion(p, R, twist, accel)
        q = m.q[..., None]
        a1 = e1 * m.udd  # lower com  c_1 = B + e_1 u
        a2 = m.qdd[..., None] * m.u + 2.0 * m.qd[..., None] * m.ud + (q - e2) * m.udd  # c_2 = B + (q - e_2) u
        # moment balance of the leg about B_j:  q u x f = sum_k (c_k - B) x m_k (a_k - g) + (I_1 + I_2) alpha
        m_b = e1 * cross(m.u, m1 * (a1 - g)) + (q - e2) * cross(m.u, m2 * (a2 - g)) + (i1 + i2) * m.alpha
        f_perp = cross(m_b, m.u) / q  # f_perp = (u x f) x u, the transverse force of the platform on the leg
        w_legs = np.concatenate([f_perp.sum(axis=1), cross(m.r, f_perp).sum(axis=1)], axis=1)
        # upper part along u: F + f . u = m_2 (a_2 - g) . u with f . u = -t (t from the platform balance below);
        # the drive adds its reflected inertia J_eq qdd
        f_axial = m2 * _dot(a2 - g, m.u) + self._j_eq * m.qdd
        j_inv = np.concatenate([m.u, cross(m.r, m.u)], axis=2)
        y_w = platform_wrench_regressor(R, twist, accel, g)
        return j_inv, y_w, w_legs, f_axial

    def _platform_regressor(
        self, p: Array, R: Array, twist: Array, accel: Array
    ) -> tuple[Array, Array]:  # (tau_known, Y_p)
        j_inv, y_w, w_legs, f_axial = self._dynamics_terms(p, R, twist, accel)
        jac_t = np.swapaxes(self._checked_inverse(j_inv), 1, 2)
        # platform balance  J_inv^T t = Y_w theta + w_legs, so t = J^T (...);  F = t + F_axial
        tau_known = _mv(jac_t, y_w @ self._theta_platform + w_legs) + f_axial
        y_p = jac_t @ y_w
        return tau_known, y_p

    def inverse_dynamics_from_platform(self, p: Array, R: Array, twist: Array, accel: Array, theta_p: Array) -> Array:
        """Leg efforts F (N, 6) [N] for a platform motion and payload theta_p (10,)."""
        theta_p = self._theta(theta_p)
        tau_known, y_p = self.rigid_regressor_from_platform(p, R, twist, accel)
        return tau_known + y_p @ theta_p

    def rigid_regressor_from_platform(self, p: Array, R: Array, twist: Array, accel: Array) -> tuple[Array, Array]:
        """(tau_known (N, 6), Y_p (N, 6, 10)) with ``F = tau_known + Y_p theta_p`` for a platform motion."""
        return self._platform_regressor(*self._twist_accel(p, R, twist, accel))

    def rigid_regressor(self, q: Array, qd: Array, qdd: Array) -> tuple[Array, Array]:
        """(tau_known (N, 6), Y_p (N, 6, 10)) for actuator motion, ``Y_p = J^T Y_w`` (through FK)."""
        return self._platform_regressor(*self.platform_motion(q, qd, qdd))

    def inverse_dynamics(self, q: Array, qd: Array, qdd: Array, theta_p: Array) -> Array:
        """F (N, 6) [N] for actuator motion (q, qd, qdd) and payload theta_p (10,)."""
        theta_p = self._theta(theta_p)
        tau_known, y_p = self.rigid_regressor(q, qd, qdd)
        return tau_known + y_p @ theta_p

    def bias_efforts(self, q: Array, qd: Array, theta_p: Array) -> Array:
        """h (N, 6) = F(q, qd, qdd = 0) (Coriolis, centrifugal and gravity) [N]."""
        q = _checked("q", q, (None, 6))
        return self.inverse_dynamics(q, qd, np.zeros_like(q), theta_p)

    def platform_mass_matrix(self, p: Array, R: Array, theta_p: Array) -> Array:
        """M_x (N, 6, 6), ``T = xi^T M_x xi / 2`` for platform, payload, legs and rotors."""
        p, R = self._pose(p, R)
        return self._platform_mass_matrix(p, R, self._theta(theta_p) + self._theta_platform)

    def _body_blocks(self, R: Array, theta: Array) -> tuple[Array, Array, Array]:
        """(m, h = R m c (N, 3), I_O = R I R^T (N, 3, 3)) of theta in base axes."""
        h = R @ theta[1:4]
        i_l = np.array([[theta[4], theta[5], theta[6]], [theta[5], theta[7], theta[8]], [theta[6], theta[8], theta[9]]])
        return theta[0], h, R @ i_l @ np.swapaxes(R, 1, 2)

    def _leg_space(self, m: _LegMotion) -> tuple[Array, Array, Array]:
        """(kappa (N, 6), dkappa/dt (N, 6), mu (6,)) of the leg-space inertia ``kappa (1 - uu^T) + mu uu^T``."""
        prm = self.params
        m1, e1, i1 = prm.lower_leg_mass_kg, prm.lower_leg_com_m, prm.lower_leg_inertia_kg_m2
        m2, e2, i2 = prm.upper_leg_mass_kg, prm.upper_leg_com_m, prm.upper_leg_inertia_kg_m2
        k = m1 * e1**2 + i1 + i2 + m2 * (m.q - e2) ** 2  # K = m_1 e_1^2 + I_1 + I_2 + m_2 (q - e_2)^2
        kd = 2.0 * m2 * (m.q - e2) * m.qd  # dK/dt
        kappa = k / m.q**2
        kappa_d = kd / m.q**2 - 2.0 * k * m.qd / m.q**3
        return kappa, kappa_d, m2 + self._j_eq

    def _platform_mass_matrix(self, p: Array, R: Array, theta: Array) -> Array:
        n = p.shape[0]
        zero = np.zeros((n, 6))
        m = self._leg_motion(p, R, zero, zero)
        mass, h, i_o = self._body_blocks(R, theta)
        s_h = skew(h)
        mx = np.zeros((n, 6, 6))
        mx[:, :3, :3] = mass * np.eye(3)  # T = m v^2/2 + v . (omega x h) + omega^T I_O omega / 2
        mx[:, :3, 3:] = -s_h
        mx[:, 3:, :3] = s_h
        mx[:, 3:, 3:] = i_o
        kappa, _, mu = self._leg_space(m)
        uu = m.u[..., :, None] * m.u[..., None, :]
        lam = kappa[..., None, None] * (np.eye(3) - uu) + mu[:, None, None] * uu  # (N, 6, 3, 3)
        g_mat = self._leg_map(m.r)  # (N, 6, 3, 6) G_j = [1, -[r_j]x], ld_j = G_j xi
        mx += np.einsum("njai,njak->nik", g_mat, lam @ g_mat)  # sum_j G_j^T Lambda_j G_j
        return mx

    @staticmethod
    def _leg_map(r: Array) -> Array:
        n = r.shape[0]
        g_mat = np.zeros((n, 6, 3, 6))
        g_mat[..., :3] = np.eye(3)
        g_mat[..., 3:] = -skew(r.reshape(-1, 3)).reshape(n, 6, 3, 3)
        return g_mat

    def _platform_mass_matrix_rate(self, p: Array, R: Array, twist: Array, theta: Array) -> Array:
        """dM_x/dt (N, 6, 6), exact: product rule on every factor of :meth:`_platform_mass_matrix`."""
        n = p.shape[0]
        m = self._leg_motion(p, R, twist, np.zeros((n, 6)))
        w = twist[:, 3:]
        _, h, i_o = self._body_blocks(R, theta)
        s_w = skew(w)
        s_hd = skew(cross(w, h))  # dh/dt = omega x h
        mxd = np.zeros((n, 6, 6))
        mxd[:, :3, 3:] = -s_hd
        mxd[:, 3:, :3] = s_hd
        mxd[:, 3:, 3:] = s_w @ i_o - i_o @ s_w  # d(R I R^T)/dt = [w]x I_O - I_O [w]x
        kappa, kappa_d, mu = self._leg_space(m)
        uu = m.u[..., :, None] * m.u[..., None, :]
        uud = m.ud[..., :, None] * m.u[..., None, :]
        uud = uud + np.swapaxes(uud, -1, -2)  # d(u u^T)/dt
        lam = kappa[..., None, None] * (np.eye(3) - uu) + mu[:, None, None] * uu
        lam_d = kappa_d[..., None, None] * (np.eye(3) - uu) + (mu[:, None, None] - kappa[..., None, None]) * uud
        g_mat = self._leg_map(m.r)
        rd = cross(w[:, None, :], m.r)  # dr/dt = omega x r
        g_d = np.zeros_like(g_mat)
        g_d[..., 3:] = -skew(rd.reshape(-1, 3)).reshape(n, 6, 3, 3)
        sym = np.einsum("njai,njak->nik", g_d, lam @ g_mat)  # sum_j dG_j^T Lambda_j G_j
        mxd += sym + np.swapaxes(sym, 1, 2) + np.einsum("njai,njak->nik", g_mat, lam_d @ g_mat)
        return mxd

    def _inverse_jacobian_rate(self, m: _LegMotion, twist: Array) -> Array:
        """d(J_inv)/dt (N, 6, 6): rows ``[ud^T, (rd x u + r x ud)^T]``, ``rd = omega x r``."""
        rd = cross(twist[:, None, 3:], m.r)
        return np.concatenate([m.ud, cross(rd, m.u) + cross(m.r, m.ud)], axis=2)

    def mass_matrix(self, q: Array, theta_p: Array) -> Array:
        """M (N, 6, 6) = J^T M_x J [kg], symmetric positive definite (through FK)."""
        theta = self._theta(theta_p) + self._theta_platform
        p, R = self.forward_kinematics(q)
        j_inv = self._inverse_jacobian(p, R)
        jac = self._checked_inverse(j_inv)
        return self._actuator_mass_matrix(jac, self._platform_mass_matrix(p, R, theta))

    @staticmethod
    def _actuator_mass_matrix(jac: Array, mx: Array) -> Array:
        mq = np.swapaxes(jac, 1, 2) @ mx @ jac  # M = J^T M_x J
        return (mq + np.swapaxes(mq, 1, 2)) / 2.0

    def mass_matrix_rate(self, q: Array, qd: Array, theta_p: Array) -> Array:
        """dM/dt (N, 6, 6) along (q, qd), exact.

        ``dM/dt = J^T (dM_x/dt) J - K^T M - M K`` with ``K = (dJ_inv/dt) J`` (from ``dJ/dt = -J (dJ_inv/dt) J``).
        """
        return self._mass_terms(q, qd, self._theta(theta_p))[1]

    def _mass_terms(self, q: Array, qd: Array, theta_in: Array) -> tuple[Array, Array, tuple[Array, ...]]:
        """(M, dM/dt, (p, R, J, twist, leg motion at zero accel)) from one forward kinematics."""
        theta = theta_in + self._theta_platform
        q = _checked("q", q, (None, 6))
        qd = _checked("qd", qd, (q.shape[0], 6))
        p, R = self.forward_kinematics(q)
        jac = self._checked_inverse(self._inverse_jacobian(p, R))
        twist = _mv(jac, qd)
        m = self._leg_motion(p, R, twist, np.zeros_like(twist))
        mq = self._actuator_mass_matrix(jac, self._platform_mass_matrix(p, R, theta))
        mq_x = self._actuator_mass_matrix(jac, self._platform_mass_matrix_rate(p, R, twist, theta))
        k = self._inverse_jacobian_rate(m, twist) @ jac  # K = (d J_inv / dt) J
        return mq, mq_x - np.swapaxes(k, 1, 2) @ mq - mq @ k, (p, R, jac, twist, m)

    def momentum_terms(self, q: Array, qd: Array, theta_p: Array) -> tuple[Array, Array]:
        """(M (N, 6, 6) [kg], beta (N, 6) [N]) for the momentum observer, from one forward kinematics.

        ``beta = h - dM/dt qd``: the terms :meth:`mass_matrix`, :meth:`bias_efforts` and
        :meth:`mass_matrix_rate` give one by one (each solving the forward kinematics again), with the pose,
        Jacobian and twist shared. ``h = F(q, qd, qdd = 0)``: the platform acceleration at zero leg acceleration
        is ``-J c`` (see :meth:`platform_motion`).
        """
        theta_in = self._theta(theta_p)
        mq, md, (p, R, jac, twist, m) = self._mass_terms(q, qd, theta_in)
        tau_known, y_p = self._platform_regressor(p, R, twist, _mv(jac, -m.qdd))  # m.qdd = c at zero accel
        h = tau_known + y_p @ theta_in
        return mq, h - _mv(md, qd)

    # ------------------------------------------------------------------ energy

    def kinetic_energy_from_platform(self, p: Array, R: Array, twist: Array, theta_p: Array) -> Array:
        """T (N,) [J], summed body by body: platform and payload, both parts of every leg, the rotors."""
        p, R = self._pose(p, R)
        twist = _checked("twist", twist, (p.shape[0], 6))
        theta = self._theta(theta_p) + self._theta_platform
        prm = self.params
        m = self._leg_motion(p, R, twist, np.zeros_like(twist))
        v1 = prm.lower_leg_com_m * m.ud  # velocity of c_1
        v2 = m.qd[..., None] * m.u + (m.q[..., None] - prm.upper_leg_com_m) * m.ud  # velocity of c_2
        w2 = _dot(m.omega, m.omega)
        t_legs = 0.5 * (
            prm.lower_leg_mass_kg * _dot(v1, v1)
            + prm.upper_leg_mass_kg * _dot(v2, v2)
            + (prm.lower_leg_inertia_kg_m2 + prm.upper_leg_inertia_kg_m2) * w2
            + self._j_eq * m.qd**2
        ).sum(axis=1)
        mass, h, i_o = self._body_blocks(R, theta)
        v, w = twist[:, :3], twist[:, 3:]
        # rigid body about a body point O:  T = m |v|^2 / 2 + v . (omega x h) + omega^T I_O omega / 2
        t_body = 0.5 * mass * _dot(v, v) + _dot(v, cross(w, h)) + 0.5 * np.einsum("ni,nij,nj->n", w, i_o, w)
        return t_body + t_legs

    def potential_energy_from_platform(self, p: Array, R: Array, theta_p: Array) -> Array:
        """V (N,) [J] = -g . (sum of m_k c_k), zero at the base-frame origin."""
        p, R = self._pose(p, R)
        theta = self._theta(theta_p) + self._theta_platform
        prm = self.params
        u = self.leg_directions(p, R)
        q = self.inverse_kinematics(p, R)[..., None]
        first_moment = (
            prm.lower_leg_mass_kg * (self._B + prm.lower_leg_com_m * u)
            + prm.upper_leg_mass_kg * (self._B + (q - prm.upper_leg_com_m) * u)
        ).sum(axis=1)
        first_moment += theta[0] * p + R @ theta[1:4]
        return -first_moment @ self._g

    def kinetic_energy(self, q: Array, qd: Array, theta_p: Array) -> Array:
        """T (N,) [J] in actuator coordinates (through FK)."""
        q = _checked("q", q, (None, 6))
        p, R, twist, _ = self.platform_motion(q, qd, np.zeros_like(q))
        return self.kinetic_energy_from_platform(p, R, twist, theta_p)

    def potential_energy(self, q: Array, theta_p: Array) -> Array:
        """V (N,) [J] in actuator coordinates (through FK)."""
        p, R = self.forward_kinematics(q)
        return self.potential_energy_from_platform(p, R, theta_p)


__all__ = [
    "DEFAULT_MAX_CONDITION",
    "ForwardKinematicsResult",
    "HexapodModel",
    "platform_wrench_regressor",
]
