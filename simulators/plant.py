"""The simulated plant: a rigid mechanism (any :class:`shadow.robots.mechanism.Mechanism`) plus drive effects.

Everything is vectorised over a batch axis B of independent systems (robots or time windows side by side):
the rigid model is evaluated once per derivative call for the whole batch, each system with its own payload.

Symbols
-------
n         : number of actuators; p payload parameters; k platform DOF
q, qd     : (B, n) load-side actuator coordinates and rates, the rigid mechanism's [rad | m]
q_m, qd_m : (B, n) motor-side coordinates at the joint (only with a compliant coupling)
theta_p   : (B, p) payload parameters of each system
M, h      : (B, n, n), (B, n) mass matrix (rotor inertia included) and bias efforts of the rigid model
J_r       : (n,) reflected rotor inertia [kg m^2 | kg]
tau_a     : (B, n) actual drive effort (current-loop output) [N m | N]
u         : (B, n) commanded effort, held over a sample
w         : (B, k) external wrench on the platform; J (B, k, n) platform Jacobian

Equations
---------
Rigid plant (no coupling), the forward dynamics of the rigid model with drive effects:
    ``M(q) qdd = tau_a - tau_f(qd, T) + J^T w - h(q, qd)``
Compliant plant, two masses per actuator joined by the coupling effort ``tau_c = k dz(q_m - q) + c (qd_m - qd)``:
    ``J_r qdd_m = tau_a - tau_f(qd_m, T) - tau_c``  and  ``(M(q) - diag J_r) qdd = tau_c + J^T w - h(q, qd)``
(the model's M includes the rotors; the load side carries the rest). The external wrench maps to efforts by the
principle of virtual work, ``tau_ext = J^T w``.
Current loop, first-order lag of time constant T_c with u held from t_0:
    ``tau_a(t) = u + (tau_a(t_0) - u) exp(-(t - t_0) / T_c)``  (exact, evaluated at each integrator stage).
The integrator sees the transient ``(tau_a(t_k) - u) phi(s)``, ``phi(s) = exp(-s h / T_c)`` over a step, only at its
stage times, and a step longer than T_c misweighs it: RK4 integrates the velocity with Simpson's rule,
``(phi(0) + 4 phi(1/2) + phi(1)) / 6`` = 0.2225 for h = 5 T_c against the exact ``(1 - e^-x) / x`` = 0.1987
(x = h / T_c), which lags the plant's effective effort by a further 0.024 h. So every step ends with the difference
between the exact integrals of the transient and the method's quadrature of it (:func:`transient_weights`):
    ``dv = h A (tau_a(t_k) - u) w_v``,  ``dq = h^2 A (tau_a(t_k) - u) w_q``,
``w_v = (1 - e^-x) / x - quad_v``, ``w_q = 1 / x - (1 - e^-x) / x^2 - quad_q`` (the exact first and second integrals
of phi over the unit step), A the effort-to-acceleration map at the step's start (M^-1, or 1 / J_r on the motor side
with a coupling). It makes the transient's contribution exact for any step, up to the change of A within the step.

M and h for a per-system payload (the model's methods take one theta_p for all rows) come from the linearity
in theta_p: ``h = tau_known + Y_p theta_p`` of the rigid regressor at qdd = 0, and M by the cheaper exact route
of :func:`mass_terms`; when every row carries the same payload (always for B = 1) a delta or hexapod goes through
:class:`simulators.stage_terms.SharedRigidTerms`: the model's own M and h with the kinematics evaluated once per
stage (one delta on Python floats, equal to the model's to rounding), the cheapest route. A hexapod plant built
by :func:`simulators.run.demo_loop` integrates :class:`simulators.kinematics.WarmStartHexapod`, whose forward
kinematics starts from the last pose.

State layout: ``position = [q]`` (B, n) or ``[q, q_m]`` (B, 2n); ``velocity`` likewise.
"""

from __future__ import annotations

import enum
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError, ShapeError, expect_shape
from shadow.robots.mechanism import Mechanism
from simulators.effects import CompliantCoupling, DriveThermal, StribeckFriction
from simulators.integrators import Method, heun_step, rk4_step, second_order_derivative, symplectic_euler_step
from simulators.stage_terms import SharedRigidTerms

Array = NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class HalfSinePulse:
    """Impact force pulses on the platform, one per system (peak 0 for none).

    ``w(t) = peak sin(pi (t - t_0) / d) direction`` for ``t_0 <= t <= t_0 + d``, else 0.
    ``direction`` (B, k) holds a unit wrench direction in the platform-Jacobian convention (for a hexapod,
    a pure force is ``[f; 0]`` at the platform origin).
    """

    start_s: Array  # (B,) t_0
    duration_s: Array  # (B,) d > 0
    peak: Array  # (B,) [N] (or the wrench's unit)
    direction: Array  # (B, k)

    def active(self, t: float) -> NDArray[np.bool_]:
        """(B,) True while the pulse pushes, ``t_0 < t < t_0 + d`` (peak non-zero)."""
        phase = (t - self.start_s) / self.duration_s
        return (phase > 0.0) & (phase < 1.0) & (self.peak != 0.0)

    def wrench(self, t: float) -> Array | None:
        """(B, k) wrench at time t, or None when no pulse is active in any system (saves the Jacobian call)."""
        phase = (t - self.start_s) / self.duration_s
        active = self.active(t)
        if not active.any():
            return None
        amplitude = np.where(active, self.peak * np.sin(np.pi * np.clip(phase, 0.0, 1.0)), 0.0)
        return amplitude[:, None] * self.direction


class PulseProfile(enum.Enum):
    """Shape of a platform force pulse over its normalised time phi = (t - t_0) / d, 0 < phi < 1."""

    HALF_SINE = "half_sine"  # sin(pi phi): smooth rise, kink at the ends
    HAVERSINE = "haversine"  # (1 - cos(2 pi phi)) / 2: smooth at the ends too
    TRIANGLE = "triangle"  # 1 - |2 phi - 1|: linear rise to the peak at half time, linear fall
    RECTANGLE = "rectangle"  # 1: a step on and off (a discontinuity the fixed-step integrator sees once each)


def pulse_shape(profile: PulseProfile, phase: Array) -> Array:
    """Normalised pulse height in [0, 1] at ``phase`` (any shape); 0 outside 0 < phase < 1."""
    phi = np.clip(np.asarray(phase, dtype=float), 0.0, 1.0)
    if profile is PulseProfile.HALF_SINE:
        shape = np.sin(np.pi * phi)
    elif profile is PulseProfile.HAVERSINE:
        shape = 0.5 * (1.0 - np.cos(2.0 * np.pi * phi))
    elif profile is PulseProfile.TRIANGLE:
        shape = 1.0 - np.abs(2.0 * phi - 1.0)
    else:
        shape = np.ones_like(phi)
    inside = (np.asarray(phase) > 0.0) & (np.asarray(phase) < 1.0)
    return np.where(inside, shape, 0.0)


@dataclass(frozen=True, slots=True)
class ShapedPulse:
    """Force pulses on the platform of a chosen profile, one per system (peak 0 for none).

    ``w(t) = peak shape((t - t_0) / d) direction`` for ``t_0 < t < t_0 + d`` (see :func:`pulse_shape`), else 0;
    with :attr:`PulseProfile.HALF_SINE` the same force as :class:`HalfSinePulse`. Fields as there.
    """

    start_s: Array  # (B,) t_0
    duration_s: Array  # (B,) d > 0
    peak: Array  # (B,) [N] (or the wrench's unit)
    direction: Array  # (B, k)
    profile: PulseProfile = PulseProfile.HALF_SINE

    def active(self, t: float) -> NDArray[np.bool_]:
        """(B,) True while the pulse pushes, ``t_0 < t < t_0 + d`` (peak non-zero)."""
        phase = (t - self.start_s) / self.duration_s
        return (phase > 0.0) & (phase < 1.0) & (self.peak != 0.0)

    def wrench(self, t: float) -> Array | None:
        """(B, k) wrench at time t, or None when no pulse is active in any system."""
        active = self.active(t)
        if not active.any():
            return None
        amplitude = np.where(active, self.peak * pulse_shape(self.profile, (t - self.start_s) / self.duration_s), 0.0)
        return amplitude[:, None] * self.direction


PlatformPulse = HalfSinePulse | ShapedPulse


@dataclass(frozen=True, slots=True)
class PlantConfig:
    """Drive effects around the rigid model. ``None`` switches an effect off."""

    rotor_inertia: Array  # J_r (n,) reflected, as included in the model's M
    current_time_constant_s: Array  # T_c (n,); 0 gives an ideal current loop
    friction: StribeckFriction | None = None
    coupling: CompliantCoupling | None = None
    thermal: DriveThermal | None = None
    effort_per_ampere: Array | None = None  # (n,) joint effort per torque-producing current, for copper losses

    def __post_init__(self) -> None:
        if np.any(np.asarray(self.current_time_constant_s) < 0.0):
            raise ConfigurationError("current_time_constant_s: must be non-negative")
        if self.coupling is not None and np.any(np.asarray(self.rotor_inertia) <= 0.0):
            raise ConfigurationError("rotor_inertia: must be positive when a compliant coupling is used")
        if self.thermal is not None and self.effort_per_ampere is None:
            raise ConfigurationError("effort_per_ampere: needed by the thermal model's copper losses")


@dataclass(frozen=True, slots=True)
class PlantState:
    """State of B systems at time ``t_s``."""

    t_s: float
    position: Array  # (B, n) or (B, 2n): [q] or [q, q_m]
    velocity: Array  # same shape
    effort: Array  # tau_a (B, n)
    temperature_c: Array  # T (B, n)
    mass_history: tuple[Array, float, Array] | None = None  # (M, t, theta_p) at the last step start (EVERY_STEP)


def shared_payload(theta_p: Array) -> Array | None:
    """theta_p[0] (p,) when every row of theta_p (B, p) is the same payload (always for B = 1), else None."""
    first = theta_p[0]
    if theta_p.shape[0] == 1 or bool((theta_p == first).all()):
        return first
    return None


def bias_terms(mechanism: Mechanism, q: Array, qd: Array, theta_p: Array) -> Array:
    """h (B, n) for a payload per system.

    One payload for all rows (:func:`shared_payload`): the model's own ``h(q, qd)``; else
    ``tau_known + Y_p theta_p`` of the regressor at qdd = 0 (B rows). Both are the rigid model's h.
    """
    theta = shared_payload(theta_p)
    if theta is not None:
        return mechanism.bias_efforts(q, qd, theta)
    tau_known, y_p = mechanism.rigid_regressor(q, qd, np.zeros_like(q))
    return tau_known + np.einsum("bap,bp->ba", y_p, theta_p)


def mass_terms(mechanism: Mechanism, q: Array, theta_p: Array, *, route: str = "auto") -> Array:
    """M (B, n, n) for a payload per system, by the cheapest of three exact routes.

    One payload for all rows (:func:`shared_payload`): one call of the model's ``M(q, theta)`` ("shared").
    M is affine in theta_p: ``M(q, theta) = M(q, 0) + sum_j theta_j (M(q, e_j) - M(q, 0))`` (p + 1 calls of
    B rows, cheap for the delta's p = 1); or from the regressor, column i of M is
    ``tau(q, 0, e_i) - tau(q, 0, 0)`` (one call of B (n + 1) rows, cheaper for the hexapod's p = 10).
    ``route``: "auto" (the cheapest that applies), "affine" or "regressor".
    """
    b, n = q.shape
    p = theta_p.shape[1]
    if route not in ("auto", "affine", "regressor"):
        raise ConfigurationError(f"route: expected 'auto', 'affine' or 'regressor', got {route!r}")
    if route == "auto":
        theta = shared_payload(theta_p)
        if theta is not None:
            return mechanism.mass_matrix(q, theta)
    if route == "affine" or (route == "auto" and p + 1 <= n + 1):
        m0 = mechanism.mass_matrix(q, np.zeros(p))
        m = m0.copy()
        for j in range(p):  # loop over the payload parameters, not over samples
            m += theta_p[:, j, None, None] * (mechanism.mass_matrix(q, np.eye(p)[j]) - m0)
        return m
    q_rows = np.broadcast_to(q[:, None, :], (b, n + 1, n)).reshape(-1, n)
    qdd_rows = np.broadcast_to(np.vstack([np.zeros(n), np.eye(n)])[None], (b, n + 1, n)).reshape(-1, n)
    tau_known, y_p = mechanism.rigid_regressor(q_rows, np.zeros_like(q_rows), qdd_rows)
    tau = tau_known.reshape(b, n + 1, n) + np.einsum("bral,bl->bra", y_p.reshape(b, n + 1, n, p), theta_p)
    return np.swapaxes(tau[:, 1:, :] - tau[:, :1, :], 1, 2)  # column i: tau(q, 0, e_i) - tau(q, 0, 0)


def rigid_terms(mechanism: Mechanism, q: Array, qd: Array, theta_p: Array) -> tuple[Array, Array]:
    """(M (B, n, n), h (B, n)) for a payload per system (theta_p (B, p))."""
    return mass_terms(mechanism, q, theta_p), bias_terms(mechanism, q, qd, theta_p)


class MassUpdate(enum.Enum):
    """How often the plant evaluates M(q).

    ``EVERY_STAGE`` keeps the integrator's order. ``EVERY_STEP`` evaluates M once per internal step, at its
    start, and extrapolates it linearly in time from the previous step start through the stages,
    ``M(t) = M_k + (M_k - M_{k-1}) (t - t_k) / h`` (h and all effects are still evaluated at every stage):
    about half the model cost for an O(h^2) error in the acceleration, so the method converges at order 2
    (order 1 on the very first step, which holds M). The benchmark measures its error against ``EVERY_STAGE``.
    """

    EVERY_STAGE = "every_stage"
    EVERY_STEP = "every_step"


def transient_weights(method: Method, time_constant_s: Array, step_s: float) -> tuple[Array, Array]:
    """(w_v, w_q) (n,): exact minus quadrature integrals of ``phi(s) = exp(-s h / T_c)`` over the unit step.

    The forcing weights of each method for a second-order system (stage fractions 0, 1/2, 1):
    RK4 velocity ``(phi_0 + 4 phi_1/2 + phi_1) / 6``, position ``(phi_0 + 2 phi_1/2) / 6`` (Simpson's rule and its
    moment, from expanding the classical stages); Heun ``(phi_0 + phi_1) / 2`` and ``phi_0 / 2``; semi-implicit Euler
    ``phi_0`` and ``phi_0``. Exact: ``int_0^1 phi = (1 - e^-x) / x``, ``int_0^1 (1 - c) phi = 1/x - (1 - e^-x) / x^2``,
    x = h / T_c. An ideal loop (T_c = 0) has no transient: (0, 0).
    """
    tc = np.asarray(time_constant_s, dtype=float)
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        x = np.where(tc > 0.0, step_s / np.where(tc > 0.0, tc, 1.0), np.inf)  # x = h / T_c
        phi_half, phi_1 = np.exp(-0.5 * x), np.exp(-x)
        small = x < 1e-3  # series near 0, where the closed forms cancel: 1 - x/2 + x^2/6 and 1/2 - x/6 + x^2/24
        exact_v = np.where(small, 1.0 - x / 2.0 + x**2 / 6.0, -np.expm1(-x) / np.where(small, 1.0, x))
        exact_q = np.where(
            small,
            0.5 - x / 6.0 + x**2 / 24.0,
            1.0 / np.where(small, 1.0, x) + np.expm1(-x) / np.where(small, 1.0, x) ** 2,
        )
    phi_0 = 1.0
    if method is Method.RK4:
        quad_v, quad_q = (phi_0 + 4.0 * phi_half + phi_1) / 6.0, (phi_0 + 2.0 * phi_half) / 6.0
    elif method is Method.HEUN:
        quad_v, quad_q = 0.5 * (phi_0 + phi_1), 0.5 * phi_0
    else:
        quad_v, quad_q = np.full_like(x, phi_0), np.full_like(x, phi_0)
    ideal = ~(tc > 0.0)
    return np.where(ideal, 0.0, exact_v - quad_v), np.where(ideal, 0.0, exact_q - quad_q)


def _may_act(pulse: PlatformPulse, t_start_s: float, t_end_s: float) -> bool:
    """False only if no system's pulse can be active anywhere in [t_start_s, t_end_s] (margin 1e-9 of the scale)."""
    start = np.asarray(pulse.start_s, dtype=float)
    end = start + np.asarray(pulse.duration_s, dtype=float)
    margin = 1e-9 * (1.0 + abs(t_end_s) + float(np.max(np.abs(end), initial=0.0)))
    return bool(np.any((start < t_end_s + margin) & (end > t_start_s - margin) & (np.asarray(pulse.peak) != 0.0)))


class Plant:
    """Rigid mechanism plus drive effects, integrated with a fixed internal step.

    Parameters
    ----------
    mechanism : the rigid model
    config : :class:`PlantConfig`
    internal_step_s : integrator step h [s]
    method : :class:`simulators.integrators.Method`
    mass_update : :class:`MassUpdate`
    """

    def __init__(
        self,
        mechanism: Mechanism,
        config: PlantConfig,
        *,
        internal_step_s: float,
        method: Method = Method.RK4,
        mass_update: MassUpdate = MassUpdate.EVERY_STAGE,
    ) -> None:
        if internal_step_s <= 0.0:
            raise ConfigurationError(f"internal_step_s: must be positive, got {internal_step_s}")
        n = mechanism.n_actuators
        expect_shape("rotor_inertia", np.asarray(config.rotor_inertia, dtype=float), (n,))
        self.mechanism = mechanism
        self.config = config
        self.internal_step_s = float(internal_step_s)
        self.method = method
        self.mass_update = mass_update
        self.n = n
        self.compliant = config.coupling is not None
        self._tc = np.asarray(config.current_time_constant_s, dtype=float)
        self._jr = np.asarray(config.rotor_inertia, dtype=float)
        self._coupling = config.coupling
        self._transient = transient_weights(method, self._tc, self.internal_step_s)  # (w_v, w_q) per actuator
        self._jr_diag = np.diag(self._jr)[None]  # (1, n, n) diag J_r
        self._shared_terms = SharedRigidTerms.for_mechanism(mechanism)  # M and h sharing the kinematics
        self._no_mass = np.empty((0, n, n))  # stands for "M not evaluated" in rigid_stage
        self._decay: dict[float, Array] = {}  # exp(-t / T_c) (n,) by elapsed time t, the same few t every step

    # ------------------------------------------------------------------------------------------ set-up
    def initial_state(
        self, q0: Array, theta_p: Array, *, temperature_c: Array, t0_s: float = 0.0, qd0: Array | None = None
    ) -> PlantState:
        """State at rest (or at qd0) with the drives holding the static load: tau_a = h(q0, qd0).

        With a coupling the motor side is pre-deflected so that the spring carries the load: q_m = q + tau / k
        (plus half the backlash gap in the direction of the load).
        """
        q0 = np.asarray(q0, dtype=float)
        b = q0.shape[0]
        expect_shape("q0", q0, (None, self.n))
        expect_shape("theta_p", theta_p, (b, self.mechanism.n_payload_parameters))
        qd0 = np.zeros_like(q0) if qd0 is None else np.asarray(qd0, dtype=float)
        h = bias_terms(self.mechanism, q0, qd0, theta_p)
        effort = h.copy()
        temperature = np.broadcast_to(np.asarray(temperature_c, dtype=float), (b, self.n)).copy()
        if self.config.friction is not None:
            effort += self.config.friction.effort(qd0, temperature)
        if self.compliant:
            cp = self._coupling
            if cp is None:  # not reached: self.compliant is False then
                raise ConfigurationError("coupling: missing")
            gap = 0.5 * np.asarray(cp.backlash, dtype=float)
            qm0 = q0 + h / cp.stiffness + np.sign(h) * gap
            position = np.concatenate([q0, qm0], axis=1)
            velocity = np.concatenate([qd0, qd0], axis=1)
        else:
            position, velocity = q0.copy(), qd0.copy()
        return PlantState(t_s=t0_s, position=position, velocity=velocity, effort=effort, temperature_c=temperature)

    # ------------------------------------------------------------------------------------------ physics
    def load_side(self, state: PlantState) -> tuple[Array, Array]:
        """(q, qd) of the rigid mechanism, (B, n) each."""
        return state.position[:, : self.n], state.velocity[:, : self.n]

    def motor_side(self, state: PlantState) -> tuple[Array, Array]:
        """(q_m, qd_m), what the motor encoder sees, (B, n) each; equal to the load side without a coupling."""
        if not self.compliant:
            return self.load_side(state)
        return state.position[:, self.n :], state.velocity[:, self.n :]

    def friction_effort(self, v_motor: Array, temperature_c: Array) -> Array:
        """tau_f (B, n), zero when friction is off."""
        if self.config.friction is None:
            return np.zeros_like(v_motor)
        return self.config.friction.effort(v_motor, temperature_c)

    def external_effort(self, q: Array, wrench: Array | None) -> Array:
        """J^T w (B, n) (principle of virtual work), zero without a wrench."""
        if wrench is None:
            return np.zeros_like(q)
        jac = self.mechanism.platform_jacobian(q)
        return np.einsum("bkn,bk->bn", jac, wrench)

    def acceleration(
        self,
        position: Array,
        velocity: Array,
        effort: Array,
        theta_p: Array,
        temperature_c: Array,
        wrench: Array | None,
        *,
        mass_matrix: Array | None = None,
    ) -> Array:
        """d(velocity)/dt (B, n) or (B, 2n) for the given drive effort tau_a (B, n) and wrench (B, k) or None.

        ``mass_matrix`` (B, n, n), if given, is used instead of M(q) (held over a step, see :class:`MassUpdate`).
        """
        n = self.n
        q, qd = position[:, :n], velocity[:, :n]
        m_q, h = self.rigid_stage(q, qd, theta_p, need_mass=mass_matrix is None)
        m = m_q if mass_matrix is None else mass_matrix
        tau_ext = self.external_effort(q, wrench)
        if not self.compliant:
            tau_f = self.friction_effort(qd, temperature_c)
            rhs = effort - tau_f + tau_ext - h  # M qdd = tau_a - tau_f + J^T w - h
            return np.linalg.solve(m, rhs[..., None])[..., 0]
        cp = self._coupling
        if cp is None:  # not reached: self.compliant is False then
            raise ConfigurationError("coupling: missing")
        qm, qdm = position[:, n:], velocity[:, n:]
        tau_c = cp.effort(qm - q, qdm - qd)  # coupling effort, motor side on load side
        m_load = m - self._jr_diag  # load side: the model's M without the rotors
        qdd = np.linalg.solve(m_load, (tau_c + tau_ext - h)[..., None])[..., 0]
        qddm = (
            effort - self.friction_effort(qdm, temperature_c) - tau_c
        ) / self._jr  # J_r qdd_m = tau_a - tau_f - tau_c
        return np.concatenate([qdd, qddm], axis=1)

    def rigid_stage(self, q: Array, qd: Array, theta_p: Array, *, need_mass: bool) -> tuple[Array, Array]:
        """(M (B, n, n), h (B, n)) at one stage; M is not evaluated (an empty array) when ``need_mass`` is False.

        One payload for all rows: :class:`simulators.stage_terms.SharedRigidTerms` (the model's M and h with the
        kinematics evaluated once); else :func:`mass_terms` and :func:`bias_terms`.
        """
        theta = shared_payload(theta_p)
        if theta is not None and self._shared_terms is not None:
            m, h = self._shared_terms(q, qd, theta, need_mass=need_mass)
            return (self._no_mass if m is None else m), h
        m = mass_terms(self.mechanism, q, theta_p) if need_mass else self._no_mass
        return m, bias_terms(self.mechanism, q, qd, theta_p)

    def mass_at(self, q: Array, theta_p: Array) -> Array:
        """M (B, n, n) alone: :meth:`SharedRigidTerms.mass` for one payload for all rows, else :func:`mass_terms`."""
        theta = shared_payload(theta_p)
        if theta is not None and self._shared_terms is not None:
            return self._shared_terms.mass(q, theta)
        return mass_terms(self.mechanism, q, theta_p)

    def effort_at(self, effort0: Array, command: Array, elapsed_s: float) -> Array:
        """tau_a after ``elapsed_s`` with u held: u + (tau_a0 - u) exp(-t / T_c) (exact first-order lag)."""
        decay = self._decay.get(elapsed_s)
        if decay is None:
            with np.errstate(divide="ignore", over="ignore"):
                decay = np.where(self._tc > 0.0, np.exp(-elapsed_s / np.where(self._tc > 0.0, self._tc, 1.0)), 0.0)
            if len(self._decay) < 64:  # stage offsets repeat every step; keep the table small for odd calls
                self._decay[elapsed_s] = decay
        return command + (effort0 - command) * decay

    def _correct_transient(
        self, pos: Array, vel: Array, excess: Array, mass_matrix: Array | None
    ) -> tuple[Array, Array]:
        """Add ``dv = h A e w_v`` and ``dq = h^2 A e w_q`` for the transient ``e = tau_a(t_k) - u`` of one step.

        ``pos``, ``vel`` are the state after the step; A is M^-1 of ``mass_matrix`` (B, n, n), the mass matrix at
        the step's start (rigid plant), or 1 / J_r on the motor side (compliant plant, ``mass_matrix`` unused).
        """
        w_v, w_q = self._transient
        h = self.internal_step_s
        n = self.n
        if self.compliant:  # the effort acts on the motor side only: J_r qdd_m = tau_a - ...
            pos = pos.copy()
            vel = vel.copy()
            vel[:, n:] += h * excess * w_v / self._jr
            pos[:, n:] += h**2 * excess * w_q / self._jr
            return pos, vel
        if mass_matrix is None:
            raise ConfigurationError("mass_matrix: needed to correct the current-loop transient of a rigid plant")
        rhs = np.stack([h * excess * w_v, h**2 * excess * w_q], axis=2)  # (B, n, 2)
        d = np.linalg.solve(mass_matrix, rhs)  # M^-1 [h e w_v, h^2 e w_q]
        return pos + d[:, :, 1], vel + d[:, :, 0]

    # ----------------------------------------------------------------------------------------- stepping
    def advance(
        self,
        state: PlantState,
        command: Array,
        theta_p: Array,
        *,
        n_steps: int,
        pulses: Sequence[PlatformPulse] = (),
    ) -> PlantState:
        """Advance by ``n_steps`` internal steps with the command u (B, n) held (one control period).

        Temperatures are held over the call (they change over minutes); the caller steps the thermal model.
        """
        expect_shape("command", command, state.effort.shape)
        if theta_p.shape != (state.effort.shape[0], self.mechanism.n_payload_parameters):
            raise ShapeError(f"theta_p: expected shape {(state.effort.shape[0], self.mechanism.n_payload_parameters)}")
        t0, effort0, temperature = state.t_s, state.effort, state.temperature_c
        step = self.internal_step_s
        d = state.position.shape[1]

        # pulses that may act during this call: the others give no wrench at any stage (a conservative time test
        # with a margin; a pulse that passes it is evaluated exactly at every stage, as before)
        span = n_steps * step
        live = [pulse for pulse in pulses if _may_act(pulse, t0, t0 + span)]

        def wrench(t: float) -> Array | None:
            if not live:
                return None
            parts = [w for w in (pulse.wrench(t) for pulse in live) if w is not None]
            return None if not parts else np.sum(parts, axis=0)

        hold = self.mass_update is MassUpdate.EVERY_STEP
        history = state.mass_history
        # (M_k, dM/dt estimate, s_k) for the present step when M is extrapolated (MassUpdate.EVERY_STEP)
        held: list[tuple[Array, Array, float] | None] = [None]

        # The integrator runs on the time s = t - t_0 since the sample's start, so the stage offsets (k h, k h + h/2,
        # ...) are the same floats every sample and the lag's decay factors come from a table (see effort_at).
        def extrapolate(q: Array, s_k: float) -> None:
            nonlocal history
            m_k = self.mass_at(q, theta_p)
            t_k = t0 + s_k
            # extrapolate only along the same payload (a payload change is a jump, not a rate)
            use = history is not None and t_k > history[1] and np.array_equal(history[2], theta_p)
            slope = (m_k - history[0]) / (t_k - history[1]) if use and history is not None else np.zeros_like(m_k)
            held[0] = (m_k, slope, s_k)
            history = (m_k, t_k, theta_p)

        def accel(s: float, pos: Array, vel: Array) -> Array:
            tau_a = self.effort_at(effort0, command, s)
            h_m = held[0]
            m = None if h_m is None else h_m[0] + h_m[1] * (s - h_m[2])  # M_k + (M_k - M_k-1)/h (t - t_k)
            return self.acceleration(pos, vel, tau_a, theta_p, temperature, wrench(t0 + s), mass_matrix=m)

        correct = bool(np.any(self._transient[0] != 0.0) or np.any(self._transient[1] != 0.0))

        def corrected(pos_new: Array, vel_new: Array, pos_start: Array, k: int) -> tuple[Array, Array]:
            """The step's result plus the exact-minus-quadrature part of the current-loop transient."""
            excess = self.effort_at(effort0, command, k * step) - command  # tau_a(t_k) - u
            if not correct or not np.any(excess):
                return pos_new, vel_new
            m = None
            if not self.compliant:
                h_m = held[0]
                m = self.mass_at(pos_start[:, : self.n], theta_p) if h_m is None else h_m[0]
            return self._correct_transient(pos_new, vel_new, excess, m)

        pos, vel = state.position, state.velocity
        if self.method is Method.SYMPLECTIC:
            for k in range(n_steps):
                if hold:
                    extrapolate(pos[:, : self.n], k * step)
                pos_next, vel_next = symplectic_euler_step(accel, k * step, pos, vel, step)
                pos, vel = corrected(pos_next, vel_next, pos, k)
        else:
            f = second_order_derivative(accel, d)
            x = np.concatenate([pos, vel], axis=1)
            stepper = rk4_step if self.method is Method.RK4 else heun_step
            for k in range(n_steps):
                if hold:
                    extrapolate(x[:, : self.n], k * step)
                x_next = stepper(f, k * step, x, step)
                pos_next, vel_next = corrected(x_next[:, :d], x_next[:, d:], x[:, :d], k)
                x = np.concatenate([pos_next, vel_next], axis=1)
            pos, vel = x[:, :d], x[:, d:]
        elapsed = n_steps * step
        return replace(
            state,
            t_s=t0 + elapsed,
            position=pos,
            velocity=vel,
            effort=self.effort_at(effort0, command, elapsed),
            mass_history=history,
        )

    def drive_losses_w(self, state: PlantState) -> Array:
        """P (B, n) = R_w(T) i^2 + |tau_f qd_m| [W], heat into each drive at this instant."""
        _, qdm = self.motor_side(state)
        friction_power = np.abs(self.friction_effort(qdm, state.temperature_c) * qdm)
        if self.config.thermal is None or self.config.effort_per_ampere is None:
            return friction_power
        current = state.effort / self.config.effort_per_ampere
        return self.config.thermal.copper_loss_w(current, state.temperature_c) + friction_power

    def heat(self, state: PlantState, ambient_c: Array, step_s: float) -> PlantState:
        """Thermal step of ``step_s`` with the present losses held (exact first-order step); no-op without a model."""
        if self.config.thermal is None:
            return state
        ambient = np.asarray(ambient_c, dtype=float).reshape(-1, 1)
        temperature = self.config.thermal.step(state.temperature_c, self.drive_losses_w(state), ambient, step_s)
        return replace(state, temperature_c=temperature)
