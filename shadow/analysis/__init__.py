"""Offline analysis of a recorded run: the live monitor's code, fed from a file much faster than real time.

:func:`analyse` hands the recording's batches to :class:`shadow.monitoring.RobotMonitor` in blocks of
``block_messages`` through ``process_many`` (the live service hands over whatever arrived together in the
same way), so an analysis finds exactly what the live service would have found on the same stream. At the
end the events whose evidence window reaches past the end of the recording are released with the evidence
there is. ``shadow analyze`` prints the result, ``shadow report`` turns it into an HTML page
(:mod:`shadow.analysis.report`).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shadow.analysis.recording import Recording
from shadow.errors import ConfigurationError
from shadow.monitoring import RobotMonitor
from shadow.store.repository import StepResults

__all__ = ["Analysis", "FinalEstimate", "analyse", "estimate_series", "final_estimates", "release_pending_events"]

DEFAULT_BLOCK_MESSAGES = 50

Progress = Callable[[int, int, float], None]  # (samples done, samples in all, elapsed seconds)


@dataclass(frozen=True, slots=True)
class FinalEstimate:
    """The last estimate of one parameter."""

    parameter: str
    value: float
    std: float
    identifiable: bool
    time_s: float


@dataclass(frozen=True, slots=True)
class Analysis:
    """What the monitor produced over a whole recording."""

    recording: Recording
    results: StepResults
    n_samples: int
    elapsed_s: float  # wall-clock time of the monitor's work [s]

    @property
    def samples_per_s(self) -> float:
        return self.n_samples / self.elapsed_s if self.elapsed_s > 0 else float("inf")

    @property
    def events(self) -> list[dict[str, Any]]:
        return self.results.events

    def final_estimates(self) -> list[FinalEstimate]:
        return final_estimates(self.results.estimates)


def final_estimates(rows: list[dict[str, Any]]) -> list[FinalEstimate]:
    """The newest estimate row of each parameter, in the order the parameters first appear."""
    last: dict[str, dict[str, Any]] = {}
    for row in rows:
        last[row["parameter"]] = row
    return [
        FinalEstimate(r["parameter"], float(r["value"]), float(r["std"]), bool(r["identifiable"]), float(r["time_s"]))
        for r in last.values()
    ]


def release_pending_events(monitor: RobotMonitor) -> StepResults:
    """Rows of the events still waiting for the end of their evidence window (the recording ended first).

    A live monitor keeps them until the stream passes the window's end; a recording has no more samples,
    so they are released with the evidence recorded up to its end.
    """
    return monitor.flush_events()


def analyse(
    recording: Recording,
    monitor: RobotMonitor,
    *,
    block_messages: int = DEFAULT_BLOCK_MESSAGES,
    progress: Progress | None = None,
) -> Analysis:
    """Run ``monitor`` over every batch of ``recording``, ``block_messages`` batches per ``process_many`` call."""
    if block_messages < 1:
        raise ConfigurationError(f"block_messages: must be >= 1, got {block_messages}")
    batches = list(recording.batches)
    total = recording.n_samples
    results = StepResults(monitor.robot_id)
    done = 0
    start = time.perf_counter()
    for k in range(0, len(batches), block_messages):
        block = batches[k : k + block_messages]
        results.extend(monitor.process_many(block))
        done += sum(b.n_samples for b in block)
        if progress is not None:
            progress(done, total, time.perf_counter() - start)
    results.extend(release_pending_events(monitor))
    return Analysis(recording, results, total, time.perf_counter() - start)


def estimate_series(rows: list[dict[str, Any]], parameter: str) -> tuple[NDArray[np.float64], ...]:
    """(time_s, value, std, identifiable) of one parameter's estimates, each (K,)."""
    picked = [r for r in rows if r["parameter"] == parameter]
    t = np.array([r["time_s"] for r in picked], dtype=float)
    v = np.array([r["value"] for r in picked], dtype=float)
    s = np.array([r["std"] for r in picked], dtype=float)
    ok = np.array([bool(r["identifiable"]) for r in picked], dtype=float)
    return t, v, s, ok
