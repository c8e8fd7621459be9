"""Fixed rigid-body and drive parameters of the two robot families. SI units throughout.

These are plain frozen records (the model half of a model/data split): the kinematics and dynamics
modules are pure functions of them. They are built by :mod:`shadow.robots.description` from a
robot description file, or directly in tests.

Conventions (fixed here so that every part of the project agrees)
-----------------------------------------------------------------
Base frame at the base centre, z up; gravity ``(0, 0, -9.80665)`` m/s^2 unless the file says otherwise.

Delta: legs i = 0, 1, 2 at azimuth ``phi_i = phi_0 + 2 pi i / 3``; ``r_i = (cos phi_i, sin phi_i, 0)``,
``u_i = z x r_i``. Actuator i turns about the axis through ``B_i = R_b r_i`` along ``u_i``; ``theta_i = 0``
with the upper arm horizontal along ``r_i``, positive turning it downward (right-handed about ``u_i``).
Elbow ``E_i = B_i + L_a (cos theta_i r_i - sin theta_i z)``. The platform translates only;
``P_i = x + R_p r_i``; closure ``|P_i - E_i| = L_f``. Each forearm pair is one uniform slender rod of mass
``m_f`` from ``E_i`` to ``P_i``.

Hexapod: leg j joins base joint ``B_j`` (base frame) to platform joint ``P_j`` (platform frame); pose
``(p, R)``; ``l_j = p + R P_j - B_j``; actuator coordinate ``q_j = |l_j|``. Lower leg part on the base
joint (``m_1`` at ``e_1`` from ``B_j`` along the leg, transverse inertia ``I_1``), upper part on the
platform joint (``m_2`` at ``e_2`` from ``P_j`` toward the base, ``I_2``); no spin about the leg axis.

Efforts are the drives' efforts at the joint side with the rotors' reflected inertia included:
the delta's ``tau_i`` [N m] is ``n`` times the motor torque; the hexapod's ``F_j`` [N] is
``2 pi n / h`` times it (ideal transmission).
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

STANDARD_GRAVITY_M_S2 = 9.80665  # CGPM 1901 standard acceleration of gravity


def default_gravity() -> NDArray[np.float64]:
    """Gravity vector [m/s^2] in the base frame, z up."""
    return np.array([0.0, 0.0, -STANDARD_GRAVITY_M_S2])


class MeasuredQuantity(enum.Enum):
    """What the controller streams for an actuator."""

    EFFORT = "effort"  # joint-side torque [N m] (delta) or leg force [N] (hexapod)
    MOTOR_CURRENT = "motor_current"  # torque-producing motor current [A]


class ReportedEffort(enum.Enum):
    """Which effort the streamed value is: what the drive really produced, or what the controller asked for.

    The motion follows the actual effort, so the two relate to it with different timing (see
    :func:`shadow.robots.drives.reported_effort_delay_s`).
    """

    ACTUAL = "actual"  # the drive's measured current or effort at the sample instant
    COMMAND = "command"  # the effort (or current) command the controller sent at the sample instant


@dataclass(frozen=True, slots=True)
class Drive:
    """One actuator's drive train: motor, gearbox and (hexapod) ball screw.

    ``gear_ratio`` n is motor radians per joint radian (delta) or motor revolutions per screw
    revolution (hexapod). ``screw_lead_m`` h is platform-side travel per screw revolution [m/rev];
    ``None`` for a rotary joint. ``reported`` says whether the streamed effort is the drive's actual effort or
    the controller's command; ``command_period_s`` is how long the controller holds each effort command (its
    cycle time), ``None`` for one sample period of the stream (the usual case), 0 for a command updated
    continuously. Both set when a reported effort belongs to the motion
    (:func:`shadow.robots.drives.reported_effort_delay_s`).
    """

    rotor_inertia_kg_m2: float  # J_m, motor rotor (+ brake, coupling) about the motor axis
    gear_ratio: float  # n [-]
    efficiency: float  # eta in (0, 1], gearbox (and screw) efficiency
    torque_constant_nm_per_a: float  # k_t, motor torque per torque-producing current
    current_loop_bandwidth_hz: float  # -3 dB bandwidth of the current loop, first-order lag
    rated_effort: float  # rated joint torque [N m] or leg force [N]
    measured: MeasuredQuantity = MeasuredQuantity.EFFORT
    screw_lead_m: float | None = None  # h [m/rev]; hexapod only
    reported: ReportedEffort = ReportedEffort.ACTUAL  # what the streamed effort (or current) is
    command_period_s: float | None = None  # effort-command hold period [s]; None: the stream's sample period


@dataclass(frozen=True, slots=True)
class DeltaParameters:
    """Delta robot with three rotary actuators and parallelogram forearms."""

    base_radius_m: float  # R_b
    platform_radius_m: float  # R_p
    upper_arm_length_m: float  # L_a
    forearm_length_m: float  # L_f
    first_leg_azimuth_rad: float  # phi_0
    upper_arm_mass_kg: float  # m_a
    upper_arm_com_m: float  # c_a, distance of the upper arm's centre of mass from the axis
    upper_arm_inertia_kg_m2: float  # J_a, about the actuator axis (the arm alone)
    forearm_mass_kg: float  # m_f, one forearm pair (both rods + spacers)
    platform_mass_kg: float  # m_p, travelling platform without tool or payload
    drives: tuple[Drive, Drive, Drive]
    joint_lower_rad: NDArray[np.float64]  # (3,)
    joint_upper_rad: NDArray[np.float64]  # (3,)
    gravity_m_s2: NDArray[np.float64] = field(default_factory=default_gravity)  # (3,)

    n_actuators = 3


@dataclass(frozen=True, slots=True)
class HexapodParameters:
    """Six-leg UPS hexapod with screw-driven legs."""

    base_joints_m: NDArray[np.float64]  # (6, 3) B_j, base frame
    platform_joints_m: NDArray[np.float64]  # (6, 3) P_j, platform frame
    lower_leg_mass_kg: float  # m_1
    lower_leg_com_m: float  # e_1, from B_j along the leg
    lower_leg_inertia_kg_m2: float  # I_1, transverse, about the part's centre of mass
    upper_leg_mass_kg: float  # m_2
    upper_leg_com_m: float  # e_2, from P_j toward the base
    upper_leg_inertia_kg_m2: float  # I_2, transverse, about the part's centre of mass
    platform_mass_kg: float  # m_p
    platform_com_m: NDArray[np.float64]  # (3,) c_p, platform frame
    platform_inertia_kg_m2: NDArray[np.float64]  # (3, 3) I_p about c_p, platform frame axes
    drives: tuple[Drive, Drive, Drive, Drive, Drive, Drive]
    leg_lower_m: float  # shortest leg length q_min
    leg_upper_m: float  # longest leg length q_max
    home_position_m: NDArray[np.float64]  # (3,) platform origin at home, R = identity
    gravity_m_s2: NDArray[np.float64] = field(default_factory=default_gravity)  # (3,)

    n_actuators = 6


@dataclass(frozen=True, slots=True)
class RigidPayload:
    """A rigid body carried by the platform, in the platform frame.

    ``inertia_kg_m2`` is about the body's own centre of mass. The delta uses ``mass_kg`` only
    (its platform does not rotate).
    """

    mass_kg: float
    com_m: NDArray[np.float64] = field(default_factory=lambda: np.zeros(3))  # (3,)
    inertia_kg_m2: NDArray[np.float64] = field(default_factory=lambda: np.zeros((3, 3)))  # (3, 3)

    def standard_parameters(self) -> NDArray[np.float64]:
        """The ten standard inertial parameters, about the platform-frame origin.

        ``pi = [m, m c_x, m c_y, m c_z, I_xx, I_xy, I_xz, I_yy, I_yz, I_zz]`` with
        ``I = I_c + m (|c|^2 1 - c c^T)`` (parallel-axis theorem). Shape (10,).
        """
        c = np.asarray(self.com_m, dtype=float)
        m = float(self.mass_kg)
        inertia = np.asarray(self.inertia_kg_m2, dtype=float) + m * (c @ c * np.eye(3) - np.outer(c, c))
        return np.array(
            [m, *(m * c), inertia[0, 0], inertia[0, 1], inertia[0, 2], inertia[1, 1], inertia[1, 2], inertia[2, 2]]
        )
