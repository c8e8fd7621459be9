"""Wear trend: temperature compensation, indicator, Theil-Sen forecast and level events on synthetic days."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.detection.wear import (
    TemperatureLaw,
    TemperatureModel,
    WearLevels,
    WearMonitor,
    build_baseline,
    fit_temperature_model,
    level_ranks,
    trailing_median,
    wear_trend,
)
from shadow.errors import ConfigurationError, ShapeError, TimeOrderError

T_REF = 313.0
FC_REF = np.array([0.8, 1.0, 0.9])  # N m, invented demo drive
B_REF = np.array([0.25, 0.30, 0.20])  # N m s/rad
K_C, K_B = 0.01, 0.025  # 1/K
V_REF = np.full(3, 2.0)  # rad/s


def days_of_friction(rng, d, wear, noise=0.02):
    """Daily friction estimates at a +-10 K weekly temperature cycle, with multiplicative noise.

    wear: (D, 3) true factor on both friction components (1 = healthy).
    """
    T = (
        T_REF
        + 10.0 * np.sin(2 * np.pi * d[:, None] / 7.0 + np.array([0.0, 1.0, 2.0]))
        + rng.normal(0, 0.5, (d.size, 3))
    )
    dT = T - T_REF
    F_c = FC_REF * wear * np.exp(-K_C * dT) * (1 + noise * rng.normal(size=(d.size, 3)))  # law (1)
    b = B_REF * wear * np.exp(-K_B * dT) * (1 + noise * rng.normal(size=(d.size, 3)))
    return F_c, b, T


@pytest.fixture
def baseline(rng):
    d = np.arange(-14.0, 0.0)
    F_c, b, T = days_of_friction(rng, d, np.ones((d.size, 3)))
    return build_baseline(F_c, b, T, V_REF, reference_temperature=T_REF)


def test_temperature_law_identified(rng):
    d = np.arange(200.0)
    F_c, b, T = days_of_friction(rng, d, np.ones((200, 3)), noise=0.01)
    m = fit_temperature_model(b, T, TemperatureLaw.EXPONENTIAL, T_REF)
    assert_allclose(m.coefficient_per_k, K_B, rtol=0.1)
    # linear law: x = x_ref (1 - k dT) recovered exactly from noise-free data
    dT = T - T_REF
    lin = fit_temperature_model(B_REF * (1 - 0.01 * dT), T, TemperatureLaw.LINEAR, T_REF)
    assert_allclose(lin.coefficient_per_k, 0.01, rtol=1e-10)
    assert_allclose(lin.compensate(B_REF * (1 - 0.01 * dT), T), np.broadcast_to(B_REF, T.shape), rtol=1e-10)


def _run(baseline, rng, wear_actuator=None, days=40):
    mon = WearMonitor(baseline, WearLevels())
    d = np.arange(float(days))
    wear = np.ones((days, 3))
    if wear_actuator is not None:
        wear[:, wear_actuator] = 1.0 + 0.30 * d / 30.0  # 30 % rise over 30 days
    F_c, b, T = days_of_friction(rng, d, wear)
    events, forecasts = [], {}
    for k in range(days):  # one window per day, as in service
        ev, trends = mon.update(d[k : k + 1], F_c[k : k + 1], b[k : k + 1], T[k : k + 1])
        events += ev
        forecasts[k] = trends
    return mon, events, forecasts, (F_c, b, T)


def test_rise_is_flagged_on_the_right_actuator_with_forecast(baseline, rng):
    mon, events, forecasts, _ = _run(baseline, rng, wear_actuator=1)
    assert events and {e.actuator for e in events} == {1}
    first = next(e for e in events if e.rank_after == 1)
    service = next(e for e in events if e.rank_after == 2)
    assert first.level_after == "elevated" and service.level_after == "service due"
    # the true indicator passes 1.15 on day 15 (under the +-10 K cycle, compensated): flagged within 2 days;
    # measured day 15-17 over 8 seeds (the trailing median of 3 windows costs about a day)
    assert 13.0 <= first.day <= 17.0
    assert 27.0 <= service.day <= 33.0  # and 1.30 on day 30
    for k in (int(first.day), 25):  # forecast made at the first flag and five days before the crossing
        tr = forecasts[k][1]
        assert tr.crossing_day_earliest <= 30.0 <= tr.crossing_day_latest, (k, tr)
        assert tr.slope_low_per_day <= 0.01 <= tr.slope_high_per_day
    lead_time_days = 30.0 - first.day
    assert lead_time_days >= 10.0
    # healthy actuators: no crossing within a year
    assert all(forecasts[39][i].crossing_day > 365 for i in (0, 2))


def test_temperature_cycle_alone_raises_nothing(baseline, rng):
    mon, events, _, (F_c, b, T) = _run(baseline, rng, wear_actuator=None, days=60)
    assert events == []
    # not vacuous: without compensation the same days would pass the first level
    raw = build_baseline(
        F_c[:14], b[:14], T[:14], V_REF, reference_temperature=T_REF,
        coulomb_coefficient_per_k=np.zeros(3), viscous_coefficient_per_k=np.zeros(3),
    )  # fmt: skip
    assert (raw.indicator(F_c, b, T) >= 1.15).any() or (raw.indicator(F_c, b, T) <= 0.87).any()
    assert np.abs(mon.indicator - 1.0).max() < 0.12


def test_theil_sen_is_median_of_pairwise_slopes(rng):
    # Sen (JASA 1968): the estimator is the median of all pairwise slopes.
    d = np.arange(25.0)
    ind = (1.0 + 0.01 * d + 0.02 * rng.standard_normal(25))[:, None] * np.ones((1, 2))
    tr = wear_trend(d, ind, limit=1.3)
    i, j = np.triu_indices(25, 1)
    assert tr[0].slope_per_day == pytest.approx(np.median((ind[j, 0] - ind[i, 0]) / (d[j] - d[i])), rel=1e-12)
    assert tr[0].crossing_day_earliest <= tr[0].crossing_day <= tr[0].crossing_day_latest


def test_hysteresis_and_smoothing():
    levels = WearLevels(thresholds=(1.15, 1.30), hysteresis=0.03, smoothing_windows=1)
    ind = np.array([1.0, 1.16, 1.14, 1.13, 1.11, 1.31, 1.28, 1.26])[:, None]
    ranks, events = level_ranks(np.arange(8.0), ind, levels, np.zeros(1, dtype=np.int64))
    assert ranks[:, 0].tolist() == [0, 1, 1, 1, 0, 2, 2, 1]
    assert [(e.rank_before, e.rank_after) for e in events] == [(0, 1), (1, 0), (0, 2), (2, 1)]
    assert events[0].rising and not events[1].rising
    assert_allclose(trailing_median(np.array([[1.0], [3.0], [2.0], [10.0]]), 3)[:, 0], [1.0, 2.0, 2.0, 3.0])


def test_rejects_bad_inputs(baseline):
    with pytest.raises(ConfigurationError, match="thresholds must rise"):
        WearLevels(thresholds=(1.3, 1.15))
    with pytest.raises(ShapeError, match="b: expected shape"):
        baseline.indicator(np.ones((2, 3)), np.ones((2, 2)), np.ones((2, 3)))
    mon = WearMonitor(baseline, WearLevels())
    mon.update(np.array([1.0]), np.ones((1, 3)), np.ones((1, 3)) * 0.25, np.full((1, 3), T_REF))
    with pytest.raises(TimeOrderError, match="strictly increasing"):
        mon.update(np.array([1.0]), np.ones((1, 3)), np.ones((1, 3)) * 0.25, np.full((1, 3), T_REF))
    with pytest.raises(ConfigurationError, match="does not vary"):
        fit_temperature_model(np.ones((4, 1)), np.full((4, 1), 300.0), TemperatureLaw.EXPONENTIAL, 300.0)
    assert isinstance(baseline.viscous_temperature, TemperatureModel)


def test_per_actuator_reference_temperature(rng):
    # each actuator's baseline friction may hold at its own commissioning temperature: T_ref (n,)
    t_ref = np.array([310.0, 313.0, 316.0])
    m = TemperatureModel(TemperatureLaw.EXPONENTIAL, np.full(3, K_B), t_ref)
    b = B_REF * np.exp(-K_B * (np.array([[300.0, 320.0, 316.0]]) - t_ref))  # law (1) about each T_ref
    assert_allclose(m.compensate(b, np.array([[300.0, 320.0, 316.0]])), B_REF[None], rtol=1e-12)
