"""Plant effects the rigid-body model leaves out: friction, drive heating, compliance, sensors.

All functions are vectorised over a leading batch axis B; per-actuator parameters are arrays that
broadcast against (B, n) (shape (n,) for one set shared by the batch, or (B, n) for one set per window).

Symbols
-------
v       : (B, n) actuator velocity on the motor side, joint coordinates [rad/s | m/s]
T       : (B, n) drive (winding and gearbox) temperature [degC]
tau_f   : (B, n) friction effort [N m | N], opposing v
F_c     : Coulomb friction level; F_s static (breakaway) level; v_s Stribeck velocity; v_e smoothing velocity
b(T)    : viscous coefficient [N m s/rad | N s/m]
delta   : (B, n) coupling deflection q_m - q (motor side minus load side) [rad | m]
i       : (B, n) torque-producing motor current [A]

Friction (Stribeck curve with a Gaussian exponent, Armstrong-Helouvry, Dupont, Canudas de Wit,
"A survey of models, analysis tools and compensation methods for the control of machines with
friction", Automatica 30(7), 1994, eq. (3.3) with delta = 2):
    ``tau_f = (F_c + (F_s - F_c) exp(-(v / v_s)^2)) tanh(v / v_e) + b(T) v``
The sign function is smoothed by ``tanh(v / v_e)`` so a fixed-step integrator can cross v = 0; keep
``F_c / (v_e J) * h`` well below 2.8 (RK4's stability bound on the real axis, Hairer-Wanner 1996,
Sec. IV.2, Fig. 2.1) for the smallest inertia J seen by the friction.

Viscous friction follows the lubricant's viscosity, which falls with temperature; Reynolds' exponential
law (O. Reynolds, Phil. Trans. R. Soc. 177, 1886): ``b(T) = b_ref exp(-beta (T - T_ref))``. Gear oils have
beta of about 0.02-0.03 1/K near room temperature (from memory).

Drive thermal model: one thermal capacitance C_th [J/K] behind one resistance R_th [K/W] to ambient,
    ``C_th dT/dt = P - (T - T_amb) / R_th``, ``P = R_w(T) i^2 + |tau_f v|``,
with copper resistance ``R_w(T) = R_20 (1 + 0.00393 (T - 20))`` (temperature coefficient of annealed
copper at 20 degC, CRC Handbook of Chemistry and Physics). ``i`` is the torque-producing (q-axis)
current; for a three-phase motor with phase resistance R_ph, ``R_20 = 1.5 R_ph`` (power invariance of
the dq transform, common practice, no source). Stepped exactly with P held over the step.

Compliant coupling (the structural mode): a spring k and damper c between the motor side (reflected rotor
inertia J_r) and the load side (the rigid mechanism), optionally with a backlash gap of total width g
(a dead zone: ``tau_c = k dz(delta) + c delta'`` while in contact, ``dz(delta) = delta - clip(delta, -g/2, g/2)``).
With the load locked the motor side rings at ``f = sqrt(k / J_r) / (2 pi)``; for a free load of inertia
J_L the two-mass mode is at ``sqrt(k (1/J_r + 1/J_L)) / (2 pi)`` (two-mass drive, e.g. Schroeder,
*Elektrische Antriebe - Regelung von Antriebssystemen*, 3rd ed., 2009, Sec. 19.1, from memory).

Encoder: the motor carries an incremental or absolute encoder of C counts per motor revolution (2^17 =
131072 is a common resolution, common practice, no source); one count is ``2 pi / (C n)`` rad at the joint
of a rotary drive of gear ratio n, ``h / (C n)`` m at a screw of lead h. Readings are truncated to whole counts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError
from shadow.robots.parameters import Drive

Array = NDArray[np.float64]

COPPER_TEMPERATURE_COEFFICIENT_PER_K = 0.00393  # annealed copper at 20 degC, CRC Handbook
COPPER_REFERENCE_TEMPERATURE_C = 20.0


def _positive(name: str, value: Array | float, *, allow_zero: bool = False) -> None:
    a = np.asarray(value, dtype=float)
    bad = (a < 0.0) if allow_zero else (a <= 0.0)
    if bad.any() or not np.isfinite(a).all():
        limit = "non-negative" if allow_zero else "positive"
        raise ConfigurationError(f"{name}: must be finite and {limit}, got {a!r}")


# ---------------------------------------------------------------------------------------------- drives
# Effort per ampere, reflected inertia and transmission ratio come from shadow.robots.drives
# (current_to_effort_gains, reflected_inertias, transmission_ratios), so plant and estimator agree on them.
def current_loop_time_constant_s(drives: tuple[Drive, ...]) -> Array:
    """T_c (n,) = 1 / (2 pi f_bw): a first-order lag with -3 dB bandwidth f_bw [Hz]."""
    return np.array([1.0 / (2.0 * np.pi * d.current_loop_bandwidth_hz) for d in drives])


def encoder_count_size(drives: tuple[Drive, ...], counts_per_motor_rev: int) -> Array:
    """One encoder count at the joint (n,): 2 pi / (C n) [rad] or h / (C n) [m]."""
    if counts_per_motor_rev < 1:
        raise ConfigurationError(f"counts_per_motor_rev: must be >= 1, got {counts_per_motor_rev}")
    sizes = []
    for d in drives:
        travel = 2.0 * np.pi if d.screw_lead_m is None else d.screw_lead_m  # joint travel per gear-output rev
        sizes.append(travel / (counts_per_motor_rev * d.gear_ratio))
    return np.array(sizes)


def quantise(q: Array, count_size: Array) -> Array:
    """Encoder reading: q truncated to whole counts, ``floor(q / c) c`` (B, n)."""
    return np.floor(q / count_size) * count_size


# -------------------------------------------------------------------------------------------- friction
@dataclass(frozen=True, slots=True)
class StribeckFriction:
    """Stribeck friction with a temperature-dependent viscous term; each field broadcasts to (B, n)."""

    coulomb: Array  # F_c [N m | N]
    static: Array  # F_s >= F_c [N m | N]
    stribeck_velocity: Array  # v_s [rad/s | m/s]
    viscous_ref: Array  # b_ref at T_ref [N m s/rad | N s/m]
    viscosity_temperature_coefficient_per_k: Array  # beta [1/K]
    reference_temperature_c: float = 40.0  # T_ref [degC]
    smoothing_velocity: Array | float = 1e-2  # v_e [rad/s | m/s]

    def __post_init__(self) -> None:
        _positive("coulomb", self.coulomb, allow_zero=True)
        _positive("static", self.static, allow_zero=True)
        _positive("stribeck_velocity", self.stribeck_velocity)
        _positive("viscous_ref", self.viscous_ref, allow_zero=True)
        _positive("smoothing_velocity", self.smoothing_velocity)
        if (np.asarray(self.static) < np.asarray(self.coulomb)).any():
            raise ConfigurationError("static: breakaway level must not be below the Coulomb level")

    def viscous(self, temperature_c: Array) -> Array:
        """b(T) = b_ref exp(-beta (T - T_ref)) (Reynolds 1886), (B, n)."""
        dt = np.asarray(temperature_c) - self.reference_temperature_c
        return self.viscous_ref * np.exp(-self.viscosity_temperature_coefficient_per_k * dt)

    def effort(self, v: Array, temperature_c: Array) -> Array:
        """tau_f (B, n) = (F_c + (F_s - F_c) exp(-(v/v_s)^2)) tanh(v/v_e) + b(T) v (Armstrong-Helouvry 1994)."""
        level = self.coulomb + (self.static - self.coulomb) * np.exp(-((v / self.stribeck_velocity) ** 2))
        return level * np.tanh(v / self.smoothing_velocity) + self.viscous(temperature_c) * v

    def scaled(self, factor: Array | float) -> StribeckFriction:
        """The same curve with every level scaled by ``factor`` (a simple wear state), (B, 1) or (B, n)."""
        f = np.asarray(factor, dtype=float)
        return StribeckFriction(
            coulomb=self.coulomb * f,
            static=self.static * f,
            stribeck_velocity=self.stribeck_velocity,
            viscous_ref=self.viscous_ref * f,
            viscosity_temperature_coefficient_per_k=self.viscosity_temperature_coefficient_per_k,
            reference_temperature_c=self.reference_temperature_c,
            smoothing_velocity=self.smoothing_velocity,
        )

    def with_factors(
        self, *, coulomb: Array | float = 1.0, static: Array | float = 1.0, viscous: Array | float = 1.0
    ) -> StribeckFriction:
        """The curve with its levels scaled term by term (a wear state per actuator), each factor (n,) or (B, n).

        ``coulomb`` scales F_c and F_s together (the whole sliding level rises, the Stribeck hump keeps its
        ratio F_s / F_c), ``static`` scales F_s once more (the breakaway level alone), ``viscous`` scales b_ref.
        Factors below 1 could put F_s under F_c, which the constructor refuses.
        """
        f_c, f_s, f_v = (np.asarray(f, dtype=float) for f in (coulomb, static, viscous))
        return StribeckFriction(
            coulomb=self.coulomb * f_c,
            static=self.static * f_c * f_s,
            stribeck_velocity=self.stribeck_velocity,
            viscous_ref=self.viscous_ref * f_v,
            viscosity_temperature_coefficient_per_k=self.viscosity_temperature_coefficient_per_k,
            reference_temperature_c=self.reference_temperature_c,
            smoothing_velocity=self.smoothing_velocity,
        )


# ---------------------------------------------------------------------------------------------- thermal
@dataclass(frozen=True, slots=True)
class DriveThermal:
    """First-order thermal model of each drive (motor winding and gearbox lumped); fields broadcast to (B, n)."""

    thermal_resistance_k_per_w: Array  # R_th to ambient
    thermal_capacitance_j_per_k: Array  # C_th
    winding_resistance_20c_ohm: Array  # R_20 of the q-axis current path

    def __post_init__(self) -> None:
        _positive("thermal_resistance_k_per_w", self.thermal_resistance_k_per_w)
        _positive("thermal_capacitance_j_per_k", self.thermal_capacitance_j_per_k)
        _positive("winding_resistance_20c_ohm", self.winding_resistance_20c_ohm, allow_zero=True)

    @property
    def time_constant_s(self) -> Array:
        """R_th C_th [s]."""
        return np.asarray(self.thermal_resistance_k_per_w) * np.asarray(self.thermal_capacitance_j_per_k)

    def copper_loss_w(self, current_a: Array, temperature_c: Array) -> Array:
        """P_cu = R_20 (1 + alpha_Cu (T - 20)) i^2 [W], (B, n)."""
        r = self.winding_resistance_20c_ohm * (
            1.0 + COPPER_TEMPERATURE_COEFFICIENT_PER_K * (temperature_c - COPPER_REFERENCE_TEMPERATURE_C)
        )
        return r * current_a**2

    def step(self, temperature_c: Array, power_w: Array, ambient_c: Array, step_s: float) -> Array:
        """Exact step of C dT/dt = P - (T - T_amb)/R with P held: T' = T_inf + (T - T_inf) exp(-h/RC)."""
        t_inf = ambient_c + self.thermal_resistance_k_per_w * power_w  # steady state T_amb + R P
        return t_inf + (temperature_c - t_inf) * np.exp(-step_s / self.time_constant_s)


# --------------------------------------------------------------------------------------------- coupling
@dataclass(frozen=True, slots=True)
class CompliantCoupling:
    """Spring-damper (with optional backlash) between motor side and load side of each actuator, (n,) fields."""

    stiffness: Array  # k [N m/rad | N/m]
    damping: Array  # c [N m s/rad | N s/m]
    backlash: Array | float = 0.0  # g, total gap width [rad | m]

    def __post_init__(self) -> None:
        _positive("stiffness", self.stiffness)
        _positive("damping", self.damping, allow_zero=True)
        _positive("backlash", self.backlash, allow_zero=True)

    def effort(self, delta: Array, delta_rate: Array) -> Array:
        """tau_c = k dz(delta) + c delta' in contact, 0 inside the gap; (B, n), motor side pushes load side."""
        if not isinstance(self.backlash, np.ndarray) and self.backlash == 0.0:  # scalar 0: the common case, no test
            return self.stiffness * delta + self.damping * delta_rate  # no gap: plain spring-damper
        half = 0.5 * np.asarray(self.backlash, dtype=float)
        if not np.any(half > 0.0):
            return self.stiffness * delta + self.damping * delta_rate  # no gap: plain spring-damper
        spring = delta - np.clip(delta, -half, half)  # dead zone dz(delta)
        in_contact = np.abs(delta) > half
        return self.stiffness * spring + np.where(in_contact, self.damping * delta_rate, 0.0)


def coupling_for_mode(
    frequency_hz: Array | float,
    damping_ratio: Array | float,
    motor_inertia: Array,
    load_inertia: Array,
    *,
    backlash: Array | float = 0.0,
) -> CompliantCoupling:
    """Coupling that gives a two-mass mode of ``frequency_hz`` and ``damping_ratio`` for the given inertias.

    ``omega^2 = k / J_e`` with the reduced inertia ``J_e = J_r J_L / (J_r + J_L)`` and ``c = 2 zeta sqrt(k J_e)``
    (two-mass oscillator, Schroeder 2009 Sec. 19.1, from memory). Inertias (n,) [kg m^2 | kg].
    """
    _positive("frequency_hz", frequency_hz)
    _positive("damping_ratio", damping_ratio, allow_zero=True)
    j_r = np.asarray(motor_inertia, dtype=float)
    j_l = np.asarray(load_inertia, dtype=float)
    j_e = j_r * j_l / (j_r + j_l)  # reduced inertia of the two-mass system
    k = (2.0 * np.pi * np.asarray(frequency_hz)) ** 2 * j_e  # omega^2 = k / J_e
    c = 2.0 * np.asarray(damping_ratio) * np.sqrt(k * j_e)  # zeta = c / (2 sqrt(k J_e))
    return CompliantCoupling(stiffness=k, damping=c, backlash=backlash)
