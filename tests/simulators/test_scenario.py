"""Scenario generation: windows over a long horizon, wear ramps in the plant, ambient cycles, faults in the truth.

Windows are kept short (a few hundred samples): every simulated second costs CPU.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from shadow.ingest.wire import Released, SequenceTracker
from shadow.monitoring import RobotMonitor
from simulators.live import rated_platform_force_n
from simulators.run import DemoEffects
from simulators.scenario import SECONDS_PER_DAY, ScenarioWindow, generate, parse_scenario

KELVIN = 273.15  # 0 degC in kelvin (SI definition)

DELTA = """
format = "shadow-scenario/1"
name = "test-delta"
robot = "delta_packaging"
robot_id = "sim-delta"
seed = 17
start = 2026-03-02T06:00:00Z
horizon_days = 30

[sampling]
windows = 6
window_s = 0.3
windows_per_run = 4

[environment]
ambient_mean_c = 22.0
ambient_amplitude_k = 10.0
ambient_period_days = 7.0
ambient_peak_day = 1.0

[plant]
drive_self_heating_k = 8.0

[[faults.wear]]
actuator = 2
rise_fraction = 0.6
start_day = 4
end_day = 24
terms = ["coulomb", "viscous"]

[[faults.wear]]
actuator = 3
rise_fraction = 0.2
start_day = 10
end_day = 20
terms = ["static"]

[[faults.payload_steps]]
day = 15
tool_mass_kg = 0.5

[faults.picks]
missed_fraction = 0.5
double_fraction = 0.3

[[faults.impacts.listed]]
window = 2
offset_s = 0.1
peak_rated_fraction = 0.5
duration_s = 0.02
direction = [0.0, 0.0, -2.0]
profile = "haversine"

[[faults.sensor]]
kind = "dropout"
windows = [1]
offset_s = 0.1
duration_s = 0.05

[[faults.sensor]]
kind = "spike"
windows = [0, 3]
actuator = 1
size_rated_fraction = 0.4
count = 2

[[faults.sensor]]
kind = "stuck"
windows = [4]
actuator = 3
signal = "position"
offset_s = 0.1
duration_s = 0.1

[[faults.sensor]]
kind = "clock_jitter"
windows = [2]
std_s = 1e-4

[[faults.sensor]]
kind = "duplicate"
windows = [5]
count = 2

[[faults.sensor]]
kind = "out_of_order"
windows = [3]
delay_messages = 2
"""


@pytest.fixture(scope="module")
def delta_windows() -> tuple[object, list[ScenarioWindow]]:
    sc = parse_scenario(DELTA, "test-delta.toml")
    return sc, list(generate(sc))


def test_windows_span_the_horizon_with_continuing_sequence_numbers(delta_windows) -> None:
    sc, windows = delta_windows
    assert [w.index for w in windows] == list(range(6))
    first, last = windows[0].batches[0].t[0], max(float(b.t[-1]) for b in windows[-1].batches)
    assert abs(first - sc.start_s) < 1e-3
    assert abs(last - (sc.start_s + 30 * SECONDS_PER_DAY)) < 2e-3  # the last window ends on the horizon
    for a, b in zip(windows, windows[1:], strict=False):
        assert b.truth.first_seq == a.truth.last_seq + 1
        assert b.start_s > a.end_s
        assert b.start_s == pytest.approx(sc.start_s + b.day * SECONDS_PER_DAY, abs=1e-6)
    for w in windows:
        assert all(batch.robot_id == "sim-delta" for batch in w.batches)
        assert w.truth.n_published == 30  # 300 samples in messages of 10


def test_wear_ramp_sets_the_plant_friction_of_each_window(delta_windows) -> None:
    sc, windows = delta_windows
    nominal_c = np.asarray(sc.description.friction.coulomb)  # the description's friction, joint side
    nominal_b = np.asarray(sc.description.friction.viscous)
    hump = DemoEffects().static_to_coulomb  # the plant's F_s / F_c before wear
    for w in windows:
        d = w.day
        ramp2 = 1.0 + 0.6 * np.clip((d - 4.0) / 20.0, 0.0, 1.0)  # declared: +60 % from day 4 to day 24
        ramp3 = 1.0 + 0.2 * np.clip((d - 10.0) / 10.0, 0.0, 1.0)  # declared: static +20 % from day 10 to day 20
        f = w.truth.friction  # read back from the plant's run
        assert_allclose(f.coulomb, nominal_c * [1.0, ramp2, 1.0], rtol=1e-12)
        assert_allclose(f.viscous_ref, nominal_b * [1.0, ramp2, 1.0], rtol=1e-12)
        assert_allclose(f.static, hump * nominal_c * [1.0, ramp2, ramp3], rtol=1e-12)
        assert [r.factor for r in w.truth.wear] == pytest.approx([ramp2, ramp3], rel=1e-12)
    assert windows[0].truth.friction.coulomb[1] == nominal_c[1]  # before the ramp
    assert windows[-1].truth.friction.coulomb[1] == pytest.approx(1.6 * nominal_c[1])  # after its end


def test_drive_temperatures_follow_the_ambient_cycle(delta_windows) -> None:
    sc, windows = delta_windows
    ambients = []
    for w in windows:
        ambient = 22.0 + 10.0 * np.cos(2 * np.pi * (w.day - 1.0) / 7.0)  # the declared cycle
        assert w.truth.ambient_c == pytest.approx(ambient, abs=1e-9)
        assert_allclose(w.truth.drive_temperature_start_c, np.full(3, ambient + 8.0), atol=1e-9)
        published = w.batches[0].temperature_k[0] - KELVIN
        assert_allclose(published, np.full(3, ambient + 8.0), atol=1e-9)
        assert_allclose(w.truth.drive_temperature_mean_c, ambient + 8.0, atol=0.5)  # slow thermal model
        ambients.append(ambient)
    assert max(ambients) - min(ambients) > 10.0


def test_payload_step_and_pick_faults_are_in_the_truth(delta_windows) -> None:
    sc, windows = delta_windows
    for w in windows:
        assert w.truth.tool_mass_kg == (0.5 if w.day >= 15.0 else sc.description.tool.tool_mass_kg)
        for p in w.truth.pick_faults:
            assert w.start_s <= p.pick_s < w.end_s + 1e-3 and p.release_s > p.pick_s
            carried = w.truth.carried_work_piece_masses_kg[p.cycle]
            assert carried == p.carried_mass_kg
            if p.kind == "missed":
                assert carried == 0.0
            else:
                assert carried > 1.5 * sc.description.tool.work_piece_mass_kg
    kinds = [p.kind for w in windows for p in w.truth.pick_faults]
    assert "missed" in kinds and "double" in kinds


def test_listed_impact_is_in_its_window(delta_windows) -> None:
    sc, windows = delta_windows
    assert [len(w.truth.impacts) for w in windows] == [0, 0, 1, 0, 0, 0]
    (imp,) = windows[2].truth.impacts
    assert imp.start_s == pytest.approx(windows[2].start_s + 0.1, abs=1e-9)
    assert imp.peak_n == pytest.approx(0.5 * rated_platform_force_n(sc.description))
    assert imp.direction == (0.0, 0.0, -1.0) and imp.profile == "haversine" and imp.listed


def test_sensor_faults_appear_in_the_messages_and_the_truth(delta_windows) -> None:
    sc, windows = delta_windows
    kinds = {w.index: sorted({f.kind for f in w.truth.sensor_faults}) for w in windows}
    assert kinds == {0: ["spike"], 1: ["dropout"], 2: ["clock_jitter"], 3: ["out_of_order", "spike"], 4: ["stuck"],
                     5: ["duplicate"]}  # fmt: skip
    # dropout: 50 ms from 0.1 s are the five messages starting at 0.10 .. 0.14 s
    (drop,) = windows[1].truth.sensor_faults
    expected = tuple(range(windows[1].truth.first_seq + 10, windows[1].truth.first_seq + 15))
    assert drop.seqs == expected
    assert {b.seq for b in windows[1].batches}.isdisjoint(expected)
    assert windows[1].truth.n_delivered == 25
    # spikes: a single current sample of actuator 1, 0.4 of the rated torque in amperes
    gains = sc.description.parameters.drives[0]
    rated_a = 0.4 * gains.rated_effort / (gains.gear_ratio * gains.efficiency * gains.torque_constant_nm_per_a)
    for f in (f for f in windows[0].truth.sensor_faults if f.kind == "spike"):
        assert f.actuator == 1 and abs(f.detail["size"]) == pytest.approx(rated_a, rel=1e-9)
        batch = next(b for b in windows[0].batches if b.seq == f.seqs[0])
        assert f.start_s in batch.t.tolist()
    # stuck encoder of actuator 3 over 0.1 .. 0.2 s
    (stuck,) = windows[4].truth.sensor_faults
    q = np.concatenate([b.q for b in windows[4].batches if b.seq in stuck.seqs])
    t = np.concatenate([b.t for b in windows[4].batches if b.seq in stuck.seqs])
    held = (t >= stuck.start_s) & (t <= stuck.end_s)
    assert held.sum() == 100 and np.all(q[held, 2] == stuck.detail["value"])
    # duplicates and a late message
    seqs = [b.seq for b in windows[5].batches]
    for f in windows[5].truth.sensor_faults:
        assert seqs.count(f.seqs[0]) == 2
    (late,) = (f for f in windows[3].truth.sensor_faults if f.kind == "out_of_order")
    order = [b.seq for b in windows[3].batches]
    assert order.index(late.seqs[0]) == late.seqs[0] - windows[3].truth.first_seq + 2
    # clock jitter keeps the stamps of the window increasing
    t2 = np.concatenate([b.t for b in windows[2].batches])
    assert np.all(np.diff(t2) > 0.0)


def test_the_monitor_takes_the_windows_after_the_sequence_tracker(delta_windows) -> None:
    sc, windows = delta_windows
    monitor = RobotMonitor(sc.robot_id, sc.description)
    tracker = SequenceTracker(reorder_window=4)
    for w in windows:
        released = [e.batch for b in w.batches for e in tracker.push(b) if isinstance(e, Released)]
        monitor.process_many(released)  # raises on a batch it cannot take
    assert tracker.state.next_seq == windows[-1].truth.last_seq + 1


SMALL = """
format = "shadow-scenario/1"
name = "small"
robot = "delta_packaging"
seed = 3
horizon_days = 2

[sampling]
windows = 2
window_s = 0.1

[faults.impacts]
window_fraction = 1.0
duration_s = 0.01

[[faults.impacts.listed]]
window = 1
offset_s = 0.05

[[faults.sensor]]
kind = "spike"
actuator = 2
size_rated_fraction = 0.3
window_fraction = 0.5
"""


def _fingerprint(windows: list[ScenarioWindow]) -> list[object]:
    out: list[object] = []
    for w in windows:
        out.append(w.truth.to_dict())
        for b in w.batches:
            out.append((b.seq, b.t.tobytes(), b.q.tobytes(), b.current.tobytes(), b.temperature_k.tobytes()))
    return out


def test_same_seed_same_stream_other_seed_other_stream() -> None:
    sc = parse_scenario(SMALL, "small.toml")
    a, b = list(generate(sc)), list(generate(sc))
    assert _fingerprint(a) == _fingerprint(b)
    other = list(generate(dataclasses.replace(sc, seed=4)))
    assert _fingerprint(other) != _fingerprint(a)
    assert [[i.listed for i in w.truth.impacts] for w in a] == [[False], [True]]  # listed ones replace a draw
    assert a[1].truth.impacts[0].start_s == pytest.approx(a[1].start_s + 0.05, abs=1e-9)


def test_hexapod_scenario_carries_the_stepped_fixture() -> None:
    text = SMALL.replace('robot = "delta_packaging"', 'robot = "hexapod_inspection"')
    text = (
        text.replace("window_s = 0.1", "window_s = 0.2") + "\n[[faults.payload_steps]]\nday = 1.0\ntool_mass_kg = 7.0\n"
    )
    sc = parse_scenario(text, "hex.toml")
    windows = list(generate(sc))
    nominal = sc.description.tool.payload_parameters()
    assert_allclose(windows[0].truth.payload_parameters, nominal, rtol=1e-12)
    assert_allclose(windows[1].truth.payload_parameters, nominal * 7.0 / nominal[0], rtol=1e-12)
    assert windows[1].truth.tool_mass_kg == 7.0
    assert windows[1].truth.work_piece_mass_kg == sc.description.tool.work_piece_mass_kg  # the part is unchanged
    batch = windows[0].batches[0]
    assert batch.q.shape == (5, 6) and batch.effort is not None  # 250 Hz, 20 ms messages, leg forces
    assert_array_equal(np.diff([b.seq for b in windows[1].batches]), 1)
