"""The per-stretch mass watch: learning, a step found with its time and sizes, no alarm on a steady mass."""

from __future__ import annotations

import numpy as np
import pytest

from shadow.detection.change import MassStepSettings, MassStepWatch, siegmund_arl
from shadow.errors import ConfigurationError

SPREAD_KG = 0.006  # spread of a work piece's mass, about a third of a 0.02 kg tolerance


def stretches(rng, masses_kg: np.ndarray, spacing_s: float = 0.8):
    """(t_start, t_end, m, std) per stretch: the given masses plus the spread, 0.4 s long each."""
    t0 = np.arange(masses_kg.size) * spacing_s
    drawn = masses_kg + SPREAD_KG * rng.normal(size=masses_kg.size)
    return [(t, t + 0.4, m, 0.002) for t, m in zip(t0, drawn, strict=True)]


def test_a_step_is_found_with_its_time_and_both_masses(rng) -> None:
    watch = MassStepWatch(MassStepSettings(min_step_kg=0.02))
    truth = np.r_[np.full(120, 0.25), np.full(60, 0.29)]  # +0.04 kg from stretch 120
    found = [(k, s) for k, row in enumerate(stretches(rng, truth)) if (s := watch.push(*row)) is not None]
    assert len(found) == 1
    k, step = found[0]
    assert 121 <= k <= 130  # alarm within a stretch or two (the step is ~6 spreads), 5 more to confirm
    assert step.onset_time_s == pytest.approx(120 * 0.8, abs=2 * 0.8)
    lo, hi = step.interval_after_kg
    assert lo <= 0.29 <= hi and step.stretches_after >= 1
    assert step.interval_before_kg[0] <= 0.25 <= step.interval_before_kg[1]
    assert step.step_kg == pytest.approx(0.04, abs=0.015)
    assert watch.reference_kg == pytest.approx(step.mass_after_kg)


def test_a_steady_mass_raises_nothing_and_the_spread_is_learned(rng) -> None:
    settings = MassStepSettings(min_step_kg=0.02, arl_stretches=1e5)
    watch = MassStepWatch(settings)
    assert all(watch.push(*row) is None for row in stretches(rng, np.full(5000, 0.25)))
    # 1.4826 MAD of Gaussian data estimates its std (consistency constant, Rousseeuw and Croux, JASA 88, 1993)
    assert watch.spread_kg == pytest.approx(np.hypot(SPREAD_KG, 0.0), rel=0.35)
    # the threshold meets the configured run length by Siegmund's approximation (its own test: test_change.py)
    nu = min(max(settings.min_step_kg / (2 * watch.spread_kg), 0.5), 2.5)
    assert siegmund_arl(nu, watch.h) == pytest.approx(1e5, rel=0.01)


def test_save_and_restore_resume_exactly(rng) -> None:
    rows = stretches(rng, np.r_[np.full(60, 0.25), np.full(40, 0.31)])
    a, b = MassStepWatch(MassStepSettings()), MassStepWatch(MassStepSettings())
    for row in rows[:61]:
        a.push(*row)
    b.restore(a.save("w/"), "w/")
    out_a = [a.push(*row) for row in rows[61:]]
    out_b = [b.push(*row) for row in rows[61:]]
    assert out_a == out_b and any(s is not None for s in out_a)


def test_an_older_state_without_the_watch_starts_learning() -> None:
    watch = MassStepWatch(MassStepSettings())
    watch.restore({}, "w/")
    assert watch.learning


def test_bad_settings_are_refused() -> None:
    with pytest.raises(ConfigurationError, match="learn_count"):
        MassStepSettings(learn_count=2)
    with pytest.raises(ConfigurationError, match="min_step_kg"):
        MassStepSettings(min_step_kg=0.0)
