"""The long false-alarm benchmark's interval (python -m benchmarks.false_alarms runs the simulation itself)."""

from __future__ import annotations

import pytest

from benchmarks.false_alarms import poisson_interval_per_24h


@pytest.mark.parametrize(
    ("count", "low", "high"),
    [
        # exact (Garwood 1936) 95 % limits of a Poisson mean, as tabulated in statistics handbooks (from memory)
        (0, 0.0, 3.689),
        (1, 0.0253, 5.572),
        (10, 4.795, 18.390),
    ],
)
def test_poisson_interval_matches_the_tabulated_exact_limits(count: int, low: float, high: float) -> None:
    got_low, got_high = poisson_interval_per_24h(count, 24.0)  # 24 h observed: the limits themselves
    assert got_low == pytest.approx(low, abs=1e-3)
    assert got_high == pytest.approx(high, abs=1e-3)


def test_poisson_interval_scales_with_the_hours_observed() -> None:
    low, high = poisson_interval_per_24h(0, 48.0)
    assert low == 0.0
    assert high == pytest.approx(3.689 / 2.0, abs=1e-3)
