"""Health states: each input moves the state at its limits, worst-of for the robot, reasons carry the numbers."""

from __future__ import annotations

import numpy as np
import pytest

from shadow.detection.events import CollisionEvent
from shadow.detection.health import HealthLimits, HealthState, actuator_health, robot_health, worst
from shadow.errors import ConfigurationError, ShapeError

LIMITS = HealthLimits()
NAN = float("nan")


def _collision(relative_peak: float) -> CollisionEvent:
    z = np.zeros(3)
    return CollisionEvent(
        start_index=10, end_index=20, start_time_s=1.0, end_time_s=1.01, peak_index=15, peak_time_s=1.005,
        peak_residual=z, residual_at_peak=z, q_at_peak=z, external_wrench=z, wrench_misfit=0.0,
        relative_peak=np.array([relative_peak, 0.0, 0.0]), evidence_start_time_s=0.0, evidence_end_time_s=2.0,
        evidence_start_index=0, evidence_end_index=2010,
    )  # fmt: skip


def _actuators(ratio=(1.0, 1.0, 1.0), wear=(1.0, 1.0, 1.0), age=(0.1, 0.1, 0.1)):
    base = np.array([0.2, 0.3, 0.25])
    return actuator_health(base * np.array(ratio), base, np.array(wear, float), np.array(age, float), LIMITS)


def test_healthy_is_steady():
    acts = _actuators()
    assert [a.state for a in acts] == [HealthState.STEADY] * 3
    robot = robot_health(acts, [], 0.02, 0.1, LIMITS)
    assert robot.state is HealthState.STEADY and robot.reasons == []
    assert robot.figures["payload_deviation_fraction"] == pytest.approx(0.02)


@pytest.mark.parametrize(
    ("ratio", "wear", "expected"),
    [
        (1.49, 1.0, HealthState.STEADY),
        (1.5, 1.0, HealthState.WATCH),
        (3.0, 1.0, HealthState.ACT),
        (1.0, 1.16, HealthState.WATCH),
        (1.0, 1.30, HealthState.ACT),
        (2.0, 1.31, HealthState.ACT),  # worst of the two causes
    ],
)
def test_actuator_limits(ratio, wear, expected):
    acts = _actuators(ratio=(1.0, ratio, 1.0), wear=(1.0, wear, 1.0))
    assert acts[1].state is expected
    assert acts[0].state is HealthState.STEADY
    assert acts[1].figures["residual_rms_ratio"] == pytest.approx(ratio)
    assert acts[1].figures["wear_indicator_ratio"] == pytest.approx(wear)
    assert len(acts[1].reasons) == (ratio >= 1.5) + (wear >= 1.15)
    robot = robot_health(acts, [], NAN, 0.1, LIMITS)
    assert robot.state is expected  # worst of actuators
    assert robot.reasons == acts[1].reasons


def test_reason_words_carry_numbers():
    acts = _actuators(ratio=(1.0, 2.0, 1.0), wear=(1.2, 1.0, 1.0))
    assert "actuator 2" in acts[1].reasons[0] and "2.00 times" in acts[1].reasons[0]
    assert (
        "actuator 1" in acts[0].reasons[0]
        and "20 % above" in acts[0].reasons[0]
        and "watch from 15 %" in acts[0].reasons[0]
    )


def test_collisions_and_payload():
    acts = _actuators()
    light = robot_health(acts, [_collision(0.2)], NAN, 0.1, LIMITS)
    assert light.state is HealthState.WATCH and "20 % of rated" in light.reasons[0]
    heavy = robot_health(acts, [_collision(0.2), _collision(0.7)], NAN, 0.1, LIMITS)
    assert heavy.state is HealthState.ACT
    assert heavy.figures["collision_peak_rated_fraction"] == pytest.approx(0.7)
    many = robot_health(acts, [_collision(0.1)] * 3, NAN, 0.1, LIMITS)
    assert many.state is HealthState.ACT and many.figures["collisions_count"] == 3
    payload = robot_health(acts, [], -0.3, 0.1, LIMITS)
    assert payload.state is HealthState.ACT and "30 % lighter" in payload.reasons[0]
    assert robot_health(acts, [], 0.12, 0.1, LIMITS).state is HealthState.WATCH


def test_stale_data():
    acts = _actuators(age=(0.1, 30.0, NAN))
    assert [a.state for a in acts] == [HealthState.STEADY, HealthState.NO_DATA, HealthState.NO_DATA]
    assert "30 s ago" in acts[1].reasons[0] and "never" in acts[2].reasons[0]
    assert robot_health(acts, [], NAN, 0.1, LIMITS).state is HealthState.NO_DATA
    # a known problem outranks missing data
    mixed = _actuators(ratio=(4.0, 1.0, 1.0), age=(0.1, 30.0, 0.1))
    assert robot_health(mixed, [], NAN, 0.1, LIMITS).state is HealthState.ACT
    stale = robot_health(mixed, [], NAN, 60.0, LIMITS)
    assert stale.state is HealthState.NO_DATA and stale.figures["data_age_s"] == 60.0
    assert worst([]) is HealthState.STEADY


def test_no_baseline_is_no_data():
    acts = actuator_health(np.ones(2), np.array([0.0, 1.0]), np.full(2, NAN), np.zeros(2), LIMITS)
    assert acts[0].state is HealthState.NO_DATA and "baseline" in acts[0].reasons[0]
    assert acts[1].state is HealthState.STEADY


def test_rejects_bad_inputs():
    with pytest.raises(ConfigurationError, match="residual limits"):
        HealthLimits(residual_watch_ratio=3.0, residual_act_ratio=2.0)
    with pytest.raises(ShapeError, match="wear_indicator: expected shape"):
        actuator_health(np.ones(3), np.ones(3), np.ones(2), np.zeros(3), LIMITS)
