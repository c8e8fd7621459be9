"""Event records of the detection stage: plain frozen dataclasses, no behaviour.

Each record carries sample indices counted from the first sample the detector has seen (a global
index across batches), the matching times [s] on the stream's clock, and the numbers behind it, so
that the store can keep the event with its evidence window of raw samples and a person can read why
it was raised.

Records
-------
CollisionEvent : a momentum-observer residual above its threshold for long enough
ChangeAlarm    : a CUSUM alarm on one standardised channel, with the estimated onset
WearLevelEvent : an actuator's wear indicator passing one of its levels (up or down)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class CollisionEvent:
    """External effort seen by the momentum observer.

    Attributes
    ----------
    start_index, end_index : first and last sample above threshold (inclusive, global index)
    start_time_s, end_time_s : their times [s]
    peak_index, peak_time_s : the sample where the residual is largest relative to its threshold
    peak_residual : (n,) signed residual of each actuator at that actuator's own largest |r| [N m | N]
    residual_at_peak : (n,) residual vector at ``peak_index`` [N m | N]
    q_at_peak : (n,) actuator positions at ``peak_index`` [rad | m]
    external_wrench : (k,) least-squares platform force (delta, k = 3) [N] or wrench (hexapod, k = 6)
        [N, N m] with ``J^T w = r`` at ``peak_index``; empty (0,) when no Jacobian was given
    wrench_misfit : norm of ``J^T w - r`` at the peak [N m | N]; 0 for a square, regular J
    relative_peak : (n,) ``|peak_residual| / rated effort`` [-]
    evidence_start_time_s, evidence_end_time_s : bounds of the raw samples to keep [s]
    evidence_start_index, evidence_end_index : the same bounds as global sample indices (the end
        index is estimated from the nominal sample period and may lie in a later batch)
    """

    start_index: int
    end_index: int
    start_time_s: float
    end_time_s: float
    peak_index: int
    peak_time_s: float
    peak_residual: Array
    residual_at_peak: Array
    q_at_peak: Array
    external_wrench: Array
    wrench_misfit: float
    relative_peak: Array
    evidence_start_time_s: float
    evidence_end_time_s: float
    evidence_start_index: int
    evidence_end_index: int

    @property
    def duration_s(self) -> float:
        """Time between the first and the last sample above threshold [s]."""
        return self.end_time_s - self.start_time_s


@dataclass(frozen=True, slots=True)
class ChangeAlarm:
    """A two-sided CUSUM alarm on one channel.

    Attributes
    ----------
    channel : column of the standardised signal
    direction : +1 (mean rose) or -1 (mean fell)
    alarm_index, alarm_time_s : sample where the statistic crossed h (global index) and its time [s]
    onset_index, onset_time_s : Page's estimate of the change time: the sample after the statistic
        was last zero before the alarm
    statistic : value of the crossing statistic at the alarm [-] (standard deviations)
    """

    channel: int
    direction: int
    alarm_index: int
    alarm_time_s: float
    onset_index: int
    onset_time_s: float
    statistic: float

    @property
    def delay_s(self) -> float:
        """Detection delay from the estimated onset to the alarm [s]."""
        return self.alarm_time_s - self.onset_time_s


@dataclass(frozen=True, slots=True)
class WearLevelEvent:
    """An actuator's wear indicator entering or leaving a level.

    Attributes
    ----------
    actuator : actuator index
    day : time of the window where it happened [days on the trend's own axis]
    rank_before, rank_after : level ranks, 0 below every level, 1 the lowest level, ...
    level_before, level_after : level names (``""`` for rank 0)
    indicator : the wear indicator at that window [-] (compensated friction / baseline)
    """

    actuator: int
    day: float
    rank_before: int
    rank_after: int
    level_before: str
    level_after: str
    indicator: float

    @property
    def rising(self) -> bool:
        """True when the indicator entered a higher level."""
        return self.rank_after > self.rank_before


def as_float_array(x: Array) -> Array:
    """A float64 copy, for storing in an event record without aliasing the caller's buffer."""
    return np.array(x, dtype=np.float64, copy=True)
