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


def write_recording(
    path: Path, t, q, effort, grip, *, robot: str = "kestrel-harwick-line2-p4", per_message=250, temperature=None
):
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
            temperature_k=None if temperature is None else temperature[s],
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
    # the example delta declares a Stribeck term: four parameters per actuator, the injected friction has no hump
    assert baseline.stribeck_velocity == 0.04 and doc["method"]["stribeck_velocity"] == 0.04
    per = baseline.friction_parameters.reshape(3, 4)
    assert_allclose(per[:, :3].reshape(-1), THETA_F, rtol=0.1, atol=0.01)
    assert np.all(np.abs(per[:, 3]) < 0.05)  # no breakaway excess in the data: its level near 0 N m
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
        friction_walk_std=np.full(4, 1e-3),
        payload_resolution=np.array([0.05, 0.05]),
        friction_resolution=np.full(4, 0.05),
        stribeck_velocity=baseline.stribeck_velocity,  # the form the baseline fixes
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
    assert_allclose(np.reshape(doc["friction_parameters"], (3, 4))[:, :3].reshape(-1), THETA_F, rtol=0.1, atol=0.01)
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
    coulomb = np.array([est[f"coulomb_{i + 1}"]["value"] for i in range(3)])
    assert np.all((coulomb > 0.6) & (coulomb < 1.0))  # between the plant's Coulomb 0.8 and static 1.0 N m, or near
    assert np.all(baseline.noise_std > sensors.effort_noise_std)  # model mismatch adds to the sensor noise


# ------------------------------------------------------------------------------------------ viscous temperature law


def test_without_temperatures_the_report_says_so_and_old_baseline_files_still_load(
    tmp_path: Path, recording: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_file = tmp_path / "baseline.json"
    assert run_cli(["commission", str(DELTA_FILE), str(recording), "-o", str(out_file)]) == 0
    report = capsys.readouterr().out
    assert "the recording carries no drive temperatures" in report
    assert "none is declared, so the wear indicator is not compensated for temperature (0 1/K)" in report
    baseline, doc = commission.read_baseline_file(out_file)
    assert baseline.viscous_temperature_coefficient_per_k is None and baseline.reference_temperature_k is None
    assert doc["temperature_law"]["actuators"][0]["source"] == "none"
    # a file written before the temperature law existed: the fields are missing, i.e. not identified
    for key in ("reference_temperature_k", "viscous_temperature_coefficient_per_k", "temperature_law"):
        doc.pop(key)
    old = tmp_path / "old.json"
    old.write_text(json.dumps(doc))
    read, _ = commission.read_baseline_file(old)
    assert read.viscous_temperature_coefficient_per_k is None and read.reference_temperature_k is None
    assert_allclose(read.friction_parameters, baseline.friction_parameters, rtol=0)
    bad = dict(doc, viscous_temperature_coefficient_per_k=[0.02, 0.03])
    old.write_text(json.dumps(bad))
    with pytest.raises(ShadowError, match="viscous_temperature_coefficient_per_k: expected 3 numbers"):
        commission.read_baseline_file(old)


def test_steady_temperature_falls_back_to_the_declared_coefficient(
    tmp_path: Path, rng: np.random.Generator, capsys: pytest.CaptureFixture[str]
) -> None:
    text = DELTA_FILE.read_text().replace(
        "viscous_nm_s_per_rad = 0.15", "viscous_nm_s_per_rad = 0.15\nviscous_temperature_coefficient_per_k = 0.022"
    )
    described = tmp_path / "delta.toml"
    described.write_text(text)
    t, q, effort, grip = delta_efforts(rng, 3000)
    steady = 305.0 + 0.2 * np.sin(t - T0_S)[:, None] * np.ones(3)  # 0.2 K span over 3 s: too little to show k
    rec = write_recording(tmp_path / "steady.jsonl", t, q, effort, grip, temperature=steady)
    out_file = tmp_path / "baseline.json"
    assert run_cli(["commission", str(described), str(rec), "-o", str(out_file)]) == 0
    report = capsys.readouterr().out
    assert (
        "actuator 2: not seen, its drive temperature spanned only 0.2 K during the run (at least 5 K needed)" in report
    )
    assert "the description's declared 0.022 1/K is used" in report
    baseline, doc = commission.read_baseline_file(out_file)
    assert baseline.viscous_temperature_coefficient_per_k is None  # not identified: the field stays out
    assert baseline.reference_temperature_k is not None  # but the commissioning temperature is known
    assert_allclose(baseline.reference_temperature_k, 305.0, atol=0.2)
    law = doc["temperature_law"]["actuators"][1]
    assert (law["source"], law["used_per_k"], law["identified"]) == ("declared", 0.022, False)


@pytest.mark.slow
def test_closed_loop_simulator_run_through_a_warm_up_shows_the_plant_viscosity_law(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # realistic data: the project's closed-loop simulator, whose viscous friction follows Reynolds' exponential law
    # b(T) = b_ref exp(-beta (T - T_ref)) with beta = 0.025 1/K (simulators/effects.py, DemoEffects). The same
    # pick-and-place program is recorded four times, 20 minutes apart, at drive temperatures 25, 33, 41, 49 degC
    # (a commissioning run repeated while the drives warm).
    from simulators.plant import MassUpdate
    from simulators.run import DemoEffects, delta_reference, demo_loop, run_closed_loop
    from simulators.trajectories import delta_pick_place

    rng = np.random.default_rng(11)
    desc = load_description(DELTA_FILE)
    effects = DemoEffects()
    plant, controller, sensors = demo_loop(
        desc, effects=effects, internal_step_s=DT_S, mass_update=MassUpdate.EVERY_STEP
    )
    path = delta_pick_place(
        rng, 8, centre_m=desc.home_position_m + np.array([-0.15, 0.0, 0.0]), tool_mass_kg=0.35,
        workpiece_mass_mean_kg=0.25, workpiece_mass_std_kg=0.0,
    ).path  # fmt: skip
    t = np.arange(int(path.end_s / DT_S)) * DT_S
    reference, _ = delta_reference(plant.mechanism, [path] * 4, t)
    temps_c = np.array([25.0, 33.0, 41.0, 49.0])
    rec = run_closed_loop(
        plant, controller, sensors, reference, rng, sample_step_s=DT_S, substeps=1,
        ambient_c=temps_c, initial_temperature_c=np.repeat(temps_c[:, None], 3, axis=1),
    )  # fmt: skip
    lines = []
    for w in range(4):
        for s in np.array_split(np.arange(t.size), t.size // 250):
            batch = SampleBatch(
                robot_id=desc.name, seq=len(lines), position_unit=PositionUnit.RAD,
                effort_kind=MeasuredQuantity.MOTOR_CURRENT, t=T0_S + 1200.0 * w + rec.stamp_s[w, s], q=rec.q[w, s],
                current=rec.effort[w, s], gripping=rec.tool[w, s], temperature_k=rec.temperature_c[w, s] + 273.15,
            )  # fmt: skip
            lines.append(encode_json(batch).decode())
    recording = tmp_path / "warm-up.jsonl"
    recording.write_text("\n".join(lines) + "\n")
    out_file = tmp_path / "warm-up.json"
    assert run_cli(["commission", str(DELTA_FILE), str(recording), "-o", str(out_file), "--fit-clock"]) == 0
    report = capsys.readouterr().out
    baseline, doc = commission.read_baseline_file(out_file)
    k = baseline.viscous_temperature_coefficient_per_k
    assert k is not None and baseline.reference_temperature_k is not None
    beta = effects.viscosity_temperature_coefficient_per_k
    sys.stderr.write(f"simulator warm-up: k {np.round(k, 5)} 1/K (plant {beta})\n")  # for the record (pytest -s)
    # measured: 0.02478, 0.02497, 0.02444 1/K (-0.9 %, -0.1 %, -2.3 %), each 95 % interval covering 0.025
    assert_allclose(k, beta, rtol=0.05)
    law = doc["temperature_law"]["actuators"]
    assert all(a["ci_low"] < a["coefficient_per_k"] < a["ci_high"] and a["source"] == "identified" for a in law)
    assert_allclose(baseline.reference_temperature_k, 273.15 + 37.0, atol=1.0)  # the run's qd^2-weighted mean
    assert "actuator 1: k = 0.02" in report and "temperature span 24 K" in report
