"""Scenario files: a good file loads into the records it declares; every kind of bad key is named in the error."""

from __future__ import annotations

import datetime as dt
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.errors import ConfigurationError
from shadow.robots.description import example_paths
from simulators.plant import PulseProfile
from simulators.scenario_file import (
    SECONDS_PER_DAY,
    example_scenarios,
    load_scenario,
    parse_scenario,
)
from simulators.sensor_faults import SensorFaultKind

GOOD = """
format = "shadow-scenario/1"
name = "good"
robot = "delta_packaging"
seed = 4
start = 2026-03-02T06:00:00Z
horizon_days = 30

[sampling]
windows = 5
window_s = 0.5

[environment]
ambient_amplitude_k = 10.0

[[faults.wear]]
actuator = 2
rise_fraction = 0.5
start_day = 5
end_day = 25

[[faults.payload_steps]]
day = 12
tool_mass_kg = 0.5

[faults.picks]
missed_fraction = 0.1

[faults.impacts]
window_fraction = 0.2

[[faults.impacts.listed]]
window = 1
offset_s = 0.2
profile = "triangle"

[[faults.sensor]]
kind = "spike"
actuator = 1
size_rated_fraction = 0.2
windows = [0, 3]
"""


def _replace(text: str, old: str, new: str) -> str:
    assert old in text, old
    return text.replace(old, new, 1)


def test_good_file_loads_what_it_declares() -> None:
    sc = parse_scenario(GOOD, "good.toml")
    assert sc.name == "good" and sc.seed == 4 and sc.description.family == "delta"
    assert sc.robot_id == sc.description.name  # the default
    assert sc.start_s == dt.datetime(2026, 3, 2, 6, 0, tzinfo=dt.UTC).timestamp()
    assert sc.sampling.windows == 5 and sc.sampling.sample_step_s == 1e-3 and sc.sampling.samples_per_message == 10
    (ramp,) = sc.wear
    assert (ramp.actuator, ramp.rise_fraction, ramp.start_day, ramp.end_day) == (2, 0.5, 5.0, 25.0)
    assert ramp.terms == ("coulomb", "viscous")
    assert ramp.factor(15.0) == pytest.approx(1.25) and ramp.factor(0.0) == 1.0 and ramp.factor(29.0) == 1.5
    assert sc.payload_steps[0].tool_mass_kg == 0.5 and sc.payload_steps[0].work_piece_mass_kg is None
    assert sc.picks is not None and sc.picks.missed_fraction == 0.1 and sc.picks.double_fraction == 0.0
    assert sc.impacts is not None and sc.impacts.listed[0].shape.profile is PulseProfile.TRIANGLE
    assert sc.impacts.listed[0].shape.peak_rated_fraction == sc.impacts.shape.peak_rated_fraction  # inherited
    (spike,) = sc.sensor_faults
    assert spike.kind is SensorFaultKind.SPIKE and spike.windows == (0, 3) and spike.count == 1
    # even spacing: the first window starts on day 0, the last one ends on the horizon
    days = sc.window_days
    assert days[0] == 0.0
    assert days[-1] + sc.sampling.window_s / SECONDS_PER_DAY == pytest.approx(30.0, abs=1e-12)
    assert all(b > a for a, b in zip(days, days[1:], strict=False))


def test_random_spacing_keeps_windows_apart_inside_the_horizon() -> None:
    text = _replace(GOOD, "window_s = 0.5", 'window_s = 0.5\nspacing = "random"')
    days = parse_scenario(text, "r.toml").window_days
    w, gap = 0.5 / SECONDS_PER_DAY, 1.0 / SECONDS_PER_DAY
    assert days[0] >= 0.0 and days[-1] + w <= 30.0
    assert all(b >= a + w + gap for a, b in zip(days, days[1:], strict=False))
    # a horizon just long enough leaves no freedom: windows back to back, 1 s apart
    bare = text[: text.index("[environment]")]
    tight = parse_scenario(_replace(bare, "horizon_days = 30", "horizon_days = 0.0000752315"), "t.toml")
    assert_allclose(np.diff(tight.window_days) * SECONDS_PER_DAY, 1.5, atol=1e-3)
    assert days == parse_scenario(text, "r.toml").window_days  # drawn from the seed
    assert days != parse_scenario(_replace(text, "seed = 4", "seed = 5"), "r.toml").window_days


def test_listed_spacing_takes_the_days() -> None:
    text = _replace(GOOD, "window_s = 0.5", 'window_s = 0.5\nspacing = "listed"\ndays = [0, 1.5, 2, 20, 29]')
    assert parse_scenario(text, "l.toml").window_days == (0.0, 1.5, 2.0, 20.0, 29.0)


BAD = [
    ('format = "shadow-scenario/1"', 'format = "shadow-scenario/2"', "format: expected 'shadow-scenario/1'"),
    ("seed = 4\n", "", "seed: missing"),
    ("seed = 4", "seed = 4.5", "seed: must be an integer"),
    ("seed = 4", "seed = 4\nseeds = 5", "seeds: unknown key"),
    ('robot = "delta_packaging"', 'robot = "no_such_robot"', "robot: 'no_such_robot' is neither an example robot"),
    ("start = 2026-03-02T06:00:00Z", "start = 2026-03-02T06:00:00", "start: needs a UTC offset"),
    ("start = 2026-03-02T06:00:00Z", 'start = "yesterday"', "start: not an ISO 8601"),
    ("horizon_days = 30", "horizon_days = -1", "horizon_days: must be > 0"),
    ("window_s = 0.5", 'window_s = "long"', "sampling.window_s: must be a number"),
    ("windows = 5", "windows = 0", "sampling.windows: must be >= 1"),
    ("window_s = 0.5", 'window_s = 0.5\nspacing = "sometimes"', "sampling.spacing: must be one of"),
    ("window_s = 0.5", 'window_s = 0.5\nspacing = "listed"\ndays = [1, 2]', "sampling.days: lists 2 days"),
    (
        "window_s = 0.5",
        'window_s = 0.5\nspacing = "listed"\ndays = [0, 3, 2, 4, 5]',
        "sampling.days[2]: 2.0 starts less than 1 s after",
    ),
    ("horizon_days = 30", "horizon_days = 0.0000694", "sampling.windows: 5 windows of 0.5 s, 1 s apart, do not fit"),
    ("ambient_amplitude_k = 10.0", "ambient_amplitude_c = 10.0", "environment.ambient_amplitude_c: unknown key"),
    ("actuator = 2", "actuator = 4", "faults.wear[0].actuator: must be 1 to 3 (this delta has 3 actuators), got 4"),
    ("end_day = 25", "end_day = 4", "faults.wear[0].end_day: 4.0 must be after start_day 5.0"),
    ("end_day = 25", 'end_day = 25\nterms = ["gearbox"]', "faults.wear[0].terms[0]: must be one of"),
    ("rise_fraction = 0.5", "rise_fraction = -0.5", "faults.wear[0].rise_fraction: must be >= 0"),
    ("tool_mass_kg = 0.5", "", "faults.payload_steps[0]: needs tool_mass_kg or work_piece_mass_kg"),
    ("day = 12", "day = 40", "faults.payload_steps[0].day: must be <= 30"),
    ("missed_fraction = 0.1", "missed_fraction = 0.7\ndouble_fraction = 0.5", "faults.picks.double_fraction"),
    ("window_fraction = 0.2", "window_fraction = 0.2\nprofile = 'square'", "faults.impacts.profile: must be one of"),
    ("window_fraction = 0.2", "window_fraction = 0.2\ndirection = [0, 0, 0]", "faults.impacts.direction: must be a"),
    ("window = 1", "window = 5", "faults.impacts.listed[0].window: must be 0 to 4"),
    ("offset_s = 0.2", "offset_s = 0.49", "faults.impacts.listed[0].offset_s: 0.49 s + 0.03 s runs past"),
    ('kind = "spike"', 'kind = "gremlin"', "faults.sensor[0].kind: must be one of"),
    ("windows = [0, 3]", "windows = [0, 3]\nstd_s = 0.001", "faults.sensor[0].std_s: unknown key for a 'spike' fault"),
    ("windows = [0, 3]", "windows = [0, 9]", "faults.sensor[0].windows[1]: must be 0 to 4"),
    ("windows = [0, 3]", "windows = [0]\nwindow_fraction = 0.5", "faults.sensor[0].window_fraction: give either"),
    ("size_rated_fraction = 0.2\n", "", "faults.sensor[0].size_rated_fraction: missing"),
    ("windows = [0, 3]", "windows = [0, 3]\noffset_s = 0.3\nduration_s = 0.3", "faults.sensor[0].duration_s: 0.3 s"),
    ("[faults.picks]", "[faults.pick]", "faults.pick: unknown key"),
]


@pytest.mark.parametrize(("old", "new", "message"), BAD, ids=[b[2].split(":")[0] for b in BAD])
def test_bad_key_is_named_in_the_error(old: str, new: str, message: str) -> None:
    with pytest.raises(ConfigurationError, match="^bad.toml: " + re.escape(message)):
        parse_scenario(_replace(GOOD, old, new), "bad.toml")


def test_hexapod_refuses_picks_but_steps_its_part() -> None:
    hexapod = _replace(GOOD, 'robot = "delta_packaging"', 'robot = "hexapod_inspection"')
    with pytest.raises(ConfigurationError, match=r"faults\.picks: only a delta picks work pieces; this robot is a hex"):
        parse_scenario(hexapod, "h.toml")
    text = _replace(hexapod, "missed_fraction = 0.1", "")
    text = _replace(text, "[faults.picks]", "")
    text = _replace(text, "tool_mass_kg = 0.5", "work_piece_mass_kg = 0.5")
    sc = parse_scenario(text, "h.toml")  # the example hexapod declares a part: its mass may step
    assert sc.payload_steps[0].work_piece_mass_kg == 0.5 and sc.payload_steps[0].tool_mass_kg is None


def test_not_toml_and_unreadable_files_are_named(tmp_path: Path) -> None:
    with pytest.raises(ConfigurationError, match="^x.toml: not valid TOML"):
        parse_scenario("format = ", "x.toml")
    with pytest.raises(ConfigurationError, match="missing.toml: cannot read the scenario"):
        load_scenario(tmp_path / "missing.toml")


def test_robot_path_is_relative_to_the_scenario_file(tmp_path: Path) -> None:
    shutil.copy(next(p for p in example_paths() if "delta" in p.name), tmp_path / "my_delta.toml")
    (tmp_path / "s.toml").write_text(_replace(GOOD, 'robot = "delta_packaging"', 'robot = "my_delta.toml"'))
    sc = load_scenario(tmp_path / "s.toml")
    assert sc.description.source.endswith("my_delta.toml")
    (tmp_path / "t.toml").write_text(_replace(GOOD, 'robot = "delta_packaging"', 'robot = "t.toml"'))
    with pytest.raises(ConfigurationError, match=r"t\.toml: robot: the description does not load"):
        load_scenario(tmp_path / "t.toml")


@pytest.mark.parametrize("path", example_scenarios(), ids=lambda p: p.name)
def test_example_scenarios_load(path: Path) -> None:
    sc = load_scenario(path)
    assert len(sc.window_days) == sc.sampling.windows
    assert sc.summary


def test_there_are_examples_of_each_fault_family() -> None:
    loaded = [load_scenario(p) for p in example_scenarios()]
    assert any(s.wear for s in loaded)
    assert any(s.impacts for s in loaded)
    assert any(s.picks for s in loaded)
    assert any(s.environment.ambient_amplitude_k >= 10.0 for s in loaded)
    kinds = {f.kind for s in loaded for f in s.sensor_faults}
    assert kinds == set(SensorFaultKind)
