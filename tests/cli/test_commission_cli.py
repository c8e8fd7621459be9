"""``shadow commission``: help, a good run writes a baseline the live tracker accepts, clear errors on bad input.

Truth: recordings generated here from the project's rigid delta model with known masses, friction and noise,
streamed as motor currents through the drives' nominal gains (tau = eta k_t G i, shadow.robots.drives).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.cli import commission
from shadow.errors import ShadowError
from shadow.estimation.tracker import PayloadFrictionTracker, TrackerSettings
from shadow.ingest.wire import PositionUnit, SampleBatch, encode_json
from shadow.robots.delta import DeltaModel
from shadow.robots.description import EXAMPLES_DIR, build_model, load_description
from shadow.robots.drives import current_from_effort, reported_effort_delays_s
from shadow.robots.friction import friction_effort
from shadow.robots.parameters import MeasuredQuantity

DELTA_FILE = EXAMPLES_DIR / "delta_packaging.toml"
HEXAPOD_FILE = EXAMPLES_DIR / "hexapod_inspection.toml"
T0_S = 1.8e9  # 2027-01-15, Unix time
DT_S = 1.0e-3
TOOL_KG, WORK_KG = 0.37, 0.24  # demo values near the description's nominal ones
THETA_F = np.tile([0.8, 0.15, 0.05], 3)  # demo friction [N m, N m s/rad, N m]
SIGMA_NM = 0.05
V_S = 0.01  # the description's smooth velocity [rad/s]


def run_cli(argv: list[str]) -> int:
    """Parse and run like ``shadow`` does (the lead registers the module in shadow.cli)."""
    parser = argparse.ArgumentParser(prog="shadow")
    commission.register(parser.add_subparsers(dest="command"))
    args = parser.parse_args(argv)
    return int(args.handler(args))


def delta_efforts(rng: np.random.Generator, n_samples: int, extra_kg: float = 0.0, gain: np.ndarray | None = None):
    model = build_model(load_description(DELTA_FILE))
    assert isinstance(model, DeltaModel)
    t = np.arange(n_samples) * DT_S
    q0 = model.inverse_kinematics(np.array([[0.0, 0.0, -0.8]]))[0]
    w = 2 * np.pi * np.array([1.1, 1.7, 2.3])
    a = np.array([0.3, 0.25, 0.3])
    ph = np.outer(t, w) + np.array([0.0, 1.0, 2.0])
    q = q0 + a * np.sin(ph)
    grip = np.floor(t / 0.35) % 2 == 1
    # the description's drives: actual efforts sampled under a command held one sample, 0.31 ms behind the motion
    # (shadow.robots.drives.reported_effort_delay_s), so each effort is the motion's at t - d
    d = reported_effort_delays_s(load_description(DELTA_FILE).parameters.drives, DT_S)
    assert np.ptp(d) == 0.0 and 2e-4 < d[0] < 4e-4
    ph = np.outer(t - d[0], w) + np.array([0.0, 1.0, 2.0])
    qe, qd, qdd = q0 + a * np.sin(ph), a * w * np.cos(ph), -a * w**2 * np.sin(ph)
    tau_known, y_p = model.rigid_regressor(qe, qd, qdd)
    tau = tau_known + y_p[:, :, 0] * (TOOL_KG + extra_kg + WORK_KG * grip)[:, None]
    tau = tau + friction_effort(qd, THETA_F, smooth_velocity=V_S)
    if gain is not None:
        tau = tau / gain  # the nominal gain reads the true effort scaled by 1 / gamma
    return T0_S + t, q, tau + SIGMA_NM * rng.normal(size=q.shape), grip


def write_recording(path: Path, t, q, effort, grip, *, robot: str = "kestrel-harwick-line2-p4", per_message=250):
    drives = load_description(DELTA_FILE).parameters.drives
    current = current_from_effort(effort, drives)
    lines = []
    for seq, start in enumerate(range(0, t.size, per_message)):
        s = slice(start, start + per_message)
        batch = SampleBatch(
            robot_id=robot,
            seq=seq,
            position_unit=PositionUnit.RAD,
            effort_kind=MeasuredQuantity.MOTOR_CURRENT,
            t=t[s],
            q=q[s],
            current=current[s],
            gripping=grip[s],
        )
        lines.append(encode_json(batch).decode())
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture
def recording(tmp_path: Path, rng: np.random.Generator) -> Path:
    return write_recording(tmp_path / "healthy.jsonl", *delta_efforts(rng, 3000))


def test_help(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exc:
        run_cli(["commission", "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    assert "RECORDING" in out and "--gain-run" in out and "--test-mass-kg" in out and "non-causal" in out


def test_good_run_writes_a_baseline_the_tracker_accepts(
    tmp_path: Path, recording: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_file = tmp_path / "baseline.json"
    assert run_cli(["commission", str(DELTA_FILE), str(recording), "-o", str(out_file)]) == 0
    report = capsys.readouterr().out
    assert "tool_mass" in report and "95 % interval" in report and "condition number" in report
    assert "noise std per actuator" in report and "every parameter was seen" in report
    baseline, doc = commission.read_baseline_file(out_file)
    assert doc["format"] == "shadow-baseline" and doc["version"] == 1
    assert doc["run"]["messages"] == 12 and doc["run"]["start_utc"].startswith("2027-01-15T08:00:00")
    # truth: the injected values
    assert_allclose([baseline.tool_mass_kg, baseline.work_piece_mass_kg], [TOOL_KG, WORK_KG], rtol=0.05)
    assert_allclose(baseline.friction_parameters, THETA_F, rtol=0.1, atol=0.01)
    assert_allclose(baseline.noise_std, SIGMA_NM, rtol=0.15)
    est = {e["name"]: e for e in doc["estimates"]}
    assert (
        est["coulomb_1"]["unit"] == "N.m" and est["viscous_1"]["unit"] == "N.m.s/rad" and est["tool_mass"]["identified"]
    )
    assert est["tool_mass"]["ci_low"] < est["tool_mass"]["value"] < est["tool_mass"]["ci_high"]
    assert doc["excitation"]["unseen"] == [] and doc["gain_calibration"] is None
    model = build_model(load_description(DELTA_FILE))
    settings = TrackerSettings(
        half_window=10,
        poly_order=3,
        max_gap_s=0.01,
        output_period_s=1.0,
        smooth_velocity=V_S,
        payload_prior_std=np.array([0.1, 0.1]),
        payload_walk_std=np.array([1e-3, 1e-3]),
        friction_walk_std=np.full(3, 1e-3),
        payload_resolution=np.array([0.05, 0.05]),
        friction_resolution=np.full(3, 0.05),
    )
    tracker = PayloadFrictionTracker(model, settings, baseline)  # accepts it
    t, q, effort, grip = delta_efforts(np.random.default_rng(7), 2500)
    out = tracker.process(t - T0_S, q, effort, tool_gripping=grip)
    assert out and np.all(np.isfinite(out[-1].x))


def test_gain_run(tmp_path: Path, rng: np.random.Generator, capsys: pytest.CaptureFixture[str]) -> None:
    # truth: actuator 1's drive gives 3 % more effort per ampere than its nominal gain, in both runs; the second
    # run carries 2 kg more. The gain comes out within its interval, and with --apply-gains the friction and noise
    # of actuator 1 are those injected (without, its noise std grows by the 3 % misfit of the efforts).
    gain = np.array([1.03, 1.0, 1.0])
    healthy = write_recording(tmp_path / "healthy.jsonl", *delta_efforts(rng, 3000, gain=gain))
    loaded = write_recording(tmp_path / "loaded.jsonl", *delta_efforts(rng, 3000, extra_kg=2.0, gain=gain))
    out_file = tmp_path / "b.json"
    argv = ["commission", str(DELTA_FILE), str(healthy), "-o", str(out_file)]
    assert run_cli([*argv, "--gain-run", str(loaded), "--test-mass-kg", "2.0", "--apply-gains"]) == 0
    assert "drive gains" in capsys.readouterr().out
    doc = json.loads(out_file.read_text())
    g = doc["gain_calibration"]
    assert g["test_mass_kg"] == 2.0 and g["applied"] is True
    assert np.all(np.array(g["ci_low"]) <= gain) and np.all(gain <= np.array(g["ci_high"]))
    assert_allclose(g["gain"], gain, rtol=0.003)
    assert_allclose(doc["friction_parameters"], THETA_F, rtol=0.1, atol=0.01)
    assert_allclose(doc["noise_std"], SIGMA_NM, rtol=0.15)


def test_report_names_what_the_run_could_not_see(
    tmp_path: Path, rng: np.random.Generator, capsys: pytest.CaptureFixture[str]
) -> None:
    t, q, effort, grip = delta_efforts(rng, 3000)
    still = write_recording(tmp_path / "still.jsonl", t, q, effort, np.zeros(t.size, dtype=bool))
    out_file = tmp_path / "b.json"
    assert run_cli(["commission", str(DELTA_FILE), str(still), "-o", str(out_file)]) == 0
    report = capsys.readouterr().out
    assert "what the run could not see" in report and "never gripped" in report
    assert "work_piece_mass" in report and "not seen: held at 0" in report
    doc = json.loads(out_file.read_text())
    assert doc["excitation"]["unseen"][0]["held"] == ["work_piece_mass"]
    assert doc["work_piece_mass_kg"] == 0.25  # the description's nominal work piece
    est = {e["name"]: e for e in doc["estimates"]}
    assert est["work_piece_mass"]["held"] and est["work_piece_mass"]["ci_low"] is None


def hexapod_recording(path: Path, rng: np.random.Generator) -> Path:
    """A leg-force recording of the example hexapod: platform multi-sine in all six axes about home."""
    from shadow.robots.rotations import (
        angular_acceleration_from_xyz_rates,
        angular_velocity_from_xyz_rates,
        rotation_from_xyz_angles,
    )

    desc = load_description(HEXAPOD_FILE)
    model = build_model(desc)
    t = np.arange(2000) * DT_S
    w = 2 * np.pi * np.array([0.9, 1.3, 1.7, 2.1, 2.6, 3.1])
    a = np.array([0.015, 0.015, 0.015, 0.04, 0.04, 0.04])
    ph = np.outer(t, w) + 0.7 * np.arange(6)
    x, xd, xdd = a * np.sin(ph), a * w * np.cos(ph), -a * w**2 * np.sin(ph)
    p = np.asarray(model.params.home_position_m) + x[:, :3]
    R = rotation_from_xyz_angles(x[:, 3:])
    twist = np.concatenate([xd[:, :3], angular_velocity_from_xyz_rates(x[:, 3:], xd[:, 3:])], axis=1)
    accel = np.concatenate([xdd[:, :3], angular_acceleration_from_xyz_rates(x[:, 3:], xd[:, 3:], xdd[:, 3:])], 1)
    q, qd, _ = model.actuator_motion(p, R, twist, accel)
    tau_known, y_p = model.rigid_regressor_from_platform(p, R, twist, accel)
    theta_p = desc.tool.payload_parameters()
    tau = tau_known + y_p @ theta_p + friction_effort(qd, np.tile([20.0, 300.0, 2.0], 6), smooth_velocity=5e-4)
    tau = tau + rng.normal(size=tau.shape)
    lines = []
    for seq, s in enumerate(np.array_split(np.arange(t.size), 4)):
        batch = SampleBatch(
            robot_id=desc.name,
            seq=seq,
            position_unit=PositionUnit.M,
            effort_kind=MeasuredQuantity.EFFORT,
            t=T0_S + t[s],
            q=q[s],
            effort=tau[s],
        )
        lines.append(encode_json(batch).decode())
    path.write_text("\n".join(lines) + "\n")
    return path


def test_hexapod_run(tmp_path: Path, rng: np.random.Generator, capsys: pytest.CaptureFixture[str]) -> None:
    rec = hexapod_recording(tmp_path / "hex.jsonl", rng)
    out_file = tmp_path / "hex.json"
    assert run_cli(["commission", str(HEXAPOD_FILE), str(rec), "-o", str(out_file), "--ideal-drives"]) == 0
    assert "payload model: full" in capsys.readouterr().out
    baseline, doc = commission.read_baseline_file(out_file)
    nominal = load_description(HEXAPOD_FILE).tool.payload_parameters()
    assert baseline.payload_parameters is not None
    assert_allclose(baseline.payload_parameters, nominal, rtol=0.02, atol=5e-3)  # truth: the injected fixture
    assert {e["name"]: e["unit"] for e in doc["estimates"]}["viscous_1"] == "N.s/m"
    assert doc["noise"]["unit"] == "N"


def test_gain_run_needs_the_test_mass(tmp_path: Path, recording: Path) -> None:
    with pytest.raises(ShadowError, match="--gain-run and --test-mass-kg"):
        run_cli(["commission", str(DELTA_FILE), str(recording), "-o", str(tmp_path / "b.json"), "--gain-run", "x"])


def test_truncated_recording_names_the_line(tmp_path: Path, recording: Path) -> None:
    text = recording.read_text()
    recording.write_text(text[: len(text) - 500])  # cut inside the last message
    with pytest.raises(commission.RecordingError, match=r"line 12: .*truncated"):
        run_cli(["commission", str(DELTA_FILE), str(recording), "-o", str(tmp_path / "b.json")])


def test_bad_line_names_line_and_field(tmp_path: Path, recording: Path) -> None:
    lines = recording.read_text().splitlines()
    doc = json.loads(lines[2])
    doc["position"][5] = doc["position"][5][:2]
    lines[2] = json.dumps(doc)
    recording.write_text("\n".join(lines) + "\n")
    with pytest.raises(commission.RecordingError, match=r"line 3: position: not an array of numbers .*\[bad_field\]"):
        run_cli(["commission", str(DELTA_FILE), str(recording), "-o", str(tmp_path / "b.json")])


def test_wrong_robot(tmp_path: Path, rng: np.random.Generator) -> None:
    other = write_recording(tmp_path / "other.jsonl", *delta_efforts(rng, 600), robot="some-other-delta")
    with pytest.raises(commission.RecordingError, match=r"line 1: robot: 'some-other-delta' is not the described"):
        run_cli(["commission", str(DELTA_FILE), str(other), "-o", str(tmp_path / "b.json")])
    # a delta recording against the hexapod's description: the actuator count gives it away
    with pytest.raises(commission.RecordingError, match=r"line 1: position: 3 actuators, expected 6"):
        run_cli(["commission", str(HEXAPOD_FILE), str(other), "-o", str(tmp_path / "b.json"), "--robot", "x"])


def test_unsorted_times(tmp_path: Path, recording: Path) -> None:
    lines = recording.read_text().splitlines()
    lines[3], lines[4] = lines[4], lines[3]
    recording.write_text("\n".join(lines) + "\n")
    with pytest.raises(commission.RecordingError, match=r"line 5: time: first sample .* is not after .* line 4"):
        run_cli(["commission", str(DELTA_FILE), str(recording), "-o", str(tmp_path / "b.json")])


def test_too_few_samples(tmp_path: Path, rng: np.random.Generator) -> None:
    short = write_recording(tmp_path / "short.jsonl", *delta_efforts(rng, 80))
    with pytest.raises(ShadowError, match=r"samples: 60 usable samples after conditioning \(of 80 recorded\)"):
        run_cli(["commission", str(DELTA_FILE), str(short), "-o", str(tmp_path / "b.json")])


def test_empty_and_missing_files(tmp_path: Path) -> None:
    empty = tmp_path / "empty.jsonl"
    empty.write_text("\n")
    with pytest.raises(commission.RecordingError, match="no messages"):
        run_cli(["commission", str(DELTA_FILE), str(empty), "-o", str(tmp_path / "b.json")])
    with pytest.raises(commission.RecordingError, match="cannot read the recording"):
        run_cli(["commission", str(DELTA_FILE), str(tmp_path / "nope.jsonl"), "-o", str(tmp_path / "b.json")])


def test_baseline_file_checks_its_format(tmp_path: Path) -> None:
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"format": "shadow-baseline", "version": 2}))
    with pytest.raises(ShadowError, match="version: 2 is not supported"):
        commission.read_baseline_file(bad)


@pytest.mark.slow
def test_closed_loop_simulator_run(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # realistic data: the project's closed-loop simulator (PID with feed-forward, Stribeck friction with heating,
    # encoder quantisation, current loop, stamp jitter) on eight pick-and-place cycles; truth: its payload.
    # Friction is only checked loosely: the plant's Stribeck curve is not the model's Coulomb + viscous form.
    from simulators.plant import MassUpdate
    from simulators.run import DemoEffects, delta_reference, demo_loop, run_closed_loop
    from simulators.trajectories import delta_pick_place

    rng = np.random.default_rng(11)
    desc = load_description(DELTA_FILE)
    plant, controller, sensors = demo_loop(
        desc, effects=DemoEffects(), internal_step_s=DT_S, mass_update=MassUpdate.EVERY_STEP
    )
    cycles = delta_pick_place(
        rng,
        8,
        centre_m=desc.home_position_m + np.array([-0.15, 0.0, 0.0]),
        tool_mass_kg=0.35,
        workpiece_mass_mean_kg=0.25,
        workpiece_mass_std_kg=0.0,
    )
    t = np.arange(int(cycles.path.end_s / DT_S)) * DT_S
    reference, _ = delta_reference(plant.mechanism, [cycles.path], t)
    rec = run_closed_loop(
        plant,
        controller,
        sensors,
        reference,
        rng,
        sample_step_s=DT_S,
        substeps=1,
        ambient_c=np.full(1, 25.0),
        initial_temperature_c=np.full(3, 25.0),
    )
    assert rec.is_current
    lines = []
    for seq, s in enumerate(np.array_split(np.arange(t.size), t.size // 250)):
        batch = SampleBatch(
            robot_id=desc.name,
            seq=seq,
            position_unit=PositionUnit.RAD,
            effort_kind=MeasuredQuantity.MOTOR_CURRENT,
            t=T0_S + rec.stamp_s[0, s],
            q=rec.q[0, s],
            current=rec.effort[0, s],
            gripping=rec.tool[0, s],
        )
        lines.append(encode_json(batch).decode())
    path = tmp_path / "sim.jsonl"
    path.write_text("\n".join(lines) + "\n")
    out_file = tmp_path / "sim.json"
    assert run_cli(["commission", str(DELTA_FILE), str(path), "-o", str(out_file), "--fit-clock"]) == 0
    baseline, doc = commission.read_baseline_file(out_file)
    est = {e["name"]: e for e in doc["estimates"]}
    sys.stderr.write(  # measured figures, for the record (pytest -s)
        f"simulator run: tool {baseline.tool_mass_kg:.4f} kg (0.35), work piece {baseline.work_piece_mass_kg:.4f} kg "
        f"(0.25), coulomb_1 {est['coulomb_1']['value']:.3f}, viscous_1 {est['viscous_1']['value']:.3f}, "
        f"noise {np.round(baseline.noise_std, 3)} (sensor {sensors.effort_noise_std[0]:.3f})\n"
    )
    assert_allclose([baseline.tool_mass_kg, baseline.work_piece_mass_kg], [0.35, 0.25], rtol=0.03)
    coulomb = baseline.friction_parameters[0::3]
    assert np.all((coulomb > 0.6) & (coulomb < 1.0))  # between the plant's Coulomb 0.8 and static 1.0 N m, or near
    assert np.all(baseline.noise_std > sensors.effort_noise_std)  # model mismatch adds to the sensor noise
