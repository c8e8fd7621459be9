"""Delta robot: closed-form kinematics and exact rigid-body inverse dynamics in actuator coordinates.

Three rotary actuators on the base drive upper arms; each arm carries a parallelogram forearm pair to
the travelling platform, which only translates. Conventions (frames, signs, names) are those of
:mod:`shadow.robots.parameters`.

Symbols (every array carries the sample axis N first; leg index i = 0, 1, 2)
---------------------------------------------------------------------------
q, qd, qdd : (N, 3) actuator angles theta_i [rad], rates [rad/s], accelerations [rad/s^2]
x, xd, xdd : (N, 3) platform position [m] in the base frame, velocity [m/s], acceleration [m/s^2]
r_i, u_i   : (3,) radial and tangential unit vectors of leg i; u_i = z x r_i is the actuator axis
E          : (N, 3, 3) elbow points E_i = R_b r_i + L_a (cos theta_i r_i - sin theta_i z) [m]
e1, e2     : (N, 3, 3) dE_i/dtheta_i [m/rad] and d^2E_i/dtheta_i^2 [m/rad^2]
d          : (N, 3, 3) forearm vectors d_i = P_i - E_i = x + R_p r_i - E_i, |d_i| = L_f [m]
A, B       : (N, 3, 3) closure derivative A xd = B qd with rows A_i = d_i^T, B = diag(d_i . e1_i) [m^2]
J          : (N, 3, 3) platform Jacobian J = A^-1 B, xd = J qd [m/rad]
Jd         : (N, 3, 3) dJ/dt = A^-1 (dB/dt - dA/dt J)
M, h       : (N, 3, 3) mass matrix [kg m^2], (N, 3) bias efforts [N m]: tau = M qdd + h
theta_p    : (1,) payload parameters: [payload mass m_L in kg], a point mass moving with the platform

Dynamics
--------
Kinetic energy T = 1/2 sum_i I_i thetad_i^2 + 1/2 (m_p + m_L) |xd|^2 + sum_i T_f,i with the rotor-side
inertia I_i = J_a + J_m n^2 and, for the forearm pair modelled as one uniform slender rod from E_i to P_i
(velocity linear along its length, no axial inertia),
T_f = m_f/6 (|vE|^2 + vE.vP + |vP|^2)   [the integral of 1/2 (m_f/L_f) |v(s)|^2 ds with the velocity
v(s) = (1 - s/L_f) vE + (s/L_f) vP linear along the rod; Simpson's rule is exact for it: m/6, 2m/3, m/6 at
end, middle, end]
written as T_f = m_f (w_ee/2 |vE|^2 + w_ep vE.vP + w_pp/2 |vP|^2): rod (1/3, 1/6, 1/3); "lumped" (1/2, 0, 1/2),
the common simplification with half the mass at each end (common practice, no source).
Potential V = -g . (sum_i m_a (B_i + c_a a_i) + m_f sum_i (E_i + P_i)/2 + (m_p + m_L) x), a_i the arm direction.

Lagrange's equations for a kinetic energy that is a constant quadratic form of the body-point velocities
v_b = A_b(q) qd give the projected Newton-Euler form tau = sum_b A_b^T W_b (A_b qdd + dA_b/dt qd) + dV/dq
(Lagrange's equations, e.g. Siciliano et al., Robotics: Modelling, Planning and Control, 2009, ch. 7; the same
as Kane's method; chapter from memory).
:meth:`DeltaModel.inverse_dynamics` evaluates it from the point accelerations; :meth:`DeltaModel.mass_matrix`
and :meth:`DeltaModel.bias_efforts` assemble M = sum_b A_b^T W_b A_b and h = sum_b A_b^T W_b dA_b/dt qd + dV/dq.
Platform acceleration from the twice differentiated closure |d_i|^2 = L_f^2:
d_i . xdd = b_i thetadd_i + d_i . e2_i thetad_i^2 - |dd_i/dt|^2   (b_i = d_i . e1_i).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal, NamedTuple

import numpy as np
from numpy.typing import NDArray

from shadow.errors import (
    DescriptionError,
    ShapeError,
    SingularPoseError,
    UnreachablePoseError,
    expect_finite,
    expect_shape,
)
from shadow.robots.parameters import DeltaParameters
from shadow.robots.rotations import cross

Array = NDArray[np.float64]
ForearmModel = Literal["rod", "lumped"]

DEFAULT_MAX_CONDITION = 1.0e8  # largest accepted Frobenius condition number of A or J [-]

# forearm kinetic-energy weights (w_ee, w_ep, w_pp), see the module docstring
_FOREARM_WEIGHTS: dict[str, tuple[float, float, float]] = {
    "rod": (1.0 / 3.0, 1.0 / 6.0, 1.0 / 3.0),
    "lumped": (0.5, 0.0, 0.5),
}


class _Kinematics(NamedTuple):
    """Position-level quantities of one batch (private)."""

    x: Array  # (N, 3) platform position
    E: Array  # (N, 3, 3) elbows
    e1: Array  # (N, 3, 3) dE_i/dtheta_i
    e2: Array  # (N, 3, 3) d^2E_i/dtheta_i^2
    d: Array  # (N, 3, 3) forearm vectors = rows of A
    b: Array  # (N, 3) diagonal of B
    A_inv: Array  # (N, 3, 3) inverse of A
    J: Array  # (N, 3, 3) platform Jacobian


class _Rates(NamedTuple):
    """Velocity-level quantities of one batch (private)."""

    xd: Array  # (N, 3) platform velocity
    dd: Array  # (N, 3, 3) d(d_i)/dt
    Jd: Array  # (N, 3, 3) dJ/dt


def _as_batch(name: str, a: Array, width: int = 3) -> Array:
    """Float copy of a (N, width) input, checked for shape and finiteness."""
    arr = np.asarray(a, dtype=np.float64)
    expect_shape(name, arr, (None, width))
    expect_finite(name, arr)
    return arr


def _inverse_3x3(A: Array) -> tuple[Array, Array]:
    """(A^-1 (N, 3, 3), det A (N,)) by the adjugate: columns of A^-1 are a1 x a2, a2 x a0, a0 x a1 over det.

    Rows a_i of A; det A = a0 . (a1 x a2). Callers check the conditioning before using the inverse.
    """
    a0, a1, a2 = A[:, 0], A[:, 1], A[:, 2]
    adj = np.stack([cross(a1, a2), cross(a2, a0), cross(a0, a1)], axis=2)  # adj(A), columns
    det = np.einsum("nk,nk->n", a0, adj[:, :, 0])
    with np.errstate(divide="ignore", invalid="ignore"):
        return adj / det[:, None, None], det


def _frobenius_condition(A: Array, A_inv: Array) -> Array:
    """kappa_F = |A|_F |A^-1|_F (N,), an upper bound of the 2-norm condition number (<= 3 times it)."""
    return np.sqrt(np.sum(A**2, axis=(1, 2)) * np.sum(A_inv**2, axis=(1, 2)))


@dataclass(frozen=True, slots=True)
class DeltaModel:
    """Rigid-body model of a delta robot in actuator coordinates (implements ``Mechanism``).

    Parameters
    ----------
    params : DeltaParameters
        Geometry, masses and drives.
    forearm_model : {"rod", "lumped"}
        ``"rod"`` (default): each forearm pair is one uniform slender rod (exact);
        ``"lumped"``: half of ``m_f`` at each end, no rod rotational inertia.
    """

    params: DeltaParameters
    forearm_model: ForearmModel = "rod"
    _r: Array = field(init=False, repr=False, compare=False)  # (3, 3) rows r_i
    _u: Array = field(init=False, repr=False, compare=False)  # (3, 3) rows u_i
    _rotor_inertia: Array = field(init=False, repr=False, compare=False)  # (3,) I_i = J_a + J_m n^2

    def __post_init__(self) -> None:
        if self.forearm_model not in _FOREARM_WEIGHTS:
            raise DescriptionError(f"forearm_model: expected 'rod' or 'lumped', got {self.forearm_model!r}")
        p = self.params
        phi = p.first_leg_azimuth_rad + 2.0 * np.pi * np.arange(3) / 3.0  # phi_i = phi_0 + 2 pi i / 3
        r = np.stack([np.cos(phi), np.sin(phi), np.zeros(3)], axis=1)  # r_i
        u = np.stack([-np.sin(phi), np.cos(phi), np.zeros(3)], axis=1)  # u_i = z x r_i
        inertia = np.array([p.upper_arm_inertia_kg_m2 + d.rotor_inertia_kg_m2 * d.gear_ratio**2 for d in p.drives])
        object.__setattr__(self, "_r", r)
        object.__setattr__(self, "_u", u)
        object.__setattr__(self, "_rotor_inertia", inertia)

    # ------------------------------------------------------------------ Mechanism sizes
    @property
    def n_actuators(self) -> int:
        """n = 3."""
        return 3

    @property
    def n_payload_parameters(self) -> int:
        """p = 1 (payload mass)."""
        return 1

    def platform_dof(self) -> int:
        """k = 3 (translation only)."""
        return 3

    @property
    def radial_directions(self) -> Array:
        """(3, 3) rows r_i, the legs' radial unit vectors in the base frame."""
        return self._r.copy()

    @property
    def axis_directions(self) -> Array:
        """(3, 3) rows u_i = z x r_i, the actuator axes in the base frame."""
        return self._u.copy()

    @property
    def rotor_side_inertia(self) -> Array:
        """(3,) I_i = J_a + J_m,i n_i^2 [kg m^2], arm plus reflected rotor inertia about each axis."""
        return self._rotor_inertia.copy()

    # ------------------------------------------------------------------ kinematics
    def elbows(self, q: Array) -> Array:
        """Elbow points E_i (N, 3, 3) [m], E_i = R_b r_i + L_a (cos theta_i r_i - sin theta_i z)."""
        q = _as_batch("q", q)
        return self._elbow_terms(q)[0]

    def _elbow_terms(self, q: Array) -> tuple[Array, Array, Array]:
        """(E, dE/dtheta, d^2E/dtheta^2), each (N, 3 legs, 3 xyz)."""
        p = self.params
        c = np.cos(q)[:, :, None]
        s = np.sin(q)[:, :, None]
        r = self._r[None, :, :]
        z = np.array([0.0, 0.0, 1.0])
        E = p.base_radius_m * r + p.upper_arm_length_m * (c * r - s * z)  # E_i
        e1 = p.upper_arm_length_m * (-s * r - c * z)  # dE_i/dtheta_i
        e2 = p.upper_arm_length_m * (-c * r + s * z)  # d^2E_i/dtheta_i^2
        return E, e1, e2

    def inverse_kinematics(self, x: Array) -> Array:
        """Actuator angles q (N, 3) [rad] for platform positions x (N, 3) [m], elbow-out branch.

        With c = x + (R_p - R_b) r_i (platform point relative to the axis point), a = c.r_i, w = c.z,
        closure gives a cos theta - w sin theta = K = (|c|^2 + L_a^2 - L_f^2) / (2 L_a), so
        theta = -atan2(w, a) - arccos(K / sqrt(a^2 + w^2)) (the elbow on the outer side of the line
        from the axis to the platform point).

        Raises
        ------
        UnreachablePoseError
            naming the first sample and leg that cannot close, and the miss distance [m].
        """
        x = _as_batch("x", x)
        p = self.params
        La, Lf = p.upper_arm_length_m, p.forearm_length_m
        c = x[:, None, :] + (p.platform_radius_m - p.base_radius_m) * self._r[None]  # (N, 3, 3)
        a = np.einsum("nik,ik->ni", c, self._r)  # c . r_i
        t = np.einsum("nik,ik->ni", c, self._u)  # c . u_i (off the arm's plane)
        w = c[:, :, 2]  # c . z
        rho = np.hypot(a, w)
        K = (np.einsum("nik,nik->ni", c, c) + La**2 - Lf**2) / (2.0 * La)
        bad = np.abs(K) > rho
        if bad.any():
            n, i = (int(k) for k in np.argwhere(bad)[0])
            d_min = np.hypot(t[n, i], rho[n, i] - La)  # nearest and farthest elbow-to-point distances
            d_max = np.hypot(t[n, i], rho[n, i] + La)
            miss = max(d_min - Lf, Lf - d_max)
            raise UnreachablePoseError(
                f"x[{n}]: leg {i} cannot reach the platform point; the forearm misses it by {miss:.6g} m"
            )
        theta = -np.arctan2(w, a) - np.arccos(K / rho)
        return (theta + np.pi) % (2.0 * np.pi) - np.pi  # wrap to [-pi, pi)

    def forward_kinematics(self, q: Array) -> Array:
        """Platform positions x (N, 3) [m] for actuator angles q (N, 3) [rad].

        Intersection of the spheres of radius L_f about C_i = E_i - R_p r_i (trilateration in the frame
        e_x = (C_1 - C_0)/|.|, e_y in the plane of the centres, e_z = e_x x e_y); the solution below the
        centres' plane (smaller z) is returned.

        Raises
        ------
        UnreachablePoseError
            if the three spheres do not meet, naming the sample and the miss distance [m].
        SingularPoseError
            if the sphere centres are collinear.
        """
        q = _as_batch("q", q)
        return self._forward(q)

    def _forward(self, q: Array) -> Array:
        p = self.params
        Lf = p.forearm_length_m
        E = self._elbow_terms(q)[0]
        C = E - p.platform_radius_m * self._r[None]  # sphere centres C_i = E_i - R_p r_i
        c0, c1, c2 = C[:, 0], C[:, 1], C[:, 2]
        d01 = c1 - c0
        dist = np.linalg.norm(d01, axis=1)  # |C_1 - C_0|
        ex = d01 / dist[:, None]
        d02 = c2 - c0
        i_ = np.einsum("nk,nk->n", ex, d02)  # e_x . (C_2 - C_0)
        ey_raw = d02 - i_[:, None] * ex
        j_ = np.linalg.norm(ey_raw, axis=1)
        if np.any(j_ <= 1e-12 * (1.0 + dist)):
            n = int(np.argmax(j_ <= 1e-12 * (1.0 + dist)))
            raise SingularPoseError(f"q[{n}]: the forearm sphere centres are collinear")
        ey = ey_raw / j_[:, None]
        ez = cross(ex, ey)
        X = dist / 2.0  # equal radii: X = (r0^2 - r1^2 + dist^2) / (2 dist)
        Y = (i_**2 + j_**2) / (2.0 * j_) - i_ * X / j_  # Y = (r0^2 - r2^2 + i^2 + j^2)/(2 j) - i X / j
        Z2 = Lf**2 - X**2 - Y**2
        if np.any(Z2 < 0.0):
            n = int(np.argmax(Z2 < 0.0))
            miss = float(np.hypot(X[n], Y[n]) - Lf)  # the point equidistant from all centres is this far out
            raise UnreachablePoseError(
                f"q[{n}]: the forearms cannot close; the spheres about the elbows miss by {miss:.6g} m"
            )
        sign = np.where(ez[:, 2] > 0.0, -1.0, 1.0)  # choose the lower of the two intersections
        return c0 + X[:, None] * ex + Y[:, None] * ey + (sign * np.sqrt(Z2))[:, None] * ez

    def check_reachable(self, q: Array) -> None:
        """Raise UnreachablePoseError if q leaves the joint limits or the forearms cannot close.

        The message names the sample, the actuator and by how much the limit is exceeded [rad].
        """
        q = _as_batch("q", q)
        lo = np.asarray(self.params.joint_lower_rad, dtype=float)
        hi = np.asarray(self.params.joint_upper_rad, dtype=float)
        out = (q < lo) | (q > hi)
        if out.any():
            n, i = (int(k) for k in np.argwhere(out)[0])
            excess = max(lo[i] - q[n, i], q[n, i] - hi[i])
            raise UnreachablePoseError(
                f"q[{n}]: actuator {i} at {q[n, i]:.6g} rad is outside its limits "
                f"[{lo[i]:.6g}, {hi[i]:.6g}] rad by {excess:.6g} rad"
            )
        self._forward(q)

    def _kinematics(self, q: Array, x: Array | None = None, *, max_condition: float) -> _Kinematics:
        """Position-level terms; raises SingularPoseError if A is too ill-conditioned to invert."""
        p = self.params
        if x is None:
            x = self._forward(q)
        E, e1, e2 = self._elbow_terms(q)
        d = x[:, None, :] + p.platform_radius_m * self._r[None] - E  # d_i = P_i - E_i
        b = np.einsum("nik,nik->ni", d, e1)  # B_ii = d_i . e1_i
        A_inv, det = _inverse_3x3(d)
        cond_a = np.where(det == 0.0, np.inf, _frobenius_condition(d, A_inv))
        if np.any(~(cond_a <= max_condition)):
            n = int(np.argmax(~(cond_a <= max_condition)))
            raise SingularPoseError(
                f"q[{n}]: forearms nearly coplanar-parallel (Frobenius condition number of A {cond_a[n]:.3g} "
                f"> max_condition {max_condition:.3g}); the platform is uncontrolled here"
            )
        J = A_inv * b[:, None, :]  # J = A^-1 B, B diagonal: column j of A^-1 times b_j
        return _Kinematics(x=x, E=E, e1=e1, e2=e2, d=d, b=b, A_inv=A_inv, J=J)

    def _rates(self, kin: _Kinematics, qd: Array) -> _Rates:
        """Velocity-level terms: xd = J qd, dd_i/dt = xd - e1_i thetad_i, dJ/dt = A^-1 (dB/dt - dA/dt J)."""
        xd = np.einsum("nij,nj->ni", kin.J, qd)
        dd = xd[:, None, :] - kin.e1 * qd[:, :, None]  # d(d_i)/dt
        bd = np.einsum("nik,nik->ni", dd, kin.e1) + np.einsum("nik,nik->ni", kin.d, kin.e2) * qd  # dB_ii/dt
        rhs = bd[:, :, None] * np.eye(3)[None] - dd @ kin.J  # dB/dt - dA/dt J
        return _Rates(xd=xd, dd=dd, Jd=kin.A_inv @ rhs)

    def platform_jacobian(self, q: Array, *, max_condition: float = DEFAULT_MAX_CONDITION) -> Array:
        """J (N, 3, 3) [m/rad] with xd = J qd, from A xd = B qd (derivative of |P_i - E_i|^2 = L_f^2).

        Raises
        ------
        SingularPoseError
            if the Frobenius condition number of A exceeds ``max_condition`` (parallel singularity).
        """
        q = _as_batch("q", q)
        return self._kinematics(q, max_condition=max_condition).J

    def jacobian_condition(self, q: Array) -> Array:
        """2-norm condition number of J (N,) [-]; ``inf`` at a parallel (A) or serial (B) singularity."""
        q = _as_batch("q", q)
        p = self.params
        x = self._forward(q)
        E, e1, _ = self._elbow_terms(q)
        d = x[:, None, :] + p.platform_radius_m * self._r[None] - E
        b = np.einsum("nik,nik->ni", d, e1)
        sv = np.linalg.svd(d, compute_uv=False)
        scale = p.forearm_length_m * p.upper_arm_length_m
        singular = (sv[:, -1] <= 1e-15 * sv[:, 0]) | (np.min(np.abs(b), axis=1) <= 1e-15 * scale)
        A_safe = np.where(singular[:, None, None], np.eye(3)[None], d)
        J = np.linalg.solve(A_safe, b[:, :, None] * np.eye(3)[None])
        return np.where(singular, np.inf, np.linalg.cond(J))

    # ------------------------------------------------------------------ dynamics
    def _payload_mass(self, theta_p: Array) -> float:
        theta = np.asarray(theta_p, dtype=np.float64)
        expect_shape("theta_p", theta, (1,))
        expect_finite("theta_p", theta)
        return float(theta[0])

    def _gravity_efforts(self, kin: _Kinematics, m_L: float | Array) -> Array:
        """dV/dq (N, 3) [N m]: -sum_b A_b^T m_b g over arm centres, forearm centres and the platform.

        ``m_L`` is one payload mass [kg] or one per sample (N,).
        """
        p = self.params
        g = np.asarray(p.gravity_m_s2, dtype=float)
        arm = p.upper_arm_mass_kg * p.upper_arm_com_m / p.upper_arm_length_m + 0.5 * p.forearm_mass_kg
        m_plat = (
            p.platform_mass_kg + np.asarray(m_L)[..., None] + 1.5 * p.forearm_mass_kg
        )  # platform, payload, forearm halves
        own = -arm * np.einsum("nik,k->ni", kin.e1, g)  # -(m_a c_a / L_a + m_f / 2) e1_i . g
        return own - m_plat * np.einsum("nki,k->ni", kin.J, g)  # - m J^T g

    def inverse_dynamics(
        self, q: Array, qd: Array, qdd: Array, theta_p: Array, *, max_condition: float = DEFAULT_MAX_CONDITION
    ) -> Array:
        """Joint-side efforts tau (N, 3) [N m] for the motion (q, qd, qdd) and payload theta_p (1,) [kg].

        Projected Newton-Euler form tau = sum_b A_b^T W_b a_b + dV/dq from the point accelerations
        aE_i = e1_i thetadd_i + e2_i thetad_i^2 and the platform acceleration from the closure.
        """
        q, qd, qdd = _as_batch("q", q), _as_batch("qd", qd), _as_batch("qdd", qdd)
        _same_length(q, qd, qdd)
        m_L = self._payload_mass(theta_p)
        kin = self._kinematics(q, max_condition=max_condition)
        return self._inverse_dynamics(kin, qd, qdd, m_L)

    def _inverse_dynamics(self, kin: _Kinematics, qd: Array, qdd: Array, m_L: float) -> Array:
        p = self.params
        w_ee, w_ep, w_pp = _FOREARM_WEIGHTS[self.forearm_model]
        m_f = p.forearm_mass_kg
        xd = np.einsum("nij,nj->ni", kin.J, qd)
        dd = xd[:, None, :] - kin.e1 * qd[:, :, None]  # d(d_i)/dt
        aE = kin.e1 * qdd[:, :, None] + kin.e2 * (qd**2)[:, :, None]  # elbow accelerations
        # closure, twice differentiated: d_i . xdd = d_i . aE_i - |dd_i/dt|^2
        rhs = np.einsum("nik,nik->ni", kin.d, aE) - np.einsum("nik,nik->ni", dd, dd)
        xdd = np.einsum("nij,nj->ni", kin.A_inv, rhs)
        f_E = m_f * (w_ee * aE + w_ep * xdd[:, None, :])  # effective force at E_i: m_f (w_ee aE + w_ep aP)
        f_P = (p.platform_mass_kg + m_L) * xdd + m_f * (w_ep * aE.sum(axis=1) + 3.0 * w_pp * xdd)
        tau = self._rotor_inertia * qdd  # I_i thetadd_i
        tau = tau + np.einsum("nik,nik->ni", kin.e1, f_E)  # G_i^T f_E,i
        tau = tau + np.einsum("nki,nk->ni", kin.J, f_P)  # J^T f_P
        return tau + self._gravity_efforts(kin, m_L)

    def mass_matrix(self, q: Array, theta_p: Array, *, max_condition: float = DEFAULT_MAX_CONDITION) -> Array:
        """M (N, 3, 3) [kg m^2] = diag(I_i + w_ee m_f L_a^2) + m_x J^T J + w_ep m_f (K + K^T), K = e1 J.

        m_x = m_p + m_L + 3 w_pp m_f; row i of K is e1_i^T J.
        """
        q = _as_batch("q", q)
        m_L = self._payload_mass(theta_p)
        return self._mass_matrix(self._kinematics(q, max_condition=max_condition), m_L)

    def _mass_matrix(self, kin: _Kinematics, m_L: float | Array) -> Array:
        """M for one payload mass [kg] or one per sample (N,)."""
        p = self.params
        w_ee, w_ep, w_pp = _FOREARM_WEIGHTS[self.forearm_model]
        m_f = p.forearm_mass_kg
        m_x = self._moving_mass(m_L)
        G2 = np.einsum("nik,nik->ni", kin.e1, kin.e1)  # |e1_i|^2 = L_a^2
        K = kin.e1 @ kin.J  # row i: e1_i^T J
        M = (self._rotor_inertia + w_ee * m_f * G2)[:, :, None] * np.eye(3)[None]
        M = M + m_x * np.swapaxes(kin.J, 1, 2) @ kin.J
        return M + w_ep * m_f * (K + np.swapaxes(K, 1, 2))

    def _moving_mass(self, m_L: float | Array) -> Array:
        """m_x = m_p + m_L + 3 w_pp m_f, shaped (1, 1, 1) or (N, 1, 1) to scale (N, 3, 3) blocks."""
        w_pp = _FOREARM_WEIGHTS[self.forearm_model][2]
        m_x = self.params.platform_mass_kg + np.asarray(m_L, dtype=float) + 3.0 * w_pp * self.params.forearm_mass_kg
        return np.reshape(m_x, (-1, 1, 1))

    def bias_efforts(
        self, q: Array, qd: Array, theta_p: Array, *, max_condition: float = DEFAULT_MAX_CONDITION
    ) -> Array:
        """h (N, 3) [N m] = sum_b A_b^T W_b dA_b/dt qd + dV/dq, with dJ/dt from the closure."""
        q, qd = _as_batch("q", q), _as_batch("qd", qd)
        _same_length(q, qd)
        m_L = self._payload_mass(theta_p)
        kin = self._kinematics(q, max_condition=max_condition)
        return self._bias_efforts(kin, self._rates(kin, qd), qd, m_L)

    def _bias_efforts(self, kin: _Kinematics, rates: _Rates, qd: Array, m_L: float | Array) -> Array:
        p = self.params
        w_ee, w_ep, _ = _FOREARM_WEIGHTS[self.forearm_model]
        m_f = p.forearm_mass_kg
        m_x = self._moving_mass(m_L)[:, :, 0]  # (1 | N, 1)
        c = np.einsum("nij,nj->ni", rates.Jd, qd)  # dJ/dt qd
        aE0 = kin.e2 * (qd**2)[:, :, None]  # dG_i/dt qd
        h = m_f * np.einsum("nik,nik->ni", kin.e1, w_ee * aE0 + w_ep * c[:, None, :])
        h = h + np.einsum("nki,nk->ni", kin.J, m_x * c + w_ep * m_f * aE0.sum(axis=1))
        return h + self._gravity_efforts(kin, m_L)

    def mass_matrix_rate(
        self, q: Array, qd: Array, theta_p: Array, *, max_condition: float = DEFAULT_MAX_CONDITION
    ) -> Array:
        """dM/dt (N, 3, 3) [kg m^2/s] = m_x (Jd^T J + J^T Jd) + w_ep m_f (Kd + Kd^T), Kd = de1/dt J + e1 Jd.

        d|e1_i|^2/dt = 0 (the elbow moves on a circle), so the diagonal part is constant.
        """
        q, qd = _as_batch("q", q), _as_batch("qd", qd)
        _same_length(q, qd)
        m_L = self._payload_mass(theta_p)
        kin = self._kinematics(q, max_condition=max_condition)
        return self._mass_matrix_rate(kin, self._rates(kin, qd), qd, m_L)

    def _mass_matrix_rate(self, kin: _Kinematics, rates: _Rates, qd: Array, m_L: float | Array) -> Array:
        w_ep = _FOREARM_WEIGHTS[self.forearm_model][1]
        m_f = self.params.forearm_mass_kg
        JtJd = np.swapaxes(kin.J, 1, 2) @ rates.Jd
        Kd = (kin.e2 * qd[:, :, None]) @ kin.J + kin.e1 @ rates.Jd
        return self._moving_mass(m_L) * (JtJd + np.swapaxes(JtJd, 1, 2)) + w_ep * m_f * (Kd + np.swapaxes(Kd, 1, 2))

    def momentum_terms(
        self, q: Array, qd: Array, payload_mass_kg: Array, *, max_condition: float = DEFAULT_MAX_CONDITION
    ) -> tuple[Array, Array]:
        """(M (N, 3, 3) [kg m^2], beta (N, 3) [N m]) at each sample's own payload mass (N,) [kg], in one pass.

        What the momentum observer needs: the mass matrix of :meth:`mass_matrix` and ``beta = h - dM/dt qd``
        (:meth:`bias_efforts`, :meth:`mass_matrix_rate`), the same terms as those methods give, sharing one
        evaluation of the kinematics and its rates (the payload enters through ``m_x`` and gravity only).
        """
        q, qd = _as_batch("q", q), _as_batch("qd", qd)
        _same_length(q, qd)
        m_L = np.asarray(payload_mass_kg, dtype=np.float64)
        expect_shape("payload_mass_kg", m_L, (q.shape[0],))
        expect_finite("payload_mass_kg", m_L)
        kin = self._kinematics(q, max_condition=max_condition)
        rates = self._rates(kin, qd)
        Md = self._mass_matrix_rate(kin, rates, qd, m_L)
        beta = self._bias_efforts(kin, rates, qd, m_L) - np.einsum("nij,nj->ni", Md, qd)
        return self._mass_matrix(kin, m_L), beta

    def rigid_regressor(
        self, q: Array, qd: Array, qdd: Array, *, max_condition: float = DEFAULT_MAX_CONDITION
    ) -> tuple[Array, Array]:
        """(tau_known (N, 3) [N m], Y_p (N, 3, 1) [N m/kg]) with tau = tau_known + Y_p @ theta_p.

        The payload is a point mass at the platform: Y_p = J^T (xdd - g).
        """
        q, qd, qdd = _as_batch("q", q), _as_batch("qd", qd), _as_batch("qdd", qdd)
        _same_length(q, qd, qdd)
        kin = self._kinematics(q, max_condition=max_condition)
        tau_known = self._inverse_dynamics(kin, qd, qdd, 0.0)
        rates = self._rates(kin, qd)
        xdd = np.einsum("nij,nj->ni", kin.J, qdd) + np.einsum("nij,nj->ni", rates.Jd, qd)  # xdd = J qdd + Jd qd
        g = np.asarray(self.params.gravity_m_s2, dtype=float)
        Y = np.einsum("nki,nk->ni", kin.J, xdd - g)[:, :, None]
        return tau_known, Y

    def inverse_dynamics_from_platform(
        self, x: Array, xd: Array, xdd: Array, theta_p: Array, *, max_condition: float = DEFAULT_MAX_CONDITION
    ) -> tuple[Array, Array, Array, Array]:
        """(q, qd, qdd, tau), each (N, 3), for a platform motion (x, xd, xdd) [m, m/s, m/s^2].

        thetad_i = d_i . xd / b_i; thetadd_i = (d_i . xdd - d_i . e2_i thetad_i^2 + |dd_i/dt|^2) / b_i.

        Raises
        ------
        UnreachablePoseError
            if a position cannot be reached.
        SingularPoseError
            if the Frobenius condition number of A or J exceeds ``max_condition``.
        """
        x, xd, xdd = _as_batch("x", x), _as_batch("xd", xd), _as_batch("xdd", xdd)
        _same_length(x, xd, xdd)
        m_L = self._payload_mass(theta_p)
        q = self.inverse_kinematics(x)
        kin = self._kinematics(q, x, max_condition=max_condition)
        with np.errstate(divide="ignore", invalid="ignore"):
            J_inv = kin.d / kin.b[:, :, None]  # J^-1 = B^-1 A
        cond_j = np.where(np.any(kin.b == 0.0, axis=1), np.inf, _frobenius_condition(kin.J, J_inv))
        if np.any(~(cond_j <= max_condition)):
            n = int(np.argmax(~(cond_j <= max_condition)))
            raise SingularPoseError(
                f"x[{n}]: a forearm is nearly in line with its upper arm (Frobenius condition number of J "
                f"{cond_j[n]:.3g} > max_condition {max_condition:.3g})"
            )
        qd = np.einsum("nik,nk->ni", kin.d, xd) / kin.b  # B^-1 A xd
        dd = xd[:, None, :] - kin.e1 * qd[:, :, None]
        qdd = (
            np.einsum("nik,nk->ni", kin.d, xdd)
            - np.einsum("nik,nik->ni", kin.d, kin.e2) * qd**2
            + np.einsum("nik,nik->ni", dd, dd)
        ) / kin.b
        return q, qd, qdd, self._inverse_dynamics(kin, qd, qdd, m_L)

    # ------------------------------------------------------------------ energies
    def kinetic_energy(self, q: Array, qd: Array, theta_p: Array) -> Array:
        """T (N,) [J] from the body velocities: arms and rotors, platform and payload, forearm rods."""
        q, qd = _as_batch("q", q), _as_batch("qd", qd)
        _same_length(q, qd)
        m_L = self._payload_mass(theta_p)
        p = self.params
        w_ee, w_ep, w_pp = _FOREARM_WEIGHTS[self.forearm_model]
        kin = self._kinematics(q, max_condition=np.inf)
        vP = np.einsum("nij,nj->ni", kin.J, qd)  # platform (and every P_i) velocity
        vE = kin.e1 * qd[:, :, None]  # elbow velocities
        t_arms = 0.5 * np.sum(self._rotor_inertia * qd**2, axis=1)  # 1/2 I_i thetad_i^2
        t_plat = 0.5 * (p.platform_mass_kg + m_L) * np.sum(vP**2, axis=1)
        vv_ee = np.sum(vE**2, axis=(1, 2))
        vv_ep = np.einsum("nik,nk->n", vE, vP)
        vv_pp = 3.0 * np.sum(vP**2, axis=1)
        t_rods = p.forearm_mass_kg * (0.5 * w_ee * vv_ee + w_ep * vv_ep + 0.5 * w_pp * vv_pp)
        return t_arms + t_plat + t_rods

    def potential_energy(self, q: Array, theta_p: Array) -> Array:
        """V (N,) [J] = -g . (sum of mass times centre-of-mass position), zero at the base origin."""
        q = _as_batch("q", q)
        m_L = self._payload_mass(theta_p)
        p = self.params
        g = np.asarray(p.gravity_m_s2, dtype=float)
        x = self._forward(q)
        E = self._elbow_terms(q)[0]
        B = p.base_radius_m * self._r[None]
        arm_com = B + (p.upper_arm_com_m / p.upper_arm_length_m) * (E - B)
        P = x[:, None, :] + p.platform_radius_m * self._r[None]
        moment = (
            p.upper_arm_mass_kg * arm_com.sum(axis=1)
            + 0.5 * p.forearm_mass_kg * (E + P).sum(axis=1)
            + (p.platform_mass_kg + m_L) * x
        )
        return -moment @ g


def _same_length(*arrays: Array) -> None:
    """Raise ShapeError unless all arrays share the sample count N."""
    lengths = {a.shape[0] for a in arrays}
    if len(lengths) > 1:
        raise ShapeError(f"q, qd, qdd (or x, xd, xdd): sample counts differ: {[a.shape[0] for a in arrays]}")
