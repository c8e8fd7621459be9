"""The scoreboard's judges: the shop-practice reference cycle, onset matching, the truth's crossing day.

The scoreboard itself is a benchmark (python -m benchmarks.scoreboard); these tests keep its parts honest,
and one short run checks that every row is produced from a real simulation and a real commissioning.
"""

from __future__ import annotations

import numpy as np
import pytest

from benchmarks import scoreboard
from benchmarks.shop_practice import ReferenceCycle, cycle_period

PERIOD_S = 0.8
STEP_S = 1e-3


def production(rng: np.random.Generator, cycles: int, noise: float = 0.02):
    """A periodic two-actuator effort with the gripper closing at the start of each cycle, plus noise."""
    t = np.arange(round(cycles * PERIOD_S / STEP_S)) * STEP_S
    phase = np.mod(t, PERIOD_S) / PERIOD_S
    effort = np.stack([np.sin(2 * np.pi * phase), 0.5 * np.cos(4 * np.pi * phase)], axis=1)
    effort += noise * rng.normal(size=effort.shape)
    gripping = (phase > 0.05) & (phase < 0.55)
    return t, effort, gripping


def test_the_reference_cycle_passes_healthy_production_and_alarms_on_a_bump(rng) -> None:
    healthy = [production(rng, 6) for _ in range(3)]
    ref = ReferenceCycle.record(healthy)
    assert ref.period_s == pytest.approx(PERIOD_S, abs=STEP_S)
    # the band is 1.25 x the worst healthy deviation: a few noise standard deviations
    assert np.all(ref.band > 2 * 0.02) and np.all(ref.band < 10 * 0.02)
    t, effort, gripping = production(rng, 6)
    assert ref.alarms(t, effort, gripping) == []

    bumped = effort.copy()
    at = (t > 2.0) & (t < 2.03)  # 30 ms, twice the band, on the second actuator
    bumped[at, 1] += 2.0 * ref.band[1]
    (alarm,) = ref.alarms(t, bumped, gripping)
    assert alarm.actuator == 1
    assert alarm.start_s == pytest.approx(2.0, abs=2 * STEP_S)
    assert alarm.end_s == pytest.approx(2.03, abs=2 * STEP_S)

    short = effort.copy()
    short[(t > 2.0) & (t < 2.005), 0] += 3.0 * ref.band[0]  # 5 ms: shorter than min_duration_s (10 ms)
    assert ref.alarms(t, short, gripping) == []


def test_the_cycle_period_is_the_median_time_between_closings(rng) -> None:
    t, _, gripping = production(rng, 5)
    assert cycle_period(t, gripping) == pytest.approx(PERIOD_S, abs=STEP_S)


def test_onsets_match_alarms_inside_the_window_only() -> None:
    onsets = [10.0, 20.0, 30.0]
    alarms = [10.012, 19.997, 31.0, 50.0]  # 12 ms late; 3 ms early; 1 s late (a miss); unrelated
    delays, unmatched = scoreboard.match_onsets(onsets, alarms)
    assert delays == pytest.approx([0.012, 0.0])  # an early start counts as no delay
    assert unmatched == 2


@pytest.mark.slow
def test_a_tiny_scoreboard_run_produces_every_row(tmp_path, capsys) -> None:
    out = tmp_path / "board.md"
    scoreboard.main(["--scale", "0.05", "--markdown", str(out)])
    printed = capsys.readouterr().out
    text = out.read_text(encoding="utf-8")
    rows = [line for line in text.splitlines() if line.startswith("| ") and "---" not in line]
    assert len(rows) == 1 + 9  # header and the nine scenario rows
    for needle in (
        "false alarms",
        "impacts of 5 %",
        "impacts of 15 %",
        "missed and double",
        "tool mass",
        "pseudo-true",
        "30 %",
    ):
        assert needle in text and needle in printed
    assert "collision thresholds" in printed
