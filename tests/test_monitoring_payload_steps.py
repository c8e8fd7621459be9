"""Payload changes found live: a new work piece and a new gripper on the simulated delta, each reported once,
with the masses before and after, and the filter told (its estimate jumps instead of creeping)."""

from __future__ import annotations

import pytest

from shadow.ingest.wire import Released, SequenceTracker
from shadow.monitoring import RobotMonitor
from shadow.store.repository import StepResults
from simulators.scenario import generate, parse_scenario

# invented scenario: 20 s of production, a heavier work piece from day 0.2, a heavier gripper from day 0.5
SCENARIO = """
format = "shadow-scenario/1"
name = "payload-steps"
robot = "delta_packaging"
robot_id = "picker"
seed = 7
start = 2027-03-01T06:00:00Z
horizon_days = 1.0

[sampling]
windows = 3
window_s = 20.0
spacing = "listed"
days = [0.0, 0.3, 0.6]
windows_per_run = 3

[[faults.payload_steps]]
day = 0.2
work_piece_mass_kg = 0.31

[[faults.payload_steps]]
day = 0.5
tool_mass_kg = 0.42
"""


@pytest.fixture(scope="module")
def played():
    sc = parse_scenario(SCENARIO)
    monitor = RobotMonitor(sc.robot_id, sc.description)
    tracker = SequenceTracker(reorder_window=4)
    results = StepResults(monitor.robot_id)
    windows = list(generate(sc))
    for w in windows:
        released = [e.batch for b in w.batches for e in tracker.push(b) if isinstance(e, Released)]
        for k in range(0, len(released), 50):
            results.extend(monitor.process_many(released[k : k + 50]))
    return sc, windows, monitor, results


@pytest.mark.slow
def test_each_change_is_reported_once_with_both_masses(played) -> None:
    sc, windows, _, results = played
    changes = [e for e in results.events if e["kind"] == "payload_change"]
    assert [e["figures"]["part"] for e in changes] == ["work_piece", "tool"]
    piece, tool = (e["figures"] for e in changes)
    # the per-transfer weighing reads a few per cent high on this plant (its friction is not the model's),
    # so the sizes are checked to 0.015 kg; the step itself to the same
    assert piece["mass_before_kg"] == pytest.approx(0.25, abs=0.015)
    assert piece["mass_after_kg"] == pytest.approx(0.31, abs=0.015)
    assert tool["mass_after_kg"] - tool["mass_before_kg"] == pytest.approx(0.07, abs=0.015)
    assert piece["mass_after_low_kg"] < piece["mass_after_kg"] < piece["mass_after_high_kg"]
    # each is placed in the first window that had the change, and reported within its first seconds
    for event, window in zip(changes, windows[1:], strict=True):
        assert window.start_s <= event["start_s"] <= event["end_s"] <= window.start_s + 10.0


@pytest.mark.slow
def test_the_filter_is_told_and_later_transfers_are_judged_against_the_new_piece(played) -> None:
    _, windows, monitor, results = played
    last_window = windows[2]
    tool = [e for e in results.estimates if e["parameter"] == "tool_mass" and e["time_s"] > last_window.start_s]
    # a random walk of 1e-4 kg/sqrt(s) would need hours to move 0.07 kg; told, it is there within the window
    assert tool[-1]["value"] == pytest.approx(0.42, abs=0.03)
    late_faults = [
        e
        for e in results.events
        if e["kind"] == "payload_fault"
        and e["start_s"] > max(c["end_s"] for c in results.events if c["kind"] == "payload_change")
    ]
    assert late_faults == []  # the heavier piece and gripper are the new normal, not a fault per transfer
    assert monitor.save_state()["expected_piece_kg"] == pytest.approx(0.31, abs=0.015)
