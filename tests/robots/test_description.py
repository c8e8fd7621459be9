"""Robot description files: the shipped examples load, and each kind of mistake is refused by name."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.errors import DescriptionError
from shadow.robots.delta import DeltaModel
from shadow.robots.description import (
    EXAMPLES_DIR,
    DeltaTool,
    HexapodFixture,
    build_model,
    example_paths,
    load_description,
    parse_description,
)
from shadow.robots.hexapod import HexapodModel
from shadow.robots.parameters import DeltaParameters, HexapodParameters, MeasuredQuantity, ReportedEffort

DELTA = (EXAMPLES_DIR / "delta_packaging.toml").read_text()
HEXAPOD = (EXAMPLES_DIR / "hexapod_inspection.toml").read_text()


def edit(text: str, old: str, new: str) -> str:
    """Replace one line of an example (fails loudly if the line is not there)."""
    assert text.count(old) == 1, old
    return text.replace(old, new)


def test_examples_are_shipped() -> None:
    assert [p.name for p in example_paths()] == ["delta_packaging.toml", "hexapod_inspection.toml"]


def test_delta_example_maps_onto_parameters() -> None:
    d = load_description(EXAMPLES_DIR / "delta_packaging.toml")
    assert d.family == "delta" and d.n_actuators == 3
    assert isinstance(d.parameters, DeltaParameters)
    p = d.parameters
    assert (p.base_radius_m, p.forearm_length_m, p.upper_arm_mass_kg) == (0.2, 0.8, 1.2)
    assert_allclose(p.joint_lower_rad, [-0.7] * 3, rtol=0)
    assert_allclose(p.gravity_m_s2, [0.0, 0.0, -9.80665], rtol=0)
    # one drive for all, axis 3 overridden
    assert p.drives[0] == p.drives[1] != p.drives[2]
    assert p.drives[2].rotor_inertia_kg_m2 == 1.6e-4 and p.drives[2].gear_ratio == 25.0
    assert p.drives[0].screw_lead_m is None and p.drives[0].rated_effort == 72.0
    assert all(dr.measured is MeasuredQuantity.MOTOR_CURRENT for dr in p.drives)
    assert isinstance(d.tool, DeltaTool)
    assert_allclose(d.tool.payload_parameters(gripping=True), [0.6], rtol=1e-15)
    assert_allclose(d.tool.payload_parameters(gripping=False), [0.35], rtol=1e-15)
    assert d.friction is not None
    assert_allclose(d.friction.parameters(), np.tile([0.8, 0.15, 0.0, 0.15], 3), rtol=0)  # with a Stribeck level
    assert d.friction.stribeck_velocity == 0.04
    assert isinstance(build_model(d), DeltaModel)
    assert d.source.endswith("delta_packaging.toml")


def test_hexapod_example_maps_onto_parameters() -> None:
    d = load_description(EXAMPLES_DIR / "hexapod_inspection.toml")
    assert d.family == "hexapod" and d.n_actuators == 6
    p = d.parameters
    assert isinstance(p, HexapodParameters)
    assert p.base_joints_m.shape == (6, 3) and p.platform_joints_m.shape == (6, 3)
    # joints on their circles, in the base / platform plane
    assert_allclose(np.linalg.norm(p.base_joints_m[:, :2], axis=1), 0.25, rtol=1e-14)
    assert_allclose(np.linalg.norm(p.platform_joints_m[:, :2], axis=1), 0.15, rtol=1e-14)
    # a base pair is 0.35 rad apart: chord 2 r sin(s / 2)
    assert_allclose(np.linalg.norm(p.base_joints_m[0] - p.base_joints_m[1]), 2 * 0.25 * np.sin(0.175), rtol=1e-13)
    assert all(dr.screw_lead_m == 0.005 and dr.measured is MeasuredQuantity.EFFORT for dr in p.drives)
    assert_allclose(p.home_position_m, [0.0, 0.0, 0.35], rtol=0)
    assert isinstance(d.tool, HexapodFixture)
    theta = d.tool.payload_parameters()
    assert theta.shape == (10,) and theta[0] == 3.5
    model = build_model(d)
    assert isinstance(model, HexapodModel)
    q = model.inverse_kinematics(p.home_position_m[None], np.eye(3)[None])
    assert np.all((q > p.leg_lower_m) & (q < p.leg_upper_m))


def test_explicit_hexapod_joints_equal_paired_form() -> None:
    paired = parse_description(HEXAPOD).parameters
    assert isinstance(paired, HexapodParameters)
    rows = lambda a: "[" + ", ".join("[" + ", ".join(repr(float(x)) for x in r) + "]" for r in a) + "]"  # noqa: E731
    base, plat = rows(paired.base_joints_m), rows(paired.platform_joints_m)
    geometry = f"[geometry]\nbase_joints_m = {base}\nplatform_joints_m = {plat}\n"
    text = re.sub(r"\[geometry\].*?\n\n", geometry + "\n", HEXAPOD, count=1, flags=re.S)
    explicit = parse_description(text).parameters
    assert isinstance(explicit, HexapodParameters)
    assert_allclose(explicit.base_joints_m, paired.base_joints_m, rtol=0, atol=0)
    assert_allclose(explicit.platform_joints_m, paired.platform_joints_m, rtol=0, atol=0)


def test_per_actuator_drive_tables() -> None:
    one = (
        "rotor_inertia_kg_m2 = 1.2e-4\ngear_ratio = {n}\nefficiency = 0.9\ntorque_constant_nm_per_a = 0.6\n"
        "current_loop_bandwidth_hz = 800.0\nrated_torque_nm = 72.0\n"
    )
    tables = "".join("[[drives]]\n" + one.format(n=n) for n in (20.0, 25.0, 30.0))
    text = re.sub(r"\[drives\].*?\n\n", "", DELTA, count=1, flags=re.S)
    text = re.sub(r"\[\[drives.overrides\]\].*?\n\n", tables + "\n", text, count=1, flags=re.S)
    p = parse_description(text).parameters
    assert [dr.gear_ratio for dr in p.drives] == [20.0, 25.0, 30.0]


def test_measurement_per_actuator() -> None:
    text = edit(DELTA, 'quantity = "motor_current"', 'quantity = ["motor_current", "effort", "effort"]')
    p = parse_description(text).parameters
    assert [dr.measured for dr in p.drives] == [MeasuredQuantity.MOTOR_CURRENT] + [MeasuredQuantity.EFFORT] * 2


def test_reported_effort_and_command_period() -> None:
    # default: the drives report their actual effort, and no command hold is declared
    for drive in parse_description(HEXAPOD).parameters.drives:
        assert drive.reported is ReportedEffort.ACTUAL and drive.command_period_s is None
    text = edit(
        DELTA,
        'quantity = "motor_current"',
        'quantity = "motor_current"\nreported_effort = ["actual", "command", "actual"]\ncommand_period_s = 0.001',
    )
    drives = parse_description(text).parameters.drives
    assert [d.reported for d in drives] == [ReportedEffort.ACTUAL, ReportedEffort.COMMAND, ReportedEffort.ACTUAL]
    assert [d.command_period_s for d in drives] == [0.001] * 3
    text = edit(
        HEXAPOD, 'quantity = "effort"', 'quantity = "effort"\ncommand_period_s = [5e-4, 5e-4, 5e-4, 1e-3, 1e-3, 1e-3]'
    )
    assert [d.command_period_s for d in parse_description(text).parameters.drives] == [5e-4] * 3 + [1e-3] * 3


@pytest.mark.parametrize(
    ("line", "message"),
    [
        ('reported_effort = "estimated"', r"measurement\.reported_effort: must be one of 'actual', 'command'"),
        ("command_period_s = -1e-3", r"measurement\.command_period_s: must be >= 0, got -0.001"),
        ("command_period_s = [1e-3, 1e-3]", r"measurement\.command_period_s: must be a number or a list of 3"),
        (
            "command_period_ms = 1.0",
            r"measurement\.command_period_ms: wrong unit, this schema takes command_period_s \(seconds\)",
        ),
    ],
)
def test_reported_effort_refusals(line: str, message: str) -> None:
    text = edit(DELTA, 'quantity = "motor_current"', f'quantity = "motor_current"\n{line}')
    with pytest.raises(DescriptionError, match=message):
        parse_description(text)


# ------------------------------------------------------------------------------------------ refusals


def test_wrong_unit_is_named() -> None:
    text = edit(DELTA, "base_radius_m = 0.200", "base_radius_mm = 200.0")
    with pytest.raises(
        DescriptionError,
        match=r"^<string>: geometry\.base_radius_mm: wrong unit, this schema takes base_radius_m \(metres\)$",
    ):
        parse_description(text)


def test_wrong_unit_next_to_the_right_key() -> None:
    text = edit(DELTA, "joint_lower_rad = -0.70", "joint_lower_rad = -0.70\njoint_upper_deg = 83.0")
    with pytest.raises(
        DescriptionError, match=r"limits\.joint_upper_deg: wrong unit, this schema takes joint_upper_rad"
    ):
        parse_description(text)


def test_wrong_unit_of_drive_key() -> None:
    text = edit(HEXAPOD, "screw_lead_m_per_rev = 0.005", "screw_lead_mm_per_rev = 5.0")
    with pytest.raises(DescriptionError, match=r"drives\.screw_lead_mm_per_rev: wrong unit.*screw_lead_m_per_rev"):
        parse_description(text)


def test_negative_mass() -> None:
    text = edit(DELTA, "upper_arm_mass_kg = 1.20", "upper_arm_mass_kg = -1.2")
    with pytest.raises(DescriptionError, match=r"inertia\.upper_arm_mass_kg: must be > 0, got -1\.2"):
        parse_description(text, source="line2.toml")


def test_zero_length() -> None:
    text = edit(HEXAPOD, "leg_lower_m = 0.300", "leg_lower_m = 0.0")
    with pytest.raises(DescriptionError, match=r"limits\.leg_lower_m: must be > 0, got 0"):
        parse_description(text)


def test_missing_field() -> None:
    text = edit(DELTA, "forearm_length_m = 0.800", "")
    with pytest.raises(DescriptionError, match=r"^<string>: geometry\.forearm_length_m: missing field$"):
        parse_description(text)


def test_missing_section() -> None:
    text = re.sub(r"\[measurement\].*?\n\n", "", HEXAPOD, count=1, flags=re.S)
    with pytest.raises(DescriptionError, match=r"^<string>: measurement: missing field$"):
        parse_description(text)


def test_wrong_type() -> None:
    text = edit(DELTA, "gear_ratio = 25.0", 'gear_ratio = "25"')
    with pytest.raises(DescriptionError, match=r"drives\.gear_ratio: must be a number, got str '25'"):
        parse_description(text)


def test_efficiency_outside_unit_interval() -> None:
    text = edit(DELTA, "efficiency = 0.90", "efficiency = 1.05")
    with pytest.raises(DescriptionError, match=r"drives\.efficiency: must be in \(0, 1\], got 1\.05"):
        parse_description(text)


def test_override_of_unknown_actuator() -> None:
    text = edit(DELTA, "actuator = 3", "actuator = 4")
    with pytest.raises(DescriptionError, match=r"drives\.overrides\[1\]\.actuator: must be 1 \.\. 3, got 4"):
        parse_description(text)


def test_unknown_key_is_a_typo() -> None:
    text = edit(DELTA, "platform_mass_kg = 0.50", "platfrom_mass_kg = 0.50\nplatform_mass_kg = 0.50")
    with pytest.raises(DescriptionError, match=r"inertia\.platfrom_mass_kg: unknown key in \[inertia\]"):
        parse_description(text)


def test_screw_lead_on_a_delta_is_unknown() -> None:
    text = edit(DELTA, "gear_ratio = 25.0", "gear_ratio = 25.0\nscrew_lead_m_per_rev = 0.005")
    with pytest.raises(DescriptionError, match=r"drives\.screw_lead_m_per_rev: unknown key"):
        parse_description(text)


def test_schema_version() -> None:
    with pytest.raises(DescriptionError, match=r"schema: unsupported version 2; this loader reads schema = 1"):
        parse_description(edit(DELTA, "schema = 1", "schema = 2"))


def test_not_toml() -> None:
    with pytest.raises(DescriptionError, match=r"^bad\.toml: not valid TOML"):
        parse_description("schema = = 1", source="bad.toml")


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(DescriptionError, match="cannot read the description"):
        load_description(tmp_path / "absent.toml")


def test_impossible_delta_geometry_forearm_too_short() -> None:
    # By hand: the shortest horizontal gap between elbow and platform point is
    # R_b - R_p + L_a cos(1.45) = 0.15 + 0.35 * 0.1205 = 0.1922 m, so a 0.15 m forearm never closes.
    text = edit(DELTA, "forearm_length_m = 0.800", "forearm_length_m = 0.150")
    with pytest.raises(
        DescriptionError,
        match=r"geometry\.forearm_length_m: no closed assembly within the joint limits.* longer than 0\.192",
    ):
        parse_description(text)


def test_impossible_hexapod_geometry_collinear_joints() -> None:
    # All six platform joints on one line (x axis): the platform could turn freely about it.
    rows = ", ".join(f"[{x}, 0.0, 0.0]" for x in (-0.15, -0.1, -0.05, 0.05, 0.1, 0.15))
    base = ", ".join(
        f"[{float(0.25 * np.cos(a))!r}, {float(0.25 * np.sin(a))!r}, 0.0]"
        for a in np.linspace(0, 2 * np.pi, 6, endpoint=False)
    )
    geometry = f"[geometry]\nbase_joints_m = [{base}]\nplatform_joints_m = [{rows}]\n"
    text = re.sub(r"\[geometry\].*?\n\n", geometry + "\n", HEXAPOD, count=1, flags=re.S)
    with pytest.raises(DescriptionError, match=r"geometry\.platform_joints_m: the six joints are collinear"):
        parse_description(text)


def test_hexapod_home_outside_leg_limits() -> None:
    text = edit(HEXAPOD, "position_m = [0.0, 0.0, 0.350]", "position_m = [0.0, 0.0, 0.60]")
    with pytest.raises(
        DescriptionError, match=r"home\.position_m: leg 1 is 0\.6\d+ m long at home, outside the limits"
    ):
        parse_description(text)


def test_delta_home_unreachable() -> None:
    text = edit(DELTA, "position_m = [0.0, 0.0, -0.80]", "position_m = [0.0, 0.0, -2.0]")
    with pytest.raises(DescriptionError, match=r"home\.position_m: not reachable"):
        parse_description(text)


def test_upper_arm_inertia_below_parallel_axis_bound() -> None:
    # Parallel-axis theorem: J_a >= m_a c_a^2 = 1.2 * 0.15^2 = 0.027 kg m^2.
    text = edit(DELTA, "upper_arm_inertia_kg_m2 = 0.045", "upper_arm_inertia_kg_m2 = 0.020")
    with pytest.raises(DescriptionError, match=r"upper_arm_inertia_kg_m2: must be >= .* = 0\.027 \(parallel-axis"):
        parse_description(text)


@pytest.mark.parametrize(
    ("tensor", "message"),
    [
        (
            "[[0.06, 0.01, 0.0], [0.0, 0.06, 0.0], [0.0, 0.0, 0.1]]",
            r"not symmetric: \[0\]\[1\] = 0\.01 but \[1\]\[0\] = 0",
        ),
        ("[[0.06, 0.0, 0.0], [0.0, -0.01, 0.0], [0.0, 0.0, 0.1]]", "not positive semi-definite"),
        # principal moments 0.01, 0.02, 0.1: 0.01 + 0.02 < 0.1, no rigid body (triangle inequality, from memory)
        (
            "[[0.01, 0.0, 0.0], [0.0, 0.02, 0.0], [0.0, 0.0, 0.1]]",
            r"principal moments \[0\.01, 0\.02, 0\.1\] violate the triangle inequality I1 \+ I2 >= I3",
        ),
        ("[[0.06, 0.0], [0.0, 0.06]]", "must be 3 lists of 3 numbers"),
    ],
)
def test_bad_inertia_tensor(tensor: str, message: str) -> None:
    text = edit(
        HEXAPOD,
        "platform_inertia_kg_m2 = [[0.060, 0.0, 0.0], [0.0, 0.060, 0.0], [0.0, 0.0, 0.100]]",
        f"platform_inertia_kg_m2 = {tensor}",
    )
    with pytest.raises(DescriptionError, match=r"inertia\.platform_inertia_kg_m2: " + message):
        parse_description(text)


def test_gravity_is_optional_and_checked() -> None:
    text = edit(DELTA, "gravity_m_s2 = [0.0, 0.0, -9.80665]", "gravity_m_s2 = [0.0, -9.81]")
    with pytest.raises(DescriptionError, match=r"^<string>: gravity_m_s2: must be a list of 3 numbers"):
        parse_description(text)
    without = parse_description(edit(DELTA, "gravity_m_s2 = [0.0, 0.0, -9.80665]", "")).parameters
    assert_allclose(without.gravity_m_s2, [0.0, 0.0, -9.80665], rtol=0)


def test_docs_name_every_key_of_the_examples() -> None:
    # docs/robot-description.md must list every key the shipped examples use (docs that cannot drift).
    docs = (Path(__file__).resolve().parents[2] / "docs" / "robot-description.md").read_text()

    def keys(table: dict[str, object]) -> set[str]:
        found = set(table)
        for value in table.values():
            items = value if isinstance(value, list) else [value]
            found |= {k for item in items if isinstance(item, dict) for k in keys(item)}
        return found

    for path in example_paths():
        for key in keys(tomllib.loads(path.read_text())):
            assert any(f in docs for f in (f"`{key}`", f"[{key}]", f".{key}]]")), f"{path.name}: {key} undocumented"


def test_hexapod_home_conditioning_limit() -> None:
    # The example's inverse Jacobian at home has a condition number of about 14.5; a limit of 10 refuses it.
    with pytest.raises(DescriptionError, match=r"geometry: the legs are \(nearly\) singular at home: .* > 10"):
        parse_description(HEXAPOD, max_home_condition=10.0)


# ------------------------------------------------------------------------------------------ viscous temperature law


def test_viscous_temperature_coefficient_is_optional_and_per_actuator() -> None:
    d = parse_description(DELTA)
    assert d.friction is not None and d.friction.viscous_temperature_coefficient_per_k is None
    assert d.friction.viscous_reference_temperature_k is None
    text = edit(
        DELTA,
        "viscous_nm_s_per_rad = 0.15",
        "viscous_nm_s_per_rad = 0.15\nviscous_temperature_coefficient_per_k = [0.025, 0.02, 0.03]\n"
        "viscous_reference_temperature_k = 313.15",
    )
    f = parse_description(text).friction
    assert f is not None and f.viscous_reference_temperature_k == 313.15
    assert_allclose(f.viscous_temperature_coefficient_per_k, [0.025, 0.02, 0.03], rtol=0)  # type: ignore[arg-type]
    one = edit(
        DELTA,
        "viscous_nm_s_per_rad = 0.15",
        "viscous_nm_s_per_rad = 0.15\nviscous_temperature_coefficient_per_k = 0.02",
    )
    shared = parse_description(one).friction
    assert shared is not None
    assert_allclose(shared.viscous_temperature_coefficient_per_k, [0.02] * 3, rtol=0)  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("line", "message"),
    [
        ("viscous_temperature_coefficient_per_k = -0.01", r"friction\.viscous_temperature_coefficient_per_k: must lie "
         r"in \[0, 0\.1\] 1/K"),
        ("viscous_temperature_coefficient_per_k = [0.02, 0.5, 0.02]", r"viscous_temperature_coefficient_per_k\[2\]: "
         r"must lie in \[0, 0\.1\]"),
        ("viscous_temperature_coefficient_per_k = nan", r"viscous_temperature_coefficient_per_k: must be finite"),
        ("viscous_temperature_coefficient_per_k = [0.02, 0.02]", r"must be a number or a list of 3 numbers"),
        ("viscous_reference_temperature_k = 40.0", r"viscous_reference_temperature_k: must lie in \[200, 450\] K, "
         r"got 40 \(it looks like degrees Celsius; this schema takes kelvins\)"),
        ("viscous_reference_temperature_c = 40.0", r"friction\.viscous_reference_temperature_c: wrong unit, this "
         r"schema takes viscous_reference_temperature_k \(kelvins\)"),
        ("viscous_temperature_coefficient_per_c = 0.02", r"viscous_temperature_coefficient_per_c: wrong unit, this "
         r"schema takes viscous_temperature_coefficient_per_k \(per kelvin\)"),
    ],
)  # fmt: skip
def test_viscous_temperature_law_refusals(line: str, message: str) -> None:
    text = edit(DELTA, "viscous_nm_s_per_rad = 0.15", f"viscous_nm_s_per_rad = 0.15\n{line}")
    with pytest.raises(DescriptionError, match=message):
        parse_description(text)
