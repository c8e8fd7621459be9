"""A closed-loop run: plant, sensors and controller sampled at the output rate, with ground truth.

Per output sample k (period h_s, internal step h_s / substeps):
  1. sensors read the plant: encoder position ``quantise(q_m)``; rate by backward difference of the readings,
     ``(q_k - q_{k-1}) / h_s`` (how drives usually derive speed from an encoder, common practice, no source);
     actual effort tau_a(t_k) plus white Gaussian noise (or the current, effort / (eta k_t G)); drive temperatures;
  2. the controller computes u_k from the readings and the plan; u_k is held until the next sample (an actuator
     whose sensor reports the command, ``Sensors.reported``, streams u_k plus the noise instead of tau_a(t_k));
  3. the plant advances by ``substeps`` internal steps; then the thermal model by h_s.
Time stamps carry the controller's jitter: ``stamp_k = t_k + e_k``, e_k ~ N(0, sigma) clipped to
+-0.4 h_s, while the values belong to the true instant t_k (so the stamps, not the values, are off).

Symbols as in :mod:`simulators.plant`; B systems, T samples, n actuators, p payload parameters, k platform DOF.
"""

from __future__ import annotations

import enum
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError, ShapeError, expect_shape
from shadow.robots.delta import DeltaModel
from shadow.robots.description import RobotDescription, build_model
from shadow.robots.drives import current_to_effort_gains, reflected_inertias
from shadow.robots.mechanism import Mechanism
from shadow.robots.parameters import MeasuredQuantity, ReportedEffort
from simulators.controller import JointPid
from simulators.effects import (
    DriveThermal,
    StribeckFriction,
    coupling_for_mode,
    current_loop_time_constant_s,
    encoder_count_size,
    quantise,
)
from simulators.kinematics import plant_mechanism
from simulators.plant import MassUpdate, Plant, PlantConfig, PlatformPulse
from simulators.trajectories import PathSample, SegmentPath, pose_motion

Array = NDArray[np.float64]


class FaultLabel(enum.IntFlag):
    """Ground-truth labels per sample (bit flags)."""

    NONE = 0
    IMPACT = 1  # an impact pulse acts on the platform
    FRICTION_WEAR = 2  # the window's friction was raised on purpose
    PAYLOAD_MISMATCH = 4  # the carried payload differs from the one the controller assumes


@dataclass(frozen=True, slots=True)
class Sensors:
    """What the controller measures and how well."""

    encoder_count: Array  # (n,) one count at the joint [rad | m], see simulators.effects.encoder_count_size
    effort_noise_std: Array  # (n,) standard deviation of the effort reading [N m | N]
    current_gain: Array | None = None  # (n,) eta k_t G [N m/A | N/A]: report current instead of effort
    jitter_std_s: float = 0.0  # standard deviation of the time-stamp error [s]
    reported: tuple[ReportedEffort, ...] | None = None  # per actuator: actual effort (default) or the command u_k


@dataclass(frozen=True, slots=True)
class Reference:
    """The planned motion and the carried payload of B systems over T samples."""

    q: Array  # (B, T, n) planned positions
    qd: Array  # (B, T, n)
    qdd: Array  # (B, T, n)
    effort_ff: Array  # (B, T, n) feed-forward effort
    theta_p: Array  # (B, T, p) true payload
    tool: NDArray[np.bool_]  # (B, T) gripper closed


@dataclass(frozen=True, slots=True)
class Truth:
    """Ground truth of a run."""

    q: Array  # (B, T, n) load side
    qd: Array  # (B, T, n) load side
    q_motor: Array  # (B, T, n)
    qd_motor: Array  # (B, T, n)
    effort: Array  # (B, T, n) actual drive effort
    command: Array  # (B, T, n) commanded effort u_k
    theta_p: Array  # (B, T, p)
    friction_coulomb: Array  # (B, n)
    friction_static: Array  # (B, n)
    friction_viscous: Array  # (B, T, n) at the drive temperature
    contact_wrench: Array  # (B, T, k)
    fault: NDArray[np.uint8]  # (B, T) FaultLabel bits


@dataclass(frozen=True, slots=True)
class RunRecord:
    """What the robot's controller would stream, plus ground truth."""

    t_s: Array  # (T,) true sample instants
    stamp_s: Array  # (B, T) reported time stamps (with jitter)
    q: Array  # (B, T, n) encoder readings (quantised)
    qd: Array  # (B, T, n) rates from the readings
    effort: Array  # (B, T, n) measured effort [N m | N] or current [A] (see ``is_current``; actual or command)
    is_current: bool
    temperature_c: Array  # (B, T, n)
    tool: NDArray[np.bool_]  # (B, T)
    reference: Reference
    truth: Truth


def reference_from_joint_motion(
    mechanism: Mechanism,
    q: Array,
    qd: Array,
    qdd: Array,
    theta_p: Array,
    tool: NDArray[np.bool_],
    *,
    theta_ff: Array | None = None,
) -> Reference:
    """Reference with the feed-forward ``tau_known + Y_p theta_ff`` from one rigid-regressor call on B T rows.

    ``theta_ff`` (B, T, p) is the payload the controller assumes (default: the true one).
    """
    b, t, n = q.shape
    tau_known, y_p = mechanism.rigid_regressor(q.reshape(-1, n), qd.reshape(-1, n), qdd.reshape(-1, n))
    theta = theta_p if theta_ff is None else theta_ff
    ff = tau_known + np.einsum("rap,rp->ra", y_p, theta.reshape(b * t, -1))
    return Reference(q=q, qd=qd, qdd=qdd, effort_ff=ff.reshape(b, t, n), theta_p=theta_p, tool=tool)


def run_closed_loop(
    plant: Plant,
    controller: JointPid,
    sensors: Sensors,
    reference: Reference,
    rng: np.random.Generator,
    *,
    sample_step_s: float,
    substeps: int,
    ambient_c: Array,
    initial_temperature_c: Array,
    pulses: Sequence[PlatformPulse] = (),
    fault_flags: NDArray[np.uint8] | None = None,
) -> RunRecord:
    """Simulate B systems for T samples in closed loop; see the module docstring for the order of events.

    Parameters
    ----------
    plant, controller, sensors, reference : the parts of the loop
    rng : the source of measurement noise and jitter
    sample_step_s : output (and control) period h_s [s]
    substeps : internal steps per sample; ``plant.internal_step_s * substeps`` must equal ``sample_step_s``
    ambient_c : (B,) ambient temperature of each system [degC]
    initial_temperature_c : (B, n) or (n,) drive temperatures at the start [degC]
    pulses : impact pulses on the platform
    fault_flags : (B,) FaultLabel bits that hold for the whole window (e.g. FRICTION_WEAR)

    Raises
    ------
    ConfigurationError
        if the internal step does not divide the sample period.
    ShapeError
        if the reference arrays disagree in shape.
    """
    if abs(plant.internal_step_s * substeps - sample_step_s) > 1e-12 * sample_step_s:
        raise ConfigurationError(
            f"substeps: {substeps} internal steps of {plant.internal_step_s} s do not make {sample_step_s} s"
        )
    b, n_t, n = reference.q.shape
    p = plant.mechanism.n_payload_parameters
    for name in ("qd", "qdd", "effort_ff"):
        expect_shape(name, getattr(reference, name), (b, n_t, n))
    expect_shape("theta_p", reference.theta_p, (b, n_t, p))
    k_dof = plant.mechanism.platform_dof()
    ambient = np.broadcast_to(np.asarray(ambient_c, dtype=float), (b,))
    flags = np.zeros(b, dtype=np.uint8) if fault_flags is None else np.asarray(fault_flags, dtype=np.uint8)
    if flags.shape != (b,):
        raise ShapeError(f"fault_flags: expected shape ({b},), got {flags.shape}")

    state = plant.initial_state(
        reference.q[:, 0], reference.theta_p[:, 0], temperature_c=initial_temperature_c, qd0=reference.qd[:, 0]
    )
    shape = (b, n_t, n)
    rec = {
        name: np.empty(shape) for name in ("q", "qd", "effort", "temp", "ql", "qdl", "qm", "qdm", "eff", "u", "visc")
    }
    wrench_rec = np.zeros((b, n_t, k_dof))
    impact = np.zeros((b, n_t), dtype=bool)
    noise = rng.normal(size=shape) * sensors.effort_noise_std
    jitter = np.clip(rng.normal(size=(b, n_t)) * sensors.jitter_std_s, -0.4 * sample_step_s, 0.4 * sample_step_s)
    t = np.arange(n_t) * sample_step_s
    qm0, qdm0 = plant.motor_side(state)
    previous = quantise(qm0 - qdm0 * sample_step_s, sensors.encoder_count)
    z = np.zeros((b, n))
    friction = plant.config.friction
    if sensors.reported is not None and len(sensors.reported) != n:
        raise ShapeError(f"sensors.reported: expected {n} values, got {len(sensors.reported)}")
    streams_command = np.array([r is ReportedEffort.COMMAND for r in (sensors.reported or ())] or [False] * n)

    for k in range(n_t):  # time stepping is sequential; every line below is vectorised over the batch
        ql, qdl = plant.load_side(state)
        qm, qdm = plant.motor_side(state)
        reading = quantise(qm, sensors.encoder_count)
        rate = (reading - previous) / sample_step_s  # backward difference of the encoder readings
        previous = reading
        rec["q"][:, k], rec["qd"][:, k] = reading, rate
        rec["effort"][:, k] = state.effort + noise[:, k]
        rec["temp"][:, k] = state.temperature_c
        rec["ql"][:, k], rec["qdl"][:, k], rec["qm"][:, k], rec["qdm"][:, k] = ql, qdl, qm, qdm
        rec["eff"][:, k] = state.effort
        rec["visc"][:, k] = 0.0 if friction is None else friction.viscous(state.temperature_c)
        parts = [w for w in (pulse.wrench(t[k]) for pulse in pulses) if w is not None]
        if parts:
            wrench_rec[:, k] = np.sum(parts, axis=0)
            impact[:, k] = np.any([pulse.active(t[k]) for pulse in pulses], axis=0)
        u, z = controller.command(
            reference.q[:, k], reference.qd[:, k], reference.effort_ff[:, k], reading, rate, z, sample_step_s
        )
        rec["u"][:, k] = u
        rec["effort"][:, k] = np.where(streams_command, u + noise[:, k], rec["effort"][:, k])  # command: u_k
        state = plant.advance(state, u, reference.theta_p[:, k], n_steps=substeps, pulses=pulses)
        state = plant.heat(state, ambient, sample_step_s)

    is_current = sensors.current_gain is not None
    measured = rec["effort"] / sensors.current_gain if sensors.current_gain is not None else rec["effort"]
    fault = np.where(impact, np.uint8(FaultLabel.IMPACT), np.uint8(0)) | flags[:, None]
    zeros = np.zeros((b, n))
    truth = Truth(
        q=rec["ql"],
        qd=rec["qdl"],
        q_motor=rec["qm"],
        qd_motor=rec["qdm"],
        effort=rec["eff"],
        command=rec["u"],
        theta_p=reference.theta_p,
        friction_coulomb=zeros if friction is None else np.broadcast_to(friction.coulomb, (b, n)).copy(),
        friction_static=zeros if friction is None else np.broadcast_to(friction.static, (b, n)).copy(),
        friction_viscous=rec["visc"],
        contact_wrench=wrench_rec,
        fault=fault.astype(np.uint8),
    )
    return RunRecord(
        t_s=t,
        stamp_s=t[None, :] + jitter,
        q=rec["q"],
        qd=rec["qd"],
        effort=measured,
        is_current=is_current,
        temperature_c=rec["temp"],
        tool=reference.tool,
        reference=reference,
        truth=truth,
    )


def delta_reference(
    model: object, paths: Sequence[SegmentPath], t_s: Array, *, theta_ff: Array | None = None
) -> tuple[Reference, Array]:
    """Reference of a delta following one platform path per system; also returns the planned x (B, T, 3).

    ``model`` is a :class:`shadow.robots.delta.DeltaModel`; its ``inverse_dynamics_from_platform`` gives
    (q, qd, qdd) of each path (one vectorised call per system at set-up).
    """
    qs, qds, qdds, xs, thetas, tools = [], [], [], [], [], []
    for path in paths:
        smp = path.sample(t_s)
        q, qd, qdd, _ = model.inverse_dynamics_from_platform(smp.x, smp.xd, smp.xdd, smp.theta_p[0])  # type: ignore[attr-defined]
        qs.append(q)
        qds.append(qd)
        qdds.append(qdd)
        xs.append(smp.x)
        thetas.append(smp.theta_p)
        tools.append(smp.tool)
    reference = reference_from_joint_motion(
        model,  # type: ignore[arg-type]
        np.array(qs),
        np.array(qds),
        np.array(qdds),
        np.array(thetas),
        np.array(tools),
        theta_ff=theta_ff,
    )
    return reference, np.array(xs)


def hexapod_reference(model: object, samples: Sequence[PathSample], *, theta_ff: Array | None = None) -> Reference:
    """Reference of a hexapod following one sampled pose path per system (x = [position, XYZ angles]).

    ``model`` is a :class:`shadow.robots.hexapod.HexapodModel`: ``actuator_motion`` gives (q, qd, qdd) and
    ``rigid_regressor_from_platform`` the feed-forward, without forward kinematics.
    """
    qs, qds, qdds, ffs = [], [], [], []
    for i, smp in enumerate(samples):
        p, rot, twist, accel = pose_motion(smp)
        q, qd, qdd = model.actuator_motion(p, rot, twist, accel)  # type: ignore[attr-defined]
        tau_known, y_p = model.rigid_regressor_from_platform(p, rot, twist, accel)  # type: ignore[attr-defined]
        theta = smp.theta_p if theta_ff is None else theta_ff[i]
        qs.append(q)
        qds.append(qd)
        qdds.append(qdd)
        ffs.append(tau_known + np.einsum("tap,tp->ta", y_p, theta))
    return Reference(
        q=np.array(qs),
        qd=np.array(qds),
        qdd=np.array(qdds),
        effort_ff=np.array(ffs),
        theta_p=np.array([s.theta_p for s in samples]),
        tool=np.array([s.tool for s in samples]),
    )


# ------------------------------------------------------------------------------------------ demo set-up
@dataclass(frozen=True, slots=True)
class DemoEffects:
    """Invented effect sizes for demos and tests (no source); the description supplies the nominal friction."""

    static_to_coulomb: float = 1.25  # F_s / F_c
    stribeck_velocity_factor: float = 5.0  # v_s = factor * the description's smoothing velocity
    viscosity_temperature_coefficient_per_k: float = 0.025  # beta, gear oil (from memory)
    coupling_frequency_hz: float | None = None  # two-mass mode at the home pose; None: rigid drive train
    coupling_damping_ratio: float = 0.05
    backlash: float = 0.0  # [rad | m]
    thermal_resistance_k_per_w: float = 0.6
    thermal_capacitance_j_per_k: float = 4000.0  # R C = 40 min
    winding_resistance_20c_ohm: float = 1.5
    counts_per_motor_rev: int = 2**17
    effort_noise_fraction: float = 0.002  # std of the effort reading, fraction of rated effort
    jitter_std_s: float = 2e-5


def demo_loop(
    description: RobotDescription,
    *,
    effects: DemoEffects,
    internal_step_s: float,
    bandwidth_hz: float = 12.0,
    mass_update: MassUpdate = MassUpdate.EVERY_STAGE,
) -> tuple[Plant, JointPid, Sensors]:
    """Plant, controller and sensors for a described robot with the demo effect sizes.

    The controller is tuned on the diagonal of M at the home pose (tool carried, no work piece) and gets the
    description's nominal Coulomb and viscous friction as feed-forward; the plant's friction is the Stribeck
    curve built on the same nominal values, so the two differ by the Stribeck hump and the heating.
    """
    model = plant_mechanism(build_model(description))  # warm-started forward kinematics for a hexapod
    drives = description.parameters.drives
    n = len(drives)
    nominal = description.friction
    coulomb = np.zeros(n) if nominal is None else np.asarray(nominal.coulomb, dtype=float)
    viscous = np.zeros(n) if nominal is None else np.asarray(nominal.viscous, dtype=float)
    v_e = 1e-2 if nominal is None else float(nominal.smooth_velocity)
    friction = StribeckFriction(
        coulomb=coulomb,
        static=effects.static_to_coulomb * coulomb,
        stribeck_velocity=np.full(n, effects.stribeck_velocity_factor * v_e),
        viscous_ref=viscous,
        viscosity_temperature_coefficient_per_k=np.full(n, effects.viscosity_temperature_coefficient_per_k),
        smoothing_velocity=v_e,
    )
    jr = reflected_inertias(drives)
    theta_tool = description.tool.payload_parameters(gripping=False)
    if isinstance(model, DeltaModel):
        home = description.home_position_m
        q_home = model.inverse_kinematics(np.asarray(home, dtype=float)[None])
    else:
        q_home = model.inverse_kinematics(
            np.asarray(description.parameters.home_position_m, dtype=float)[None], np.eye(3)[None]
        )
    m_home = model.mass_matrix(q_home, theta_tool)[0]
    coupling = None
    if effects.coupling_frequency_hz is not None:
        coupling = coupling_for_mode(
            effects.coupling_frequency_hz,
            effects.coupling_damping_ratio,
            jr,
            np.diag(m_home) - jr,
            backlash=effects.backlash,
        )
    gains = current_to_effort_gains(drives)
    config = PlantConfig(
        rotor_inertia=jr,
        current_time_constant_s=current_loop_time_constant_s(drives),
        friction=friction,
        coupling=coupling,
        thermal=DriveThermal(
            thermal_resistance_k_per_w=np.full(n, effects.thermal_resistance_k_per_w),
            thermal_capacitance_j_per_k=np.full(n, effects.thermal_capacitance_j_per_k),
            winding_resistance_20c_ohm=np.full(n, effects.winding_resistance_20c_ohm),
        ),
        effort_per_ampere=gains,
    )
    plant = Plant(model, config, internal_step_s=internal_step_s, mass_update=mass_update)
    nominal_ff = StribeckFriction(
        coulomb=coulomb,
        static=coulomb,
        stribeck_velocity=np.full(n, 1.0),
        viscous_ref=viscous,
        viscosity_temperature_coefficient_per_k=np.zeros(n),
        smoothing_velocity=v_e,
    )
    controller = JointPid.from_bandwidth(np.diag(m_home), bandwidth_hz, friction_feedforward=nominal_ff)
    rated = np.array([d.rated_effort for d in drives])
    current = drives[0].measured is MeasuredQuantity.MOTOR_CURRENT
    sensors = Sensors(
        encoder_count=encoder_count_size(drives, effects.counts_per_motor_rev),
        effort_noise_std=effects.effort_noise_fraction * rated,
        current_gain=gains if current else None,
        jitter_std_s=effects.jitter_std_s,
        reported=tuple(d.reported for d in drives),
    )
    return plant, controller, sensors
