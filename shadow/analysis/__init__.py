"""Offline analysis of a recorded run: the live monitor's code, fed from a file much faster than real time.

:func:`analyse` (a whole :class:`Recording`) and :func:`analyse_stream` (a :class:`RecordingReader`, block by
block, in memory that does not grow with the recording's length) hand the batches to
:class:`shadow.monitoring.RobotMonitor` in blocks of ``block_messages`` through ``process_many`` (the live
service hands over whatever arrived together in the same way), so an analysis finds exactly what the live
service would have found on the same stream; both cut the stream into the same blocks, so they give the same
rows. At the end the events whose evidence window reaches past the end of the recording are released with the
evidence there is. What is kept of the results is bounded (:class:`shadow.analysis.digest.RunDigest`).
``shadow analyze`` prints the result, ``shadow report`` turns it into an HTML page (:mod:`shadow.analysis.report`).
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shadow.analysis.digest import RunDigest
from shadow.analysis.recording import Recording, RecordingInfo, RecordingReader
from shadow.errors import ConfigurationError
from shadow.ingest.wire import SampleBatch
from shadow.monitoring import RobotMonitor

__all__ = [
    "Analysis",
    "FinalEstimate",
    "analyse",
    "analyse_stream",
    "estimate_series",
    "final_estimates",
]

DEFAULT_BLOCK_MESSAGES = 50
DEFAULT_STRETCH_S = 4.0  # length of the validation stretch [s]

Progress = Callable[[int, int, float], None]  # (samples done, samples in all or the estimate, elapsed seconds)


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
    """What the monitor produced over a whole recording (bounded: see shadow.analysis.digest)."""

    recording: RecordingInfo
    results: RunDigest
    n_samples: int
    elapsed_s: float  # wall-clock time of the monitor's work (and, streamed, of the reading) [s]

    @property
    def samples_per_s(self) -> float:
        return self.n_samples / self.elapsed_s if self.elapsed_s > 0 else float("inf")

    @property
    def events(self) -> list[dict[str, Any]]:
        return self.results.events

    def final_estimates(self) -> list[FinalEstimate]:
        return final_estimates(list(self.results.final_rows.values()))


def final_estimates(rows: list[dict[str, Any]]) -> list[FinalEstimate]:
    """The newest estimate row of each parameter, in the order the parameters first appear."""
    last: dict[str, dict[str, Any]] = {}
    for row in rows:
        last[row["parameter"]] = row
    return [
        FinalEstimate(r["parameter"], float(r["value"]), float(r["std"]), bool(r["identifiable"]), float(r["time_s"]))
        for r in last.values()
    ]


def _run(
    batches: Iterator[SampleBatch],
    monitor: RobotMonitor,
    digest: RunDigest,
    block_messages: int,
    progress: Progress | None,
    total: Callable[[int], int],
) -> tuple[int, float]:
    """Feed ``batches`` to the monitor ``block_messages`` at a time; (samples, elapsed seconds)."""
    if block_messages < 1:
        raise ConfigurationError(f"block_messages: must be >= 1, got {block_messages}")
    done = 0
    shown_total = -1
    start = time.perf_counter()
    block: list[SampleBatch] = []

    def step() -> None:
        nonlocal done, shown_total
        digest.add(monitor.process_many(block))
        digest.feed(block)
        done += sum(b.n_samples for b in block)
        if progress is not None:
            shown_total = total(done)
            progress(done, shown_total, time.perf_counter() - start)

    for batch in batches:
        block.append(batch)
        if len(block) == block_messages:
            step()
            block = []
    if block:
        step()
    if progress is not None and shown_total != done:  # a streamed total was an estimate: end on the count
        progress(done, done, time.perf_counter() - start)
    digest.add(monitor.flush_events())  # the last output folded, events waiting for their evidence window
    return done, time.perf_counter() - start


def analyse(
    recording: Recording,
    monitor: RobotMonitor,
    *,
    block_messages: int = DEFAULT_BLOCK_MESSAGES,
    progress: Progress | None = None,
    stretch_s: float = DEFAULT_STRETCH_S,
) -> Analysis:
    """Run ``monitor`` over every batch of ``recording``, ``block_messages`` batches per ``process_many`` call.

    ``stretch_s``: length of the validation stretches kept for the report [s].
    """
    digest = RunDigest(monitor.robot_id, stretch_s=stretch_s)
    total = recording.n_samples
    n, elapsed = _run(iter(recording.batches), monitor, digest, block_messages, progress, lambda _: total)
    return Analysis(recording.info(), digest, n, elapsed)


def analyse_stream(
    reader: RecordingReader,
    monitor: RobotMonitor,
    *,
    block_messages: int = DEFAULT_BLOCK_MESSAGES,
    progress: Progress | None = None,
    stretch_s: float = DEFAULT_STRETCH_S,
) -> Analysis:
    """As :func:`analyse`, reading ``reader``'s blocks as they come (the recording is never whole in memory).

    The progress total is the estimate ``samples read x file size / bytes read`` until the end.
    """
    digest = RunDigest(monitor.robot_id, stretch_s=stretch_s)

    def batches(blocks: Iterable[list[tuple[int, SampleBatch]]]) -> Iterator[SampleBatch]:
        for block in blocks:
            for _, batch in block:
                yield batch

    def total(done: int) -> int:
        if reader.finished:
            return reader.n_samples
        if reader.bytes_read == 0:
            return done + 1
        # samples handed on by the reader per byte it has read, times the file size; the reader is up to a block
        # ahead of the monitor, so its own count is the one that matches its bytes. The estimate stays above the
        # count until the reader has finished, so the bar ends only once
        return max(done + 1, int(round(reader.n_samples * reader.size_bytes / reader.bytes_read)))

    n, elapsed = _run(batches(reader.blocks()), monitor, digest, block_messages, progress, total)
    return Analysis(reader.info(), digest, n, elapsed)


def estimate_series(rows: list[dict[str, Any]], parameter: str) -> tuple[NDArray[np.float64], ...]:
    """(time_s, value, std, identifiable) of one parameter's estimates, each (K,)."""
    picked = [r for r in rows if r["parameter"] == parameter]
    t = np.array([r["time_s"] for r in picked], dtype=float)
    v = np.array([r["value"] for r in picked], dtype=float)
    s = np.array([r["std"] for r in picked], dtype=float)
    ok = np.array([bool(r["identifiable"]) for r in picked], dtype=float)
    return t, v, s, ok
