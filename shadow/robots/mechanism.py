"""What every robot model offers the rest of shadow, in actuator coordinates.

The estimator, the momentum observer and the simulator only talk to a model through this protocol,
so the delta and the hexapod are interchangeable downstream.

Symbols (all arrays carry the sample axis N first)
-------------------------------------------------
q, qd, qdd : (N, n) actuator positions [rad | m], velocities, accelerations
tau        : (N, n) actuator efforts, joint-side [N m | N], rotor inertia included
theta_p    : (p,) payload parameters: delta p = 1 (mass [kg]); hexapod p = 10 (standard inertial
             parameters in the platform frame, see :meth:`RigidPayload.standard_parameters`)
M          : (N, n, n) mass matrix in actuator coordinates, symmetric positive definite
h          : (N, n) bias efforts (Coriolis, centrifugal, gravity): tau = M(q) qdd + h(q, qd)
J          : (N, k, n) platform Jacobian, platform velocity = J qd; k = 3 (delta: xd) or
             6 (hexapod: [v; omega], v of the platform-frame origin, omega in the base frame)

Rigid-body dynamics are linear in the payload parameters:
``tau = tau_known(q, qd, qdd) + Y_p(q, qd, qdd) @ theta_p``.
External wrench w at the platform (same point and frame as J) maps to actuator efforts
``tau_ext = J^T w`` (principle of virtual work).
"""

from __future__ import annotations

from typing import Protocol

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]


class Mechanism(Protocol):
    """Rigid-body model of a parallel robot in actuator coordinates."""

    @property
    def n_actuators(self) -> int:
        """n: number of actuators (3 delta, 6 hexapod)."""
        ...

    @property
    def n_payload_parameters(self) -> int:
        """p: length of theta_p (1 delta, 10 hexapod)."""
        ...

    def platform_dof(self) -> int:
        """k: 3 (delta translation) or 6 (hexapod)."""
        ...

    def inverse_dynamics(self, q: Array, qd: Array, qdd: Array, theta_p: Array) -> Array:
        """tau (N, n) for the motion (q, qd, qdd) with payload theta_p (p,)."""
        ...

    def rigid_regressor(self, q: Array, qd: Array, qdd: Array) -> tuple[Array, Array]:
        """(tau_known (N, n), Y_p (N, n, p)) with tau = tau_known + Y_p @ theta_p."""
        ...

    def mass_matrix(self, q: Array, theta_p: Array) -> Array:
        """M (N, n, n)."""
        ...

    def bias_efforts(self, q: Array, qd: Array, theta_p: Array) -> Array:
        """h (N, n) = tau(q, qd, qdd=0)."""
        ...

    def mass_matrix_rate(self, q: Array, qd: Array, theta_p: Array) -> Array:
        """dM/dt (N, n, n) along the motion (q, qd); the momentum observer needs h - dM/dt qd."""
        ...

    def platform_jacobian(self, q: Array) -> Array:
        """J (N, k, n): platform velocity = J qd."""
        ...

    def check_reachable(self, q: Array) -> None:
        """Raise UnreachablePoseError naming the actuator and sample if q leaves the joint limits
        or the assembly cannot be closed."""
        ...
