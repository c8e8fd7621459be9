"""M(q) and h(q, qd) of the rigid model at one integrator stage, with the kinematics evaluated once for both.

The models' public ``mass_matrix`` and ``bias_efforts`` each solve the kinematics of q again (for a delta the
closed-form forward kinematics, the elbow terms and the inverse of A; for a hexapod the forward kinematics, the
inverse Jacobian and its inverse). A plant stage needs both at the same q, so :func:`stage_terms` evaluates the
position-level terms once and hands them to the models' own private assembly functions: the numbers are those of
the public methods, operation for operation (bit for bit), only the repeated work is gone. Any other mechanism,
or a payload that differs between rows, goes through :func:`simulators.plant.mass_terms` and
:func:`simulators.plant.bias_terms` unchanged.

One delta (B = 1) is the exception to "operation for operation": :class:`DeltaStageTerms` evaluates the same
equations as :class:`shadow.robots.delta.DeltaModel` (trilateration for x, the adjugate inverse of A, J = A^-1 B,
dJ/dt = A^-1 (dB/dt - dA/dt J), M = diag(I_i + w_ee m_f |e1_i|^2) + m_x J^T J + w_ep m_f (K + K^T) and
h = m_f e1_i . (w_ee aE0_i + w_ep Jd qd) + J^T (m_x Jd qd + w_ep m_f sum aE0) + dV/dq; see that module) on Python
floats, because numpy's per-call overhead (about 1 us per call, some 150 calls) is most of the cost of a 3 x 3
problem. The sums run in a different order than einsum's, so the results agree with the model's to rounding
(a test checks 1e-12), not bit for bit. Any pose the model would refuse (collinear sphere centres, forearms that
cannot close, an ill-conditioned A) falls back to the model, which raises its own error.

Symbols as in :mod:`simulators.plant`: q, qd (B, n); theta_p (B, p); M (B, n, n); h (B, n).
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from shadow.errors import expect_finite
from shadow.robots.delta import _FOREARM_WEIGHTS, DeltaModel
from shadow.robots.delta import DEFAULT_MAX_CONDITION as DELTA_MAX_CONDITION
from shadow.robots.hexapod import HexapodModel
from shadow.robots.mechanism import Mechanism

Array = NDArray[np.float64]


def delta_terms(model: DeltaModel, q: Array, qd: Array, m_L: float, *, need_mass: bool) -> tuple[Array | None, Array]:
    """(M or None, h) of a delta at one payload mass m_L [kg], from one evaluation of its kinematics.

    The same calls as ``DeltaModel.mass_matrix`` and ``DeltaModel.bias_efforts`` (default ``max_condition``).
    """
    kin = model._kinematics(q, max_condition=DELTA_MAX_CONDITION)
    h = model._bias_efforts(kin, model._rates(kin, qd), qd, m_L)
    return (model._mass_matrix(kin, m_L) if need_mass else None), h


def hexapod_terms(
    model: HexapodModel, q: Array, qd: Array, theta: Array, *, need_mass: bool
) -> tuple[Array | None, Array]:
    """(M or None, h) of a hexapod at one payload theta (10,), sharing the pose, J_inv and J between M and h.

    h is ``HexapodModel.bias_efforts`` (the regressor at qdd = 0 through ``platform_motion``), M is
    ``HexapodModel.mass_matrix``; both start from the same forward kinematics and Jacobian.
    """
    p, R = model.forward_kinematics(q)
    jac = model._checked_inverse(model._inverse_jacobian(p, R))  # J = J_inv^-1, conditioning checked
    twist = np.einsum("nij,nj->ni", jac, qd)  # xi = J qd
    c = model._leg_motion(p, R, twist, np.zeros_like(twist)).qdd  # velocity product c (qdd at zero accel)
    accel = np.einsum("nij,nj->ni", jac, np.zeros_like(q) - c)  # xi_dot = J (qdd - c) at qdd = 0
    tau_known, y_p = model._platform_regressor(p, R, twist, accel)
    h = tau_known + y_p @ theta  # h = F(q, qd, 0)
    if not need_mass:
        return None, h
    mx = model._platform_mass_matrix(p, R, theta + model._theta_platform)
    return model._actuator_mass_matrix(jac, mx), h  # M = J^T M_x J


class DeltaStageTerms:
    """(M, h) of one delta's stage on Python floats (B = 1); other batch sizes go through :func:`delta_terms`.

    Parameters
    ----------
    model : the delta's rigid model; its constants are read once here.
    """

    def __init__(self, model: DeltaModel) -> None:
        p = model.params
        self.model = model
        self._w = _FOREARM_WEIGHTS[model.forearm_model]  # (w_ee, w_ep, w_pp)
        self._r = [(float(row[0]), float(row[1])) for row in model.radial_directions]  # (r_x, r_y), r_z = 0
        self._geometry = (
            float(p.base_radius_m),
            float(p.upper_arm_length_m),
            float(p.forearm_length_m),
            float(p.platform_radius_m),
        )
        self._inertia = [float(v) for v in model.rotor_side_inertia]  # I_i
        self._m_f = float(p.forearm_mass_kg)
        self._m_p = float(p.platform_mass_kg)
        self._arm = float(p.upper_arm_mass_kg * p.upper_arm_com_m / p.upper_arm_length_m + 0.5 * p.forearm_mass_kg)
        self._g = tuple(float(v) for v in np.asarray(p.gravity_m_s2, dtype=float))

    def __call__(self, q: Array, qd: Array | None, m_L: float, *, need_mass: bool) -> tuple[Array | None, Array | None]:
        """(M (B, 3, 3) or None, h (B, 3), or None when ``qd`` is None) for q, qd (B, 3), payload mass m_L [kg]."""
        if q.shape[0] == 1:
            q1 = q[0].tolist()
            qd1 = None if qd is None else qd[0].tolist()
            kin = self._kinematics(q1)
            if kin is not None:
                m = self._mass(kin, float(m_L)) if need_mass else None
                h = None if qd1 is None else self._bias(kin, qd1, float(m_L))
                return m, h
        if qd is None:
            return self.model._mass_matrix(self.model._kinematics(q, max_condition=DELTA_MAX_CONDITION), m_L), None
        return delta_terms(self.model, q, qd, m_L, need_mass=need_mass)

    def _kinematics(self, q: list[float]) -> tuple[list[tuple[float, float, float]], ...] | None:
        """(e1, e2, d, A^-1, J) as nested tuples, or None where the model would refuse the pose."""
        Rb, La, Lf, Rp = self._geometry
        sqrt = math.sqrt
        # elbow terms per leg: E_i = R_b r_i + L_a (c r_i - s z), e1 = dE/dtheta, e2 = d^2E/dtheta^2
        E, e1, e2 = [], [], []
        for (rx, ry), th in zip(self._r, q, strict=True):
            c, s = math.cos(th), math.sin(th)
            E.append((Rb * rx + La * (c * rx), Rb * ry + La * (c * ry), La * -s))
            e1.append((La * (-s * rx), La * (-s * ry), La * -c))
            e2.append((La * (-c * rx), La * (-c * ry), La * s))
        (r0x, r0y), (r1x, r1y), (r2x, r2y) = self._r
        # sphere centres C_i = E_i - R_p r_i; trilateration of the spheres of radius L_f, lower solution
        c0 = (E[0][0] - Rp * r0x, E[0][1] - Rp * r0y, E[0][2])
        ax, ay, az = E[1][0] - Rp * r1x - c0[0], E[1][1] - Rp * r1y - c0[1], E[1][2] - c0[2]  # C_1 - C_0
        bx, by, bz = E[2][0] - Rp * r2x - c0[0], E[2][1] - Rp * r2y - c0[1], E[2][2] - c0[2]  # C_2 - C_0
        dist = sqrt(ax * ax + ay * ay + az * az)
        exx, exy, exz = ax / dist, ay / dist, az / dist
        ii = exx * bx + exy * by + exz * bz
        yx, yy, yz = bx - ii * exx, by - ii * exy, bz - ii * exz
        jj = sqrt(yx * yx + yy * yy + yz * yz)
        if not jj > 1e-12 * (1.0 + dist):  # collinear centres: the model raises SingularPoseError
            return None
        eyx, eyy, eyz = yx / jj, yy / jj, yz / jj
        ezx, ezy, ezz = exy * eyz - exz * eyy, exz * eyx - exx * eyz, exx * eyy - exy * eyx
        X = dist / 2.0
        Y = (ii**2 + jj**2) / (2.0 * jj) - ii * X / jj
        Z2 = Lf**2 - X**2 - Y**2
        if not Z2 >= 0.0:  # the forearms cannot close: the model raises UnreachablePoseError
            return None
        Z = (-1.0 if ezz > 0.0 else 1.0) * sqrt(Z2)
        x0 = c0[0] + X * exx + Y * eyx + Z * ezx
        x1 = c0[1] + X * exy + Y * eyy + Z * ezy
        x2 = c0[2] + X * exz + Y * eyz + Z * ezz
        # A rows d_i = P_i - E_i = x + R_p r_i - E_i
        d = [(x0 + Rp * rx - e[0], x1 + Rp * ry - e[1], x2 - e[2]) for (rx, ry), e in zip(self._r, E, strict=True)]
        (p0, p1, p2), (q0, q1, q2), (s0, s1, s2) = d
        # A^-1 by the adjugate: columns d1 x d2, d2 x d0, d0 x d1 over det A = d0 . (d1 x d2)
        a0 = (q1 * s2 - q2 * s1, q2 * s0 - q0 * s2, q0 * s1 - q1 * s0)
        a1 = (s1 * p2 - s2 * p1, s2 * p0 - s0 * p2, s0 * p1 - s1 * p0)
        a2 = (p1 * q2 - p2 * q1, p2 * q0 - p0 * q2, p0 * q1 - p1 * q0)
        det = p0 * a0[0] + p1 * a0[1] + p2 * a0[2]
        if det == 0.0:
            return None
        Ai = tuple((a0[i] / det, a1[i] / det, a2[i] / det) for i in range(3))  # A^-1[i][j]
        norm_a = sum(v * v for row in d for v in row)
        norm_ai = sum(v * v for row in Ai for v in row)
        if not sqrt(norm_a * norm_ai) <= DELTA_MAX_CONDITION:  # Frobenius condition of A: the model refuses it
            return None
        b = [d[i][0] * e1[i][0] + d[i][1] * e1[i][1] + d[i][2] * e1[i][2] for i in range(3)]  # B_ii = d_i . e1_i
        J = tuple((row[0] * b[0], row[1] * b[1], row[2] * b[2]) for row in Ai)  # J = A^-1 B
        return e1, e2, d, Ai, J

    def _bias(self, kin: tuple[list[tuple[float, float, float]], ...], qd: list[float], m_L: float) -> Array:
        """h (1, 3) = m_f e1_i . (w_ee aE0_i + w_ep c) + J^T (m_x c + w_ep m_f sum aE0) + dV/dq, c = dJ/dt qd."""
        e1, e2, d, Ai, J = kin
        w_ee, w_ep, w_pp = self._w
        m_f = self._m_f
        g0, g1, g2 = self._g
        v0, v1, v2 = qd
        xd = [row[0] * v0 + row[1] * v1 + row[2] * v2 for row in J]  # xd = J qd
        w = []
        for i in range(3):
            e, f, di, vi = e1[i], e2[i], d[i], qd[i]
            dd0, dd1, dd2 = xd[0] - e[0] * vi, xd[1] - e[1] * vi, xd[2] - e[2] * vi  # dd_i/dt = xd - e1_i qd_i
            bd = dd0 * e[0] + dd1 * e[1] + dd2 * e[2] + (di[0] * f[0] + di[1] * f[1] + di[2] * f[2]) * vi
            w.append(bd * vi - (dd0 * xd[0] + dd1 * xd[1] + dd2 * xd[2]))  # ((dB/dt - dA/dt J) qd)_i
        c = [row[0] * w[0] + row[1] * w[1] + row[2] * w[2] for row in Ai]  # c = dJ/dt qd = A^-1 (...) qd
        aE = [(f[0] * vi * vi, f[1] * vi * vi, f[2] * vi * vi) for f, vi in zip(e2, qd, strict=True)]  # e2_i qd_i^2
        m_x = self._m_p + m_L + 3.0 * w_pp * m_f
        m_plat = self._m_p + m_L + 1.5 * m_f
        k = w_ep * m_f
        f_p = [m_x * c[j] + k * (aE[0][j] + aE[1][j] + aE[2][j]) - m_plat * gj for j, gj in enumerate((g0, g1, g2))]
        h = []
        for i in range(3):
            e, a = e1[i], aE[i]
            own = m_f * (
                e[0] * (w_ee * a[0] + w_ep * c[0])
                + e[1] * (w_ee * a[1] + w_ep * c[1])
                + e[2] * (w_ee * a[2] + w_ep * c[2])
            )
            arm = -self._arm * (e[0] * g0 + e[1] * g1 + e[2] * g2)  # -(m_a c_a / L_a + m_f / 2) e1_i . g
            h.append(own + arm + J[0][i] * f_p[0] + J[1][i] * f_p[1] + J[2][i] * f_p[2])  # + J^T (f_P - m g)
        return np.array([h])

    def _mass(self, kin: tuple[list[tuple[float, float, float]], ...], m_L: float) -> Array:
        """M (1, 3, 3) = diag(I_i + w_ee m_f |e1_i|^2) + m_x J^T J + w_ep m_f (K + K^T), K = e1 J."""
        e1, _, _, _, J = kin
        w_ee, w_ep, w_pp = self._w
        m_f = self._m_f
        m_x = self._m_p + m_L + 3.0 * w_pp * m_f
        k = w_ep * m_f
        (j00, j01, j02), (j10, j11, j12), (j20, j21, j22) = J
        cols = ((j00, j10, j20), (j01, j11, j21), (j02, j12, j22))  # columns of J
        K = [[e[0] * col[0] + e[1] * col[1] + e[2] * col[2] for col in cols] for e in e1]  # row i: e1_i^T J
        M = [
            [
                m_x * (ci[0] * cj[0] + ci[1] * cj[1] + ci[2] * cj[2]) + k * (K[i][j] + K[j][i])
                for j, cj in enumerate(cols)
            ]
            for i, ci in enumerate(cols)
        ]
        for i, e in enumerate(e1):
            M[i][i] += self._inertia[i] + w_ee * m_f * (e[0] * e[0] + e[1] * e[1] + e[2] * e[2])
        return np.array([M])


class SharedRigidTerms:
    """(M or None, h) of a mechanism for one payload theta (p,) shared by all rows, through its fast route.

    Build with :meth:`for_mechanism`, which returns None for a mechanism without one (the plant then uses
    :func:`simulators.plant.mass_terms` and :func:`simulators.plant.bias_terms`).
    """

    def __init__(self, mechanism: DeltaModel | HexapodModel) -> None:
        self.mechanism = mechanism
        self._delta = DeltaStageTerms(mechanism) if isinstance(mechanism, DeltaModel) else None

    @classmethod
    def for_mechanism(cls, mechanism: Mechanism) -> SharedRigidTerms | None:
        """The fast route of a delta or hexapod model, None for any other mechanism."""
        if type(mechanism) is DeltaModel or isinstance(mechanism, HexapodModel):
            return cls(mechanism)
        return None

    def __call__(self, q: Array, qd: Array, theta: Array, *, need_mass: bool) -> tuple[Array | None, Array]:
        """(M (B, n, n) or None, h (B, n)); q, qd (B, n) are checked to be finite, as the models' methods do."""
        mech = self.mechanism
        if self._delta is not None and isinstance(mech, DeltaModel):
            if q.shape[0] == 1 and theta.shape == (1,):  # one delta: the same checks on floats
                values = q[0].tolist() + qd[0].tolist()
                if all(map(math.isfinite, values)) and math.isfinite(theta[0]):
                    return self._delta(q, qd, float(theta[0]), need_mass=need_mass)
            expect_finite("q", q)
            expect_finite("qd", qd)
            return self._delta(q, qd, mech._payload_mass(theta), need_mass=need_mass)
        expect_finite("q", q)
        expect_finite("qd", qd)
        if isinstance(mech, HexapodModel):
            return hexapod_terms(mech, q, qd, model_theta(mech, theta), need_mass=need_mass)
        raise TypeError(f"SharedRigidTerms: no fast route for {type(mech).__name__}")  # not reached: see __init__

    def mass(self, q: Array, theta: Array) -> Array:
        """M (B, n, n) alone (the model's ``mass_matrix``; for one delta on floats)."""
        mech = self.mechanism
        if self._delta is not None and isinstance(mech, DeltaModel):
            expect_finite("q", q)
            m, _ = self._delta(q, None, mech._payload_mass(theta), need_mass=True)
            if m is None:  # not reached: need_mass is True
                raise TypeError("mass: not evaluated")
            return m
        return mech.mass_matrix(q, theta)


def model_theta(model: HexapodModel, theta: Array) -> Array:
    """theta (10,) as the hexapod model checks it (float, shape, finite)."""
    return model._theta(theta)
