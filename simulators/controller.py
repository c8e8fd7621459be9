"""The simulated robot controller: joint-space PID feedback around a model feed-forward, vectorised over B.

Symbols
-------
q_d, qd_d : (B, n) planned actuator positions and rates [rad | m]
q, qd     : (B, n) measured (encoder) positions and rates
tau_ff    : (B, n) feed-forward effort, the rigid model's inverse dynamics of the planned motion
e         : (B, n) position error q_d - q; z its integral [rad s | m s]
u         : (B, n) commanded effort [N m | N]
J         : (n,) inertia each joint loop is tuned for (diagonal of M at a representative pose)

Control law (computed-torque style feed-forward plus decentralised feedback; Siciliano et al., *Robotics:
Modelling, Planning and Control*, 2009, Sec. 8.5.2 (feed-forward compensation) and 8.3.1 (independent joint control)):
    ``u = tau_ff + tau_fric_ff(qd_d) + K_p e + K_d (qd_d - qd) + K_i z``,  ``z_{k+1} = z_k + e h``
Gains from a bandwidth by pole placement on the double integrator ``J s^2``:
    PD:  poles at ``-zeta omega +- j omega sqrt(1 - zeta^2)``: ``K_p = J omega^2``, ``K_d = 2 zeta J omega``;
    PID: a triple pole at ``-omega``: ``(s + omega)^3 = s^3 + 3 omega s^2 + 3 omega^2 s + omega^3``, so
         ``K_d = 3 J omega``, ``K_p = 3 J omega^2``, ``K_i = J omega^3`` (coefficient matching).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError
from simulators.effects import StribeckFriction

Array = NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class JointPid:
    """Per-joint PID gains (n,) with an optional friction feed-forward and effort limit."""

    kp: Array  # [N m/rad | N/m]
    kd: Array  # [N m s/rad | N s/m]
    ki: Array  # [N m/(rad s) | N/(m s)]
    friction_feedforward: StribeckFriction | None = None  # the controller's nominal friction, at T_ref
    effort_limit: Array | None = None  # |u| <= limit (n,)

    @classmethod
    def from_bandwidth(
        cls,
        inertia: Array,
        bandwidth_hz: float,
        *,
        integral: bool = True,
        damping_ratio: float = 1.0,
        friction_feedforward: StribeckFriction | None = None,
        effort_limit: Array | None = None,
    ) -> JointPid:
        """Gains by pole placement for ``J s^2`` at omega = 2 pi bandwidth (see the module docstring)."""
        if bandwidth_hz <= 0.0:
            raise ConfigurationError(f"bandwidth_hz: must be positive, got {bandwidth_hz}")
        j = np.asarray(inertia, dtype=float)
        if np.any(j <= 0.0):
            raise ConfigurationError("inertia: must be positive")
        w = 2.0 * np.pi * bandwidth_hz
        if integral:
            return cls(3.0 * j * w**2, 3.0 * j * w, j * w**3, friction_feedforward, effort_limit)  # (s + w)^3
        return cls(j * w**2, 2.0 * damping_ratio * j * w, np.zeros_like(j), friction_feedforward, effort_limit)

    def command(
        self, q_d: Array, qd_d: Array, tau_ff: Array, q: Array, qd: Array, z: Array, step_s: float
    ) -> tuple[Array, Array]:
        """(u (B, n), z_next (B, n)) for one control period of ``step_s``."""
        e = q_d - q
        u = tau_ff + self.kp * e + self.kd * (qd_d - qd) + self.ki * z
        if self.friction_feedforward is not None:
            t_ref = np.full_like(qd_d, self.friction_feedforward.reference_temperature_c)
            u = u + self.friction_feedforward.effort(qd_d, t_ref)
        if self.effort_limit is not None:
            u = np.clip(u, -self.effort_limit, self.effort_limit)
        return u, z + e * step_s  # rectangular integration of the error
