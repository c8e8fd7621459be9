"""What an analysis keeps of a run for the summary and the report, in memory bounded by constants, not by length.

The monitor's output rows (:class:`shadow.store.repository.StepResults`) grow with the run: one estimate row per
parameter, one residual row per actuator and health rows per output period (1 s), i.e. millions of rows a day.
:class:`RunDigest` takes them step by step and keeps:

- events: every event row; the evidence samples of the first ``max_evidence_events`` only (later rows keep their
  figures, their evidence is dropped and counted);
- estimates: the last row per parameter (the final estimates), and per parameter a min-max envelope of at most
  ``2 max_buckets`` rows for the trend plots (:class:`MinMaxSeries`);
- residual RMS rows: the same envelope per actuator;
- health: the rows of the last assessment, and the count of each robot state over the run;
- stretches not monitored: the count and total length, and the first ``max_listed_gaps`` rows;
- validation: raw samples of at most ``max_windows`` stretches spread over the run (:class:`WindowSet`).

Min-max decimation (common practice for plotting long series, no source): the rows are cut into buckets of k
consecutive rows and each bucket keeps its rows with the least and the greatest value, so every peak survives; when
there are more than ``max_buckets`` buckets, neighbours are merged in pairs and k doubles.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from typing import Any

from shadow.errors import ConfigurationError
from shadow.ingest.wire import SampleBatch
from shadow.store.repository import StepResults

__all__ = [
    "MAX_BUCKETS",
    "MAX_EVIDENCE_EVENTS",
    "MAX_LISTED_GAPS",
    "MAX_WINDOWS",
    "MinMaxSeries",
    "RunDigest",
    "Window",
    "WindowSet",
]

MAX_BUCKETS = 500  # min-max buckets per series: at most 1000 rows per parameter or actuator (a 960 px plot)
MAX_EVIDENCE_EVENTS = 200  # events whose evidence samples are kept (about 1000 samples each)
MAX_LISTED_GAPS = 500  # stretches not monitored kept as rows
MAX_WINDOWS = 8  # validation candidate stretches kept (at most 8 x stretch_s of samples)


@dataclass(slots=True)
class _Bucket:
    low: dict[str, Any]
    high: dict[str, Any]
    rows: int


class MinMaxSeries:
    """Min-max envelope of a row series in time order, at most ``2 max_buckets`` rows kept."""

    def __init__(self, key: str, *, max_buckets: int = MAX_BUCKETS) -> None:
        if max_buckets < 1:
            raise ConfigurationError(f"max_buckets: must be >= 1, got {max_buckets}")
        self.key = key
        self.max_buckets = max_buckets
        self.rows_per_bucket = 1
        self.buckets: list[_Bucket] = []
        self.count = 0

    def add(self, row: dict[str, Any]) -> None:
        self.count += 1
        last = self.buckets[-1] if self.buckets else None
        if last is not None and last.rows < self.rows_per_bucket:
            if row[self.key] < last.low[self.key]:
                last.low = row
            if row[self.key] > last.high[self.key]:
                last.high = row
            last.rows += 1
            return
        self.buckets.append(_Bucket(row, row, 1))
        if len(self.buckets) > self.max_buckets:
            self._merge()

    def _merge(self) -> None:
        merged: list[_Bucket] = []
        for a, b in zip(self.buckets[0::2], self.buckets[1::2], strict=False):
            low = a.low if a.low[self.key] <= b.low[self.key] else b.low
            high = a.high if a.high[self.key] >= b.high[self.key] else b.high
            merged.append(_Bucket(low, high, a.rows + b.rows))
        if len(self.buckets) % 2:
            merged.append(self.buckets[-1])
        self.buckets = merged
        self.rows_per_bucket *= 2

    def rows(self) -> list[dict[str, Any]]:
        """The kept rows in time order (each bucket's low and high row, once if they are the same)."""
        out: list[dict[str, Any]] = []
        for b in self.buckets:
            pair = [b.low] if b.low is b.high else sorted((b.low, b.high), key=lambda r: r["time_s"])
            out.extend(pair)
        return out


@dataclass(slots=True)
class Window:
    """Consecutive batches covering one candidate validation stretch."""

    start_s: float
    batches: list[SampleBatch] = field(default_factory=list)

    @property
    def end_s(self) -> float:
        return float(self.batches[-1].t[-1]) if self.batches else self.start_s


class WindowSet:
    """At most ``max_windows`` stretches of ``stretch_s`` spread evenly over the run, chosen as it streams by.

    Windows start back to back (spacing = ``stretch_s``); when one more than ``max_windows`` are held, every
    other one is dropped and the spacing doubles, so the kept windows stay evenly spread whatever the length.
    """

    def __init__(self, stretch_s: float, *, max_windows: int = MAX_WINDOWS) -> None:
        if not stretch_s > 0:
            raise ConfigurationError(f"stretch_s: must be > 0, got {stretch_s}")
        if max_windows < 2:
            raise ConfigurationError(f"max_windows: must be >= 2, got {max_windows}")
        self.stretch_s = stretch_s
        self.max_windows = max_windows
        self.spacing_s = stretch_s
        self.windows: list[Window] = []
        self._open: Window | None = None
        self._next_start_s = -float("inf")

    def feed(self, batch: SampleBatch) -> None:
        if self._open is None:
            if batch.t[0] < self._next_start_s:
                return
            self._open = Window(float(batch.t[0]))
            self._next_start_s = self._open.start_s + self.spacing_s
        self._open.batches.append(batch)
        if batch.t[-1] >= self._open.start_s + self.stretch_s:
            self._close()

    def _close(self) -> None:
        window = self._open
        if window is None:
            return
        self.windows.append(window)
        self._open = None
        if len(self.windows) > self.max_windows:
            self.windows = self.windows[0::2]
            self.spacing_s *= 2.0
            self._next_start_s = self.windows[-1].start_s + self.spacing_s

    def all(self) -> list[Window]:
        """The kept windows, and the one still open at the end of the run (shorter than the stretch)."""
        return self.windows + ([self._open] if self._open is not None and self._open.batches else [])


class RunDigest:
    """The bounded part of a run's results that the summary and the report use (see the module docstring)."""

    def __init__(
        self,
        robot_id: str,
        *,
        stretch_s: float,
        max_buckets: int = MAX_BUCKETS,
        max_evidence_events: int = MAX_EVIDENCE_EVENTS,
        max_listed_gaps: int = MAX_LISTED_GAPS,
        max_windows: int = MAX_WINDOWS,
    ) -> None:
        self.robot_id = robot_id
        self.max_buckets = max_buckets
        self.max_evidence_events = max_evidence_events
        self.max_listed_gaps = max_listed_gaps
        self.events: list[dict[str, Any]] = []
        self.evidence_dropped = 0
        self.final_rows: dict[str, dict[str, Any]] = {}  # parameter -> newest estimate row
        self._estimates: dict[str, MinMaxSeries] = {}
        self._residuals: dict[int, MinMaxSeries] = {}
        self.health_latest: list[dict[str, Any]] = []  # the rows of the newest assessment time
        self.robot_states: Counter[str] = Counter()  # robot-scope assessments per state
        self.last_robot_health: dict[str, Any] | None = None
        self.unmonitored: list[dict[str, Any]] = []  # the first max_listed_gaps stretches
        self.unmonitored_count = 0
        self.unmonitored_s = 0.0
        self.windows = WindowSet(stretch_s, max_windows=max_windows)

    @property
    def stretch_s(self) -> float:
        return self.windows.stretch_s

    def feed(self, batches: list[SampleBatch]) -> None:
        """The raw batches handed to the monitor (for the validation windows)."""
        for b in batches:
            self.windows.feed(b)

    def add(self, results: StepResults) -> None:
        """One processing step's rows."""
        for e in results.events:
            if e.get("evidence") is not None and len(self.events) >= self.max_evidence_events:
                e = {**e, "evidence": None}
                self.evidence_dropped += 1
            self.events.append(e)
        for r in results.estimates:
            self.final_rows[r["parameter"]] = r
            series = self._estimates.get(r["parameter"])
            if series is None:
                series = self._estimates[r["parameter"]] = MinMaxSeries("value", max_buckets=self.max_buckets)
            series.add(r)
        for r in results.residual_aggregates:
            res = self._residuals.get(r["actuator"])
            if res is None:
                res = self._residuals[r["actuator"]] = MinMaxSeries("rms", max_buckets=self.max_buckets)
            res.add(r)
        for h in results.health:
            if not self.health_latest or h["time_s"] != self.health_latest[-1]["time_s"]:
                self.health_latest = []
            self.health_latest.append(h)
            if h["scope"] == "robot":
                self.robot_states[h["state"]] += 1
                self.last_robot_health = h
        for g in results.unmonitored:
            self.unmonitored_count += 1
            self.unmonitored_s += g["end_s"] - g["start_s"]
            if len(self.unmonitored) < self.max_listed_gaps:
                self.unmonitored.append(g)

    @property
    def estimates(self) -> list[dict[str, Any]]:
        """Estimate rows kept for the trends (the envelope of each parameter, parameters in first-seen order)."""
        return [r for s in self._estimates.values() for r in s.rows()]

    @property
    def residual_aggregates(self) -> list[dict[str, Any]]:
        """Residual RMS rows kept (the envelope per actuator)."""
        return [r for s in self._residuals.values() for r in s.rows()]

    @property
    def health(self) -> list[dict[str, Any]]:
        """The rows of the last assessment."""
        return list(self.health_latest)
