"""The shop practice the scoreboard compares shadow with: a fixed envelope around a recorded reference cycle.

Where a cell monitors its robots at all, the usual way (common practice, no source) is to record the drive efforts
of one good production cycle and to raise an alarm when a later cycle's effort leaves a fixed band around that
recording. No model, no estimator: the reference knows nothing of where the pick and place points wandered to, of
the work piece's mass spread, or of the drives warming up, so its band has to be wide enough for all of that.

Here the reference is the mean effort per phase of the cycle (1 ms bins) over a healthy run, the phase counted
from the gripper's closing, and the band per actuator is ``margin`` times the largest deviation the healthy run
itself showed: the tightest band that run passes. An alarm is a run of samples outside the band that lasts at
least ``min_duration_s`` (the same as shadow's collision detector), runs closer than ``merge_gap_s`` merge.

Symbols: ``t`` (N,) [s], ``effort`` (N, n) joint-side efforts [N m | N], ``gripping`` (N,) tool state.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from shadow.detection.momentum_observer import find_runs
from shadow.errors import ShadowError

Array = NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class Alarm:
    """One excursion outside the band: first and last sample time [s], the actuator (0-based) furthest out."""

    start_s: float
    end_s: float
    actuator: int
    peak_deviation: float  # largest |effort - reference| in the alarm [N m | N]


def cycle_phase(t: Array, gripping: NDArray[np.bool_], period_s: float) -> Array:
    """Phase in the cycle [s] of each sample, counted from the gripper's first closing (wrapped into [0, period))."""
    closes = np.flatnonzero(np.diff(gripping.astype(np.int8)) == 1) + 1
    if closes.size == 0:
        raise ShadowError("cycle_phase: the gripper never closes, so the cycle cannot be aligned")
    return np.mod(t - t[closes[0]], period_s)


def cycle_period(t: Array, gripping: NDArray[np.bool_]) -> float:
    """The cycle time [s]: the median time between two closings of the gripper."""
    closes = t[np.flatnonzero(np.diff(gripping.astype(np.int8)) == 1) + 1]
    if closes.size < 2:
        raise ShadowError("cycle_period: the gripper closes fewer than twice")
    return float(np.median(np.diff(closes)))


@dataclass(frozen=True, slots=True)
class ReferenceCycle:
    """The recorded reference: mean effort per phase bin and the band around it."""

    period_s: float
    bin_s: float
    reference: Array  # (B, n) mean effort per phase bin [N m | N]
    band: Array  # (n,) half-width of the band [N m | N]
    min_duration_s: float = 0.01
    merge_gap_s: float = 0.05

    @classmethod
    def record(
        cls,
        segments: list[tuple[Array, Array, NDArray[np.bool_]]],
        *,
        bin_s: float = 1e-3,
        margin: float = 1.25,
    ) -> ReferenceCycle:
        """From healthy segments ``(t, effort, gripping)``, each a stretch of uninterrupted production."""
        period = float(np.median([cycle_period(t, g) for t, _, g in segments]))
        n_bins = int(np.ceil(period / bin_s))
        n = segments[0][1].shape[1]
        total, count = np.zeros((n_bins, n)), np.zeros(n_bins)
        for t, effort, g in segments:
            k = np.minimum((cycle_phase(t, g, period) / bin_s).astype(int), n_bins - 1)
            np.add.at(total, k, effort)
            np.add.at(count, k, 1.0)
        if np.any(count == 0):
            raise ShadowError("ReferenceCycle.record: some phase bins saw no sample; record a longer run")
        reference = total / count[:, None]
        ref = cls(period_s=period, bin_s=bin_s, reference=reference, band=np.zeros(n))
        worst = np.max([np.abs(ref.deviation(t, e, g)).max(axis=0) for t, e, g in segments], axis=0)
        return cls(period_s=period, bin_s=bin_s, reference=reference, band=margin * worst)

    def deviation(self, t: Array, effort: Array, gripping: NDArray[np.bool_]) -> Array:
        """(N, n) effort minus the reference at each sample's phase [N m | N]."""
        k = np.minimum((cycle_phase(t, gripping, self.period_s) / self.bin_s).astype(int), self.reference.shape[0] - 1)
        deviation: Array = effort - self.reference[k]
        return deviation

    def alarms(self, t: Array, effort: Array, gripping: NDArray[np.bool_]) -> list[Alarm]:
        """The excursions outside the band in one segment."""
        d = self.deviation(t, effort, gripping)
        outside = np.any(np.abs(d) > self.band, axis=1)
        starts, ends = find_runs(t, outside, self.merge_gap_s)
        found = []
        for s, e in zip(starts, ends, strict=True):
            if t[e] - t[s] < self.min_duration_s:
                continue
            excess = np.abs(d[s : e + 1]) / self.band
            i = int(np.unravel_index(np.argmax(excess), excess.shape)[1])
            found.append(Alarm(float(t[s]), float(t[e]), i, float(np.abs(d[s : e + 1, i]).max())))
        return found
