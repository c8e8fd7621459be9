"""Closed-loop runs: tracking of the delta cycle, sensors, impacts, heating, and the hexapod."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.errors import ConfigurationError
from shadow.robots.description import example_paths, load_description
from shadow.robots.drives import current_to_effort_gains
from simulators.controller import JointPid
from simulators.effects import DriveThermal
from simulators.plant import HalfSinePulse, MassUpdate, Plant, PlantConfig
from simulators.run import (
    DemoEffects,
    FaultLabel,
    Sensors,
    delta_reference,
    demo_loop,
    hexapod_reference,
    reference_from_joint_motion,
    run_closed_loop,
)
from simulators.trajectories import delta_pick_place, hexapod_multisine
from tests.simulators.test_plant import TwoLinkArm

STEP_S = 1e-3  # 1 kHz output and control rate


def _description(family: str):
    return load_description(next(p for p in example_paths() if family in p.name))


@pytest.fixture(scope="module")
def delta_run():
    """Two delta systems, one pick-and-place cycle each, rigid drive train, friction, sensors and heating on."""
    rng = np.random.default_rng(20261202)
    desc = _description("delta")
    plant, controller, sensors = demo_loop(
        desc, effects=DemoEffects(), internal_step_s=STEP_S, mass_update=MassUpdate.EVERY_STEP
    )
    tool = desc.tool.tool_mass_kg
    paths = [
        delta_pick_place(rng, 1, centre_m=desc.home_position_m + [-0.15, 0.0, 0.0], tool_mass_kg=tool).path
        for _ in range(2)
    ]
    t = np.arange(int(min(p.end_s for p in paths) / STEP_S)) * STEP_S
    reference, x_plan = delta_reference(plant.mechanism, paths, t)
    rec = run_closed_loop(
        plant,
        controller,
        sensors,
        reference,
        rng,
        sample_step_s=STEP_S,
        substeps=1,
        ambient_c=np.full(2, 25.0),
        initial_temperature_c=np.full(3, 25.0),
    )
    return plant, sensors, rec, x_plan


def test_delta_tracks_the_cycle(delta_run):
    # stated tracking error of the simulated controller: platform within 0.5 mm of the plan over the whole
    # cycle (peak speed about 3 m/s), with friction, encoder quantisation and effort noise
    plant, _, rec, x_plan = delta_run
    b, n_t, _ = x_plan.shape
    x = plant.mechanism.forward_kinematics(rec.truth.q.reshape(-1, 3)).reshape(b, n_t, 3)
    error = np.linalg.norm(x - x_plan, axis=2)
    speed = np.linalg.norm(np.gradient(x_plan, STEP_S, axis=1), axis=2)
    assert speed.max() > 2.5  # the cycle really is fast
    assert error.max() < 0.5e-3


def test_delta_measurements(delta_run):
    _, sensors, rec, _ = delta_run
    truth = rec.truth
    # encoder readings truncate to whole counts: 0 <= q_true - q_read < one count
    lag = truth.q_motor - rec.q
    assert (lag >= 0).all() and (lag < sensors.encoder_count).all()
    # the example streams motor current: i = effort / (eta k_t G) plus white noise of the stated std
    assert rec.is_current
    residual = rec.effort * sensors.current_gain - truth.effort
    # sample std of ~3000 normal draws lies within 10 % of sigma (chi distribution, 4+ standard errors)
    assert_allclose(residual.std(axis=(0, 1)), sensors.effort_noise_std, rtol=0.1)
    # time stamps: jitter of the stated std, bounded by 0.4 of the period
    jitter = rec.stamp_s - rec.t_s
    assert np.abs(jitter).max() <= 0.4 * STEP_S
    assert_allclose(jitter.std(), sensors.jitter_std_s, rtol=0.1)
    # tool state and payload are recorded: gripping carries more than the tool alone
    assert rec.tool.any() and not rec.tool.all()
    assert (truth.theta_p[rec.tool][:, 0] > truth.theta_p[~rec.tool][:, 0].max()).all()
    # drives warm up under load (copper losses, friction power) from ambient (25 degC)
    assert (rec.temperature_c[:, -1] > rec.temperature_c[:, 0]).all()
    assert (truth.friction_viscous[:, -1] < truth.friction_viscous[:, 0]).all()  # warmer oil, lower b(T)


def test_impact_is_labelled_and_disturbs(rng):
    # a 200 N, 10 ms half-sine push on the arm's tip while holding still: labelled exactly while active,
    # and the contact wrench recorded is the applied one
    arm = TwoLinkArm(rotor_inertia=0.01)
    config = PlantConfig(rotor_inertia=np.full(2, 0.01), current_time_constant_s=np.full(2, 2e-4))
    plant = Plant(arm, config, internal_step_s=STEP_S / 2)
    n_t = 120
    q = np.broadcast_to(np.array([0.3, 0.6]), (2, n_t, 2)).copy()
    zeros = np.zeros_like(q)
    theta = np.zeros((2, n_t, 1))
    reference = reference_from_joint_motion(arm, q, zeros, zeros, theta, np.zeros((2, n_t), dtype=bool))
    pulse = HalfSinePulse(
        start_s=np.array([0.03, 0.0]),
        duration_s=np.array([0.01, 0.01]),
        peak=np.array([200.0, 0.0]),
        direction=np.array([[0.0, -1.0], [0.0, -1.0]]),
    )
    controller = JointPid.from_bandwidth(np.array([0.5, 0.1]), 10.0)
    sensors = Sensors(encoder_count=np.full(2, 1e-6), effort_noise_std=np.zeros(2))
    rec = run_closed_loop(
        plant,
        controller,
        sensors,
        reference,
        rng,
        sample_step_s=STEP_S,
        substeps=2,
        ambient_c=np.full(2, 20.0),
        initial_temperature_c=np.full(2, 20.0),
        pulses=[pulse],
        fault_flags=np.array([0, FaultLabel.FRICTION_WEAR]),
    )
    phase = (rec.t_s - 0.03) / 0.01
    active = (phase > 0) & (phase < 1)  # open interval: the force is non-zero strictly inside
    assert (rec.truth.fault[0] == np.where(active, FaultLabel.IMPACT, 0)).all()
    assert (rec.truth.fault[1] == FaultLabel.FRICTION_WEAR).all()
    expected = 200.0 * np.sin(np.pi * np.clip((rec.t_s - 0.03) / 0.01, 0, 1)) * active
    assert_allclose(rec.truth.contact_wrench[0, :, 1], -expected, rtol=0, atol=1e-9)
    deviation = np.abs(rec.truth.q - q).max(axis=(1, 2))
    assert deviation[0] > 1e-3 and deviation[1] < 1e-6


def test_drive_heats_to_closed_form_steady_state(rng):
    # first-order thermal network with copper resistance R_20 (1 + a (T - 20)) (CRC Handbook, a = 0.00393 /K):
    # holding a constant current i, T settles where T = T_amb + R_th R_20 (1 + a (T - 20)) i^2, i.e.
    # T = (T_amb + R_th R_20 i^2 (1 - 20 a)) / (1 - R_th R_20 i^2 a)
    arm = TwoLinkArm()
    gain = np.array([10.0, 10.0])  # effort per ampere
    thermal = DriveThermal(np.full(2, 4.0), np.full(2, 0.0125), np.full(2, 2.0))  # R C = 0.05 s
    config = PlantConfig(
        rotor_inertia=np.zeros(2), current_time_constant_s=np.zeros(2), thermal=thermal, effort_per_ampere=gain
    )
    plant = Plant(arm, config, internal_step_s=STEP_S)
    q = np.broadcast_to(np.array([0.0, 0.0]), (1, 600, 2)).copy()  # arm horizontal, largest gravity load
    zeros = np.zeros_like(q)
    reference = reference_from_joint_motion(arm, q, zeros, zeros, np.zeros((1, 600, 1)), np.zeros((1, 600), bool))
    controller = JointPid.from_bandwidth(np.array([0.5, 0.1]), 10.0)
    sensors = Sensors(encoder_count=np.full(2, 1e-7), effort_noise_std=np.zeros(2))
    rec = run_closed_loop(
        plant,
        controller,
        sensors,
        reference,
        rng,
        sample_step_s=STEP_S,
        substeps=1,
        ambient_c=np.array([25.0]),
        initial_temperature_c=np.full(2, 25.0),
    )
    i = rec.truth.effort[0, -1] / gain
    a, r = 0.00393, 4.0 * 2.0 * i**2
    expected = (25.0 + r * (1 - 20 * a)) / (1 - r * a)
    assert (expected > 25.5).all()  # both drives warm noticeably
    assert_allclose(rec.temperature_c[0, -1], expected, rtol=0, atol=1e-3)


def test_hexapod_multisine_tracks(rng):
    desc = _description("hexapod")
    plant, controller, sensors = demo_loop(
        desc,
        effects=DemoEffects(coupling_frequency_hz=40.0),
        internal_step_s=STEP_S,
        mass_update=MassUpdate.EVERY_STEP,
    )
    home = desc.parameters.home_position_m
    t = np.arange(200) * STEP_S
    sample = hexapod_multisine(rng, home_m=home).sample(t, desc.tool.payload_parameters())
    reference = hexapod_reference(plant.mechanism, [sample])
    rec = run_closed_loop(
        plant,
        controller,
        sensors,
        reference,
        rng,
        sample_step_s=STEP_S,
        substeps=1,
        ambient_c=np.array([22.0]),
        initial_temperature_c=np.full(6, 30.0),
    )
    assert not rec.is_current  # the example streams leg forces
    # legs within 0.1 mm of the plan; the 40 Hz coupling deflects by tens of micrometres under the static load
    deflection = np.abs(rec.truth.q_motor - rec.truth.q)
    assert 1e-6 < deflection.max() < 1e-4
    assert np.abs(rec.truth.q - reference.q).max() < 1e-4
    assert np.isfinite(rec.effort).all()


def test_rejects_mismatched_steps(delta_run):
    plant, sensors, rec, _ = delta_run
    with pytest.raises(ConfigurationError, match="substeps"):
        run_closed_loop(
            plant,
            JointPid.from_bandwidth(np.ones(3), 5.0),
            sensors,
            rec.reference,
            np.random.default_rng(0),
            sample_step_s=STEP_S,
            substeps=3,
            ambient_c=np.zeros(2),
            initial_temperature_c=np.zeros(3),
        )
    assert current_to_effort_gains(plant.mechanism.params.drives).shape == (3,)
