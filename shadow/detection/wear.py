"""Wear trend of each actuator's friction: temperature compensation, indicator, robust trend, forecast, levels.

Inputs are one row per window (typically a day) of the friction the estimator identified for each
actuator, with the drive temperature in that window.

Symbols
-------
d        : (D,) window times [days]
F_c      : (D, n) Coulomb friction [N m | N]
b        : (D, n) viscous friction coefficient [N m s/rad | N s/m]
T        : (D, n) drive temperature [K or degC, consistently]
v_ref    : (n,) reference speed of the indicator [rad/s | m/s]
I        : (D, n) wear indicator [-]

Temperature compensation (lubricant viscosity falls with temperature; an Arrhenius-type law, common
practice, no source; or its linearisation), each friction component x with its own coefficient k [1/K]:

    exponential:  x(T) = x_ref exp(-k (T - T_ref))   =>  x_ref = x(T) exp(k (T - T_ref))        (1)
    linear:       x(T) = x_ref (1 - k (T - T_ref))   =>  x_ref = x(T) / (1 - k (T - T_ref))     (2)

k is identified on baseline windows by least squares of ln x (1) or x (2) on T - T_ref, or declared.

Wear indicator: the compensated friction effort at the reference speed over the baseline's,

    I = (F_c' + b' v_ref) / (F_c0 + b0 v_ref)                                                    (3)

Trend: Theil-Sen slope of I against d with its confidence interval (Sen, JASA 63, 1968;
scipy.stats.theilslopes). Forecast of the day the limit L is crossed: the line through the medians
(median d, median I), the same pivot scipy uses for the intercept,

    d_cross = median(d) + (L - median(I)) / slope                                                (4)

with the interval from the slope's interval (high slope -> earliest day, low slope -> latest; no
crossing when a slope is <= 0) combined with the pivot's own uncertainty, median(I) +- z s_med,
s_med = sqrt(pi / 2) sigma / sqrt(D) (the large-sample standard error of a median of Gaussian data,
Kendall and Stuart, "The Advanced Theory of Statistics", vol. 1), sigma = 1.4826 MAD of the residuals
about the trend line (consistent for Gaussian noise). Both ends take the unfavourable combination.

Levels: a rank per actuator; it rises when the (trailing-median) indicator reaches a level and falls
only when it drops ``hysteresis`` below it. Windows are few (days), so the level logic loops over them.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.stats import norm, theilslopes

from shadow.detection.events import WearLevelEvent
from shadow.errors import ConfigurationError, ShapeError, TimeOrderError, expect_finite, expect_shape

Array = NDArray[np.float64]


class TemperatureLaw(enum.Enum):
    """How a friction component depends on temperature."""

    EXPONENTIAL = "exponential"  # (1)
    LINEAR = "linear"  # (2)


@dataclass(frozen=True, slots=True)
class TemperatureModel:
    """Temperature law of one friction component: k (n,) [1/K] about reference_temperature, T_ref (scalar, or
    (n,) when each actuator's baseline friction holds at its own drive temperature)."""

    law: TemperatureLaw
    coefficient_per_k: Array
    reference_temperature: float | Array

    def compensate(self, x: Array, T: Array) -> Array:
        """x (D, n) measured at T (D, n), brought to the reference temperature by (1) or (2)."""
        dT = T - self.reference_temperature
        if self.law is TemperatureLaw.EXPONENTIAL:
            return x * np.exp(self.coefficient_per_k[None, :] * dT)  # x_ref = x exp(k (T - T_ref))   (1)
        return x / (1.0 - self.coefficient_per_k[None, :] * dT)  # x_ref = x / (1 - k (T - T_ref))      (2)


def fit_temperature_model(
    x: Array, T: Array, law: TemperatureLaw, reference_temperature: float | Array
) -> TemperatureModel:
    """Identify k per actuator by least squares on baseline windows (x, T both (D, n), D >= 3)."""
    expect_shape("x", x, (None, None))
    expect_shape("T", T, x.shape)
    if x.shape[0] < 3:
        raise ShapeError(f"x: need at least 3 baseline windows, got {x.shape[0]}")
    dT = T - reference_temperature
    y = np.log(x) if law is TemperatureLaw.EXPONENTIAL else x
    dTc = dT - dT.mean(axis=0)
    var = (dTc**2).sum(axis=0)
    if np.any(var <= 0.0):
        raise ConfigurationError("T: the baseline temperature does not vary, k cannot be identified; declare it")
    slope = (dTc * (y - y.mean(axis=0))).sum(axis=0) / var  # least-squares slope of y on T - T_ref
    if law is TemperatureLaw.EXPONENTIAL:
        k = -slope  # ln x = ln x_ref - k (T - T_ref)
    else:
        intercept = y.mean(axis=0) - slope * dT.mean(axis=0)  # x_ref
        k = -slope / intercept  # x = x_ref - x_ref k (T - T_ref)
    return TemperatureModel(law, k, reference_temperature)


@dataclass(frozen=True, slots=True)
class FrictionBaseline:
    """Healthy friction at the reference temperature and how to compensate new windows.

    coulomb, viscous : (n,) baseline F_c0, b0 at the reference temperature
    reference_speed : (n,) v_ref of the indicator (3) [rad/s | m/s]
    coulomb_temperature, viscous_temperature : the two components' laws
    """

    coulomb: Array
    viscous: Array
    reference_speed: Array
    coulomb_temperature: TemperatureModel
    viscous_temperature: TemperatureModel

    def indicator(self, F_c: Array, b: Array, T: Array) -> Array:
        """Wear indicator (3), (D, n)."""
        n = self.coulomb.shape[0]
        for name, a in (("F_c", F_c), ("b", b), ("T", T)):
            expect_shape(name, a, (None, n))
            expect_finite(name, a)
        if not (F_c.shape[0] == b.shape[0] == T.shape[0]):
            raise ShapeError(f"F_c, b, T: sample counts differ ({F_c.shape[0]}, {b.shape[0]}, {T.shape[0]})")
        Fc_ref = self.coulomb_temperature.compensate(F_c, T)
        b_ref = self.viscous_temperature.compensate(b, T)
        v = self.reference_speed[None, :]
        return (Fc_ref + b_ref * v) / (self.coulomb + self.viscous * self.reference_speed)[None, :]  # (3)


def build_baseline(
    F_c: Array,
    b: Array,
    T: Array,
    reference_speed: Array,
    *,
    law: TemperatureLaw = TemperatureLaw.EXPONENTIAL,
    reference_temperature: float | Array,
    coulomb_coefficient_per_k: Array | None = None,
    viscous_coefficient_per_k: Array | None = None,
) -> FrictionBaseline:
    """Baseline from healthy windows: temperature laws (fitted unless declared), then medians at T_ref."""
    n = F_c.shape[1] if F_c.ndim == 2 else -1
    expect_shape("reference_speed", reference_speed, (n,))

    def model(x: Array, declared: Array | None) -> TemperatureModel:
        if declared is None:
            return fit_temperature_model(x, T, law, reference_temperature)
        expect_shape("declared coefficient", declared, (n,))
        return TemperatureModel(law, np.asarray(declared, dtype=np.float64), reference_temperature)

    cm, vm = model(F_c, coulomb_coefficient_per_k), model(b, viscous_coefficient_per_k)
    Fc0 = np.median(cm.compensate(F_c, T), axis=0)  # robust baseline at T_ref
    b0 = np.median(vm.compensate(b, T), axis=0)
    return FrictionBaseline(Fc0, b0, np.asarray(reference_speed, dtype=np.float64), cm, vm)


@dataclass(frozen=True, slots=True)
class WearTrend:
    """Theil-Sen trend of one actuator's indicator and the forecast crossing of ``limit`` (4).

    slope_per_day, slope_low_per_day, slope_high_per_day : slope and its confidence interval [1/day]
    intercept : scipy's intercept, median(ind) - slope median(d) [-]
    fitted_now : trend value at the last window [-]
    crossing_day, crossing_day_earliest, crossing_day_latest : forecast [days]; inf when not rising
    """

    actuator: int
    slope_per_day: float
    slope_low_per_day: float
    slope_high_per_day: float
    intercept: float
    fitted_now: float
    limit: float
    crossing_day: float
    crossing_day_earliest: float
    crossing_day_latest: float


def _crossing(pivot_d: float, pivot_I: float, slope: float, limit: float) -> float:
    if slope <= 0.0:
        return float("inf")
    return pivot_d + (limit - pivot_I) / slope  # (4)


def wear_trend(d: Array, ind: Array, *, limit: float, confidence: float = 0.95) -> list[WearTrend]:
    """One :class:`WearTrend` per actuator from windows d (D,) [days] and indicators ind (D, n)."""
    expect_shape("d", d, (None,))
    expect_shape("ind", ind, (d.shape[0], None))
    if d.shape[0] < 3:
        raise ShapeError(f"d: need at least 3 windows for a trend, got {d.shape[0]}")
    out = []
    for i in range(ind.shape[1]):  # loop over actuators
        res = theilslopes(ind[:, i], d, alpha=confidence)
        slope, intercept, lo, hi = float(res[0]), float(res[1]), float(res[2]), float(res[3])
        pd, pI = float(np.median(d)), float(np.median(ind[:, i]))  # pivot of scipy's intercept
        resid = ind[:, i] - (intercept + slope * d)
        sigma = 1.4826 * float(np.median(np.abs(resid - np.median(resid))))  # sigma = 1.4826 MAD
        dI = float(norm.ppf(0.5 + confidence / 2.0)) * np.sqrt(np.pi / 2.0) * sigma / np.sqrt(d.shape[0])  # z s_med
        out.append(
            WearTrend(
                actuator=i,
                slope_per_day=slope,
                slope_low_per_day=lo,
                slope_high_per_day=hi,
                intercept=intercept,
                fitted_now=intercept + slope * float(d[-1]),
                limit=limit,
                crossing_day=_crossing(pd, pI, slope, limit),
                crossing_day_earliest=_crossing(pd, pI + dI, hi, limit),
                crossing_day_latest=_crossing(pd, pI - dI, lo, limit),
            )
        )
    return out


@dataclass(frozen=True, slots=True)
class WearLevels:
    """Named levels of the indicator, rising order, with a common hysteresis [-]."""

    names: tuple[str, ...] = ("elevated", "service due")
    thresholds: tuple[float, ...] = (1.15, 1.30)
    hysteresis: float = 0.03
    smoothing_windows: int = 3  # trailing median over this many windows before comparing

    def __post_init__(self) -> None:
        if len(self.names) != len(self.thresholds) or not self.names:
            raise ConfigurationError("levels: names and thresholds must have the same, non-zero length")
        if any(b <= a for a, b in zip(self.thresholds[:-1], self.thresholds[1:], strict=True)):
            raise ConfigurationError(f"levels: thresholds must rise, got {self.thresholds}")
        if self.hysteresis < 0.0 or self.smoothing_windows < 1:
            raise ConfigurationError("levels: hysteresis must be >= 0 and smoothing_windows >= 1")

    def name(self, rank: int) -> str:
        """Level name of a rank (``""`` for rank 0)."""
        return self.names[rank - 1] if rank > 0 else ""


def trailing_median(ind: Array, windows: int) -> Array:
    """Median of the last ``windows`` rows at each row (fewer at the start), (D, n)."""
    if windows == 1:
        return ind.copy()
    pad = np.concatenate((np.full((windows - 1, ind.shape[1]), np.nan), ind))
    view = np.lib.stride_tricks.sliding_window_view(pad, windows, axis=0)  # (D, n, windows)
    out: Array = np.nanmedian(view, axis=2)
    return out


def level_ranks(
    d: Array,
    ind: Array,
    levels: WearLevels,
    rank0: NDArray[np.int64],
) -> tuple[NDArray[np.int64], list[WearLevelEvent]]:
    """Ranks (D, n) after each window and the level events, from ranks rank0 (n,) before the first window.

    ind is compared as given (smooth it first with :func:`trailing_median`).
    """
    thr = np.asarray(levels.thresholds)
    ranks = np.empty(ind.shape, dtype=np.int64)
    events: list[WearLevelEvent] = []
    rank = np.asarray(rank0, dtype=np.int64).copy()
    for k in range(ind.shape[0]):  # loop over windows (days)
        up = (ind[k][:, None] >= thr[None, :]).sum(axis=1)  # highest level reached
        down = (ind[k][:, None] >= thr[None, :] - levels.hysteresis).sum(axis=1)  # highest level still held
        new = np.where(up > rank, up, np.minimum(rank, down))
        for i in np.flatnonzero(new != rank):
            events.append(
                WearLevelEvent(
                    actuator=int(i),
                    day=float(d[k]),
                    rank_before=int(rank[i]),
                    rank_after=int(new[i]),
                    level_before=levels.name(int(rank[i])),
                    level_after=levels.name(int(new[i])),
                    indicator=float(ind[k, i]),
                )
            )
        rank = new
        ranks[k] = rank
    return ranks, events


class WearMonitor:
    """Keeps the window history of every actuator's indicator, its level ranks and trend.

    Parameters
    ----------
    baseline : :class:`FrictionBaseline`
    levels : :class:`WearLevels`; the forecast limit is the highest level unless ``limit`` is given
    trend_windows : trend over at most this many latest windows
    """

    def __init__(
        self, baseline: FrictionBaseline, levels: WearLevels, *, limit: float | None = None, trend_windows: int = 60
    ) -> None:
        self.baseline, self.levels = baseline, levels
        self.limit = levels.thresholds[-1] if limit is None else limit
        self.trend_windows = trend_windows
        n = baseline.coulomb.shape[0]
        self.days = np.zeros(0)
        self.indicator = np.zeros((0, n))
        self.ranks = np.zeros(n, dtype=np.int64)

    def update(self, d: Array, F_c: Array, b: Array, T: Array) -> tuple[list[WearLevelEvent], list[WearTrend]]:
        """Add windows (d (D,), friction (D, n), T (D, n)); return the level events and the current trends."""
        expect_shape("d", d, (None,))
        if d.shape[0] and (np.any(np.diff(d) <= 0.0) or (self.days.size and d[0] <= self.days[-1])):
            raise TimeOrderError("d: windows must be strictly increasing and after those already seen")
        I_new = self.baseline.indicator(F_c, b, T)
        history = np.concatenate((self.indicator, I_new))
        w = self.levels.smoothing_windows
        smooth = trailing_median(history[-(I_new.shape[0] + w - 1) :], w)[-I_new.shape[0] :] if d.size else I_new
        ranks, events = level_ranks(d, smooth, self.levels, self.ranks)
        if d.size:
            self.ranks = ranks[-1]
        self.days = np.concatenate((self.days, d))
        self.indicator = history
        trends: list[WearTrend] = []
        if self.days.size >= 3:
            tail = slice(-self.trend_windows, None)
            trends = wear_trend(self.days[tail], self.indicator[tail], limit=self.limit)
        return events, trends
