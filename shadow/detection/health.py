"""Health states of each actuator and of the robot, with the reasons in words and the figures behind them.

States, in rising order of concern: ``steady`` (nothing to report), ``no data`` (cannot judge: the
stream is stale or a figure is missing), ``watch`` (drifting from the healthy model; plan a look),
``act`` (a limit is passed; act on it). The robot's state is the worst of its actuators' and of the
robot-level causes (collisions, payload, data freshness).

Inputs per actuator: the residual RMS against its baseline, the wear indicator
(:mod:`shadow.detection.wear`) and the age of its latest sample. Robot-level: recent collisions
(:class:`~shadow.detection.events.CollisionEvent`), the payload deviation (estimated against declared,
relative) and the stream's data age. The limits are choices of the site (common practice, no source).
"""

from __future__ import annotations

import enum
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from shadow.detection.events import CollisionEvent
from shadow.errors import ConfigurationError, expect_shape

Array = NDArray[np.float64]


class HealthState(enum.Enum):
    """Plain-word health states."""

    STEADY = "steady"
    NO_DATA = "no data"
    WATCH = "watch"
    ACT = "act"

    @property
    def rank(self) -> int:
        """Order of concern: steady 0 < no data 1 < watch 2 < act 3."""
        return _RANK[self]


_RANK = {HealthState.STEADY: 0, HealthState.NO_DATA: 1, HealthState.WATCH: 2, HealthState.ACT: 3}


def worst(states: Sequence[HealthState]) -> HealthState:
    """The state of highest concern (steady for none)."""
    return max(states, key=lambda s: s.rank, default=HealthState.STEADY)


@dataclass(frozen=True, slots=True)
class Health:
    """A state with its reasons (sentences) and figures (keys carry their unit: _ratio, _s, _count, ...)."""

    state: HealthState
    reasons: list[str] = field(default_factory=list)
    figures: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class HealthLimits:
    """Where each input moves the state. Ratios and fractions are dimensionless."""

    residual_watch_ratio: float = 1.5  # residual RMS / baseline RMS
    residual_act_ratio: float = 3.0
    wear_watch_ratio: float = 1.15  # wear indicator (compensated friction / baseline)
    wear_act_ratio: float = 1.30
    collision_act_rated_fraction: float = 0.5  # a collision peak above this share of the rated effort
    collision_act_count: int = 3  # this many recent collisions
    payload_watch_fraction: float = 0.10  # |estimated - declared| / declared payload
    payload_act_fraction: float = 0.25
    stale_after_s: float = 10.0  # no sample for this long: no data

    def __post_init__(self) -> None:
        pairs = (
            ("residual", self.residual_watch_ratio, self.residual_act_ratio),
            ("wear", self.wear_watch_ratio, self.wear_act_ratio),
            ("payload", self.payload_watch_fraction, self.payload_act_fraction),
        )
        for name, watch, act in pairs:
            if not 0.0 < watch <= act:
                raise ConfigurationError(f"{name} limits: need 0 < watch <= act, got {watch!r}, {act!r}")
        if self.stale_after_s <= 0.0 or self.collision_act_count < 1 or self.collision_act_rated_fraction <= 0.0:
            raise ConfigurationError("stale_after_s, collision_act_count and collision_act_rated_fraction must be > 0")


def _graded(value: float, watch: float, act: float) -> HealthState:
    if value >= act:
        return HealthState.ACT
    if value >= watch:
        return HealthState.WATCH
    return HealthState.STEADY


def actuator_health(
    residual_rms: Array,
    baseline_rms: Array,
    wear_indicator: Array,
    data_age_s: Array,
    limits: HealthLimits,
) -> list[Health]:
    """Health of each actuator; every input is (n,), NaN where the figure is not known yet.

    Parameters
    ----------
    residual_rms, baseline_rms : recent and healthy RMS of the effort residual [N m | N]
    wear_indicator : compensated friction / baseline [-]
    data_age_s : time since the actuator's latest sample [s]
    limits : :class:`HealthLimits`
    """
    n = residual_rms.shape[0] if residual_rms.ndim == 1 else -1
    for name, a in (("residual_rms", residual_rms), ("baseline_rms", baseline_rms)):
        expect_shape(name, a, (n,))
    expect_shape("wear_indicator", wear_indicator, (n,))
    expect_shape("data_age_s", data_age_s, (n,))
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(baseline_rms > 0.0, residual_rms / baseline_rms, np.nan)  # RMS / baseline RMS
    out = []
    for i in range(n):  # loop over actuators
        name = f"actuator {i + 1}"  # 1-based, as in the parameter names
        figures = {
            "residual_rms_ratio": float(ratio[i]),
            "wear_indicator_ratio": float(wear_indicator[i]),
            "data_age_s": float(data_age_s[i]),
        }
        if not data_age_s[i] <= limits.stale_after_s:  # NaN (never seen) counts as stale
            age = "never" if math.isnan(data_age_s[i]) else f"{data_age_s[i]:.0f} s ago"
            reason = f"{name}: no fresh samples (latest {age}; stale after {limits.stale_after_s:.0f} s)"
            out.append(Health(HealthState.NO_DATA, [reason], figures))
            continue
        states, reasons = [], []
        if math.isnan(ratio[i]):
            states.append(HealthState.NO_DATA)
            reasons.append(f"{name}: no residual baseline yet")
        else:
            s = _graded(ratio[i], limits.residual_watch_ratio, limits.residual_act_ratio)
            states.append(s)
            if s is not HealthState.STEADY:
                limit = limits.residual_act_ratio if s is HealthState.ACT else limits.residual_watch_ratio
                reasons.append(
                    f"{name}: effort residual RMS is {ratio[i]:.2f} times its baseline ({s.value} from {limit:.2f})"
                )
        if not math.isnan(wear_indicator[i]):
            s = _graded(wear_indicator[i], limits.wear_watch_ratio, limits.wear_act_ratio)
            states.append(s)
            if s is not HealthState.STEADY:
                limit = limits.wear_act_ratio if s is HealthState.ACT else limits.wear_watch_ratio
                reasons.append(
                    f"{name}: friction is {100 * (wear_indicator[i] - 1):.0f} % above its baseline after temperature "
                    f"compensation ({s.value} from {100 * (limit - 1):.0f} %)"
                )
        out.append(Health(worst(states), reasons, figures))
    return out


def robot_health(
    actuators: Sequence[Health],
    collisions: Sequence[CollisionEvent],
    payload_deviation_fraction: float,
    data_age_s: float,
    limits: HealthLimits,
) -> Health:
    """The robot's health: worst of its actuators and of the robot-level causes.

    Parameters
    ----------
    actuators : from :func:`actuator_health`
    collisions : the collisions in the recent period the caller chose
    payload_deviation_fraction : (estimated - declared) / declared payload [-]; NaN if not estimated
    data_age_s : time since the robot's latest sample [s]
    limits : :class:`HealthLimits`
    """
    figures: dict[str, float] = {"data_age_s": float(data_age_s), "collisions_count": float(len(collisions))}
    if not data_age_s <= limits.stale_after_s:
        age = "never" if math.isnan(data_age_s) else f"{data_age_s:.0f} s ago"
        return Health(
            HealthState.NO_DATA, [f"robot: no fresh samples (latest {age}; stale after {limits.stale_after_s:.0f} s)"],
            figures,
        )  # fmt: skip
    states = [a.state for a in actuators]
    reasons = [r for a in actuators for r in a.reasons]
    if collisions:
        peak = max(float(np.max(c.relative_peak)) for c in collisions)
        figures["collision_peak_rated_fraction"] = peak
        heavy = peak >= limits.collision_act_rated_fraction
        many = len(collisions) >= limits.collision_act_count
        s = HealthState.ACT if (heavy or many) else HealthState.WATCH
        states.append(s)
        reasons.append(
            f"robot: {len(collisions)} collision(s) recently, the largest at {100 * peak:.0f} % of rated effort "
            f"({s.value}: act from {100 * limits.collision_act_rated_fraction:.0f} % or {limits.collision_act_count} "
            "collisions)"
        )
    if not math.isnan(payload_deviation_fraction):
        figures["payload_deviation_fraction"] = float(payload_deviation_fraction)
        dev = abs(payload_deviation_fraction)
        s = _graded(dev, limits.payload_watch_fraction, limits.payload_act_fraction)
        states.append(s)
        if s is not HealthState.STEADY:
            word = "heavier" if payload_deviation_fraction > 0 else "lighter"
            limit = limits.payload_act_fraction if s is HealthState.ACT else limits.payload_watch_fraction
            reasons.append(
                f"robot: payload looks {100 * dev:.0f} % {word} than declared ({s.value} from {100 * limit:.0f} %)"
            )
    state = worst(states)
    figures["actuators_act_count"] = float(sum(a.state is HealthState.ACT for a in actuators))
    figures["actuators_watch_count"] = float(sum(a.state is HealthState.WATCH for a in actuators))
    return Health(state, reasons, figures)
