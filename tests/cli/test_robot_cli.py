"""``shadow robot check`` and ``shadow robot efforts``: help, clear errors, and good runs on the shipped examples."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.cli import main
from shadow.cli.robot import differentiate
from shadow.robots.description import EXAMPLES_DIR, build_model, load_description
from shadow.robots.rotations import rotation_from_xyz_angles

DELTA_FILE = EXAMPLES_DIR / "delta_packaging.toml"
HEXAPOD_FILE = EXAMPLES_DIR / "hexapod_inspection.toml"


def write_csv(path: Path, header: list[str], rows: np.ndarray) -> Path:
    lines = [",".join(header)] + [",".join(repr(float(v)) for v in row) for row in rows]
    path.write_text("\n".join(lines) + "\n")
    return path


def read_csv(path: Path) -> tuple[list[str], np.ndarray]:
    text = path.read_text().splitlines()
    return text[0].split(","), np.array([[float(v) for v in line.split(",")] for line in text[1:]])


def delta_joint_motion(n_samples: int = 801) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """q(t) = q_0 + A sin(w t + phase) on [0, 0.8] s with its analytic derivatives."""
    t = np.linspace(0.0, 0.8, n_samples)[:, None]
    q0, amp, w, phase = np.array([0.45, 0.40, 0.50]), np.array([0.3, 0.25, 0.2]), 2 * np.pi * 1.5, np.array([0, 1, 2])
    q = q0 + amp * np.sin(w * t + phase)
    qd = amp * w * np.cos(w * t + phase)
    qdd = -amp * w**2 * np.sin(w * t + phase)
    return t[:, 0], q, qd, qdd


# ------------------------------------------------------------------------------------------ help


def test_robot_help_lists_both_actions(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main(["robot", "--help"])
    assert stop.value.code == 0
    out = capsys.readouterr().out
    assert "check" in out and "efforts" in out


def test_efforts_help_names_the_column_layouts(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main(["robot", "efforts", "--help"])
    assert stop.value.code == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "time_s,x_m,y_m,z_m,roll_rad,pitch_rad,yaw_rad" in out
    assert "--friction" in out and "-o OUT.csv" in out


def test_robot_needs_an_action(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main(["robot"])
    assert stop.value.code == 2
    assert "ACTION" in capsys.readouterr().err


# ------------------------------------------------------------------------------------------ errors


def test_bad_description_exits_2_with_the_field(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / "line2.toml"
    bad.write_text(DELTA_FILE.read_text().replace("base_radius_m = 0.200", "base_radius_mm = 200.0"))
    assert main(["robot", "check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("shadow robot: error: ")
    assert f"{bad}: geometry.base_radius_mm: wrong unit, this schema takes base_radius_m (metres)" in err


def test_missing_description_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["robot", "check", str(tmp_path / "absent.toml")]) == 2
    assert "cannot read the description" in capsys.readouterr().err


def test_bad_csv_value_names_line_and_column(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    motion = tmp_path / "motion.csv"
    motion.write_text("time_s,x_m,y_m,z_m\n0.0,0,0,-0.8\n0.001,0,abc,-0.8\n0.002,0,0,-0.8\n")
    assert main(["robot", "efforts", str(DELTA_FILE), str(motion)]) == 2
    assert "motion.csv: line 3, column y_m: not a number: 'abc'" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("time_s,x,y,z\n0,0,0,-0.8\n", "line 1: header 'time_s,x,y,z' is not one of (delta)"),
        ("time_s,x_m,y_m,z_m\n0,0,0,-0.8\n0.001,0,0\n", "line 3: expected 4 columns, got 3"),
        (
            "time_s,x_m,y_m,z_m\n0,0,0,-0.8\n0.001,0,0,-0.8\n0.001,0,0,-0.8\n",
            "line 4, column time_s: time must increase",
        ),
        ("time_s,x_m,y_m,z_m\n0,0,0,-0.8\n0.001,0,nan,-0.8\n0.002,0,0,-0.8\n", "line 3, column y_m: not finite"),
        ("time_s,x_m,y_m,z_m\n0,0,0,-0.8\n0.001,0,0,-0.8\n", "needs at least 3 samples"),
        ("", "line 1: empty file"),
    ],
)
def test_bad_csv_layouts(tmp_path: Path, capsys: pytest.CaptureFixture[str], content: str, message: str) -> None:
    motion = tmp_path / "motion.csv"
    motion.write_text(content)
    assert main(["robot", "efforts", str(DELTA_FILE), str(motion)]) == 2
    assert message in capsys.readouterr().err


def test_unreachable_motion_names_the_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rows = np.array([[0.0, 0.0, 0.0, -3.0], [0.001, 0.0, 0.0, -3.0], [0.002, 0.0, 0.0, -3.0]])
    motion = write_csv(tmp_path / "far.csv", ["time_s", "x_m", "y_m", "z_m"], rows)
    assert main(["robot", "efforts", str(DELTA_FILE), str(motion)]) == 2
    err = capsys.readouterr().err
    assert "far.csv: x[0]: leg" in err and "misses it by" in err


# ------------------------------------------------------------------------------------------ good runs


@pytest.mark.parametrize("path", [DELTA_FILE, HEXAPOD_FILE], ids=lambda p: p.stem)
def test_check_prints_the_summary(path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["robot", "check", str(path), "--grid", "7"]) == 0
    out = capsys.readouterr().out
    family = "delta" if "delta" in path.name else "hexapod"
    assert f": {family}, " in out
    assert "reach" in out and "home" in out and "% of rated" in out
    assert "worst" in out and "condition number" in out


def test_three_point_differences_exact_for_quadratics(rng: np.random.Generator) -> None:
    # Three-point difference formulas on uneven steps are exact for polynomials of degree 2
    # (Burden & Faires, Numerical Analysis, section 4.1; from memory).
    t = np.cumsum(rng.uniform(0.5e-3, 1.5e-3, 40))
    f = (3.0 - 2.0 * t + 7.0 * t**2)[:, None]
    fd, fdd = differentiate(t, f)
    assert_allclose(fd[:, 0], -2.0 + 14.0 * t, rtol=1e-9, atol=1e-9)
    assert_allclose(fdd[:, 0], 14.0, rtol=1e-6)


def test_delta_efforts_match_model_with_analytic_derivatives(tmp_path: Path) -> None:
    # Finite differences at 1 kHz of a smooth motion converge to the calculus derivatives: the CLI's
    # efforts must equal the model's at the analytic (qd, qdd) to the O(h^2) truncation error.
    t, q, qd, qdd = delta_joint_motion()
    motion = write_csv(tmp_path / "q.csv", ["time_s", "q1_rad", "q2_rad", "q3_rad"], np.column_stack([t, q]))
    out = tmp_path / "tau.csv"
    assert main(["robot", "efforts", str(DELTA_FILE), str(motion), "-o", str(out)]) == 0
    header, data = read_csv(out)
    assert header == ["time_s", "effort1_nm", "effort2_nm", "effort3_nm"]
    description = load_description(DELTA_FILE)
    tau = build_model(description).inverse_dynamics(q, qd, qdd, description.tool.payload_parameters(gripping=False))
    assert_allclose(data[:, 0], t, rtol=0, atol=0)
    inner = slice(1, -1)  # the end samples take their neighbour's acceleration
    assert_allclose(data[inner, 1:], tau[inner], rtol=0, atol=2e-3 * np.abs(tau).max())


def test_delta_platform_and_joint_inputs_agree(tmp_path: Path) -> None:
    t, q, _, _ = delta_joint_motion()
    description = load_description(DELTA_FILE)
    x = build_model(description).forward_kinematics(q)
    by_q = tmp_path / "by_q.csv"
    by_x = tmp_path / "by_x.csv"
    q_csv = write_csv(tmp_path / "q.csv", ["time_s", "q1_rad", "q2_rad", "q3_rad"], np.column_stack([t, q]))
    x_csv = write_csv(tmp_path / "x.csv", ["time_s", "x_m", "y_m", "z_m"], np.column_stack([t, x]))
    assert main(["robot", "efforts", str(DELTA_FILE), str(q_csv), "-o", str(by_q), "--work-piece"]) == 0
    assert main(["robot", "efforts", str(DELTA_FILE), str(x_csv), "-o", str(by_x), "--work-piece"]) == 0
    tau_q, tau_x = read_csv(by_q)[1][1:-1, 1:], read_csv(by_x)[1][1:-1, 1:]
    assert_allclose(tau_x, tau_q, rtol=0, atol=2e-3 * np.abs(tau_q).max())


def test_friction_flag_adds_the_nominal_friction(tmp_path: Path) -> None:
    t, q, _, _ = delta_joint_motion(201)
    motion = write_csv(tmp_path / "q.csv", ["time_s", "q1_rad", "q2_rad", "q3_rad"], np.column_stack([t, q]))
    plain, rough = tmp_path / "plain.csv", tmp_path / "rough.csv"
    assert main(["robot", "efforts", str(DELTA_FILE), str(motion), "-o", str(plain)]) == 0
    assert main(["robot", "efforts", str(DELTA_FILE), str(motion), "-o", str(rough), "--friction"]) == 0
    qd, _ = differentiate(t, q)
    nominal = load_description(DELTA_FILE).friction
    assert nominal is not None
    assert nominal.stribeck_velocity is not None and nominal.stribeck is not None  # the example declares the term
    s = np.tanh(qd / nominal.smooth_velocity)  # the friction law written out (docs/robot-description.md)
    hump = nominal.stribeck * s * np.exp(-((qd / nominal.stribeck_velocity) ** 2))
    expected = nominal.coulomb * s + nominal.viscous * qd + nominal.offset + hump
    assert_allclose(read_csv(rough)[1][:, 1:] - read_csv(plain)[1][:, 1:], expected, rtol=1e-8, atol=1e-8)


def test_friction_flag_without_friction_section(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    text = DELTA_FILE.read_text()
    bare = tmp_path / "bare.toml"
    bare.write_text(text[: text.index("[friction]")])
    t, q, _, _ = delta_joint_motion(11)
    motion = write_csv(tmp_path / "q.csv", ["time_s", "q1_rad", "q2_rad", "q3_rad"], np.column_stack([t, q]))
    assert main(["robot", "efforts", str(bare), str(motion), "--friction"]) == 2
    assert "friction: --friction needs a [friction] section" in capsys.readouterr().err


def test_hexapod_platform_motion_to_stdout(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    # At rest (constant pose) the efforts are the static ones: compare with the model's static call.
    rows = np.array([[k * 1e-3, 0.01, -0.02, 0.36, 0.03, -0.02, 0.05] for k in range(5)])
    motion = write_csv(tmp_path / "pose.csv", ["time_s", "x_m", "y_m", "z_m", "roll_rad", "pitch_rad", "yaw_rad"], rows)
    assert main(["robot", "efforts", str(HEXAPOD_FILE), str(motion)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == "time_s," + ",".join(f"effort{j}_n" for j in range(1, 7))
    data = np.array([[float(v) for v in line.split(",")] for line in lines[1:]])
    description = load_description(HEXAPOD_FILE)
    model = build_model(description)
    R = rotation_from_xyz_angles(rows[:1, 4:])
    zeros = np.zeros((1, 6))
    static = model.inverse_dynamics_from_platform(rows[:1, 1:4], R, zeros, zeros, description.tool.payload_parameters())
    assert_allclose(data[:, 1:], np.repeat(static, 5, axis=0), rtol=1e-9)


def test_grid_must_have_two_points(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main(["robot", "check", str(DELTA_FILE), "--grid", "1"])
    assert stop.value.code == 2
    assert "--grid: must be at least 2, got 1" in capsys.readouterr().err
