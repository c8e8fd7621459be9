"""Streamed analysis of a recording file: the whole file's result, in memory that does not grow with length."""

from __future__ import annotations

import gc
import tracemalloc
from pathlib import Path

import matplotlib.figure  # noqa: F401  (imported before any memory is traced: the report needs it)
import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.analysis import analyse, analyse_stream
from shadow.analysis.digest import MinMaxSeries, WindowSet
from shadow.analysis.recording import RecordingError, RecordingReader, read_recording
from shadow.analysis.report import build_report
from shadow.ingest.wire import SampleBatch, encode_json
from shadow.monitoring import RobotMonitor, default_settings
from tests.analysis.test_recording import csv_text
from tests.synthetic import SyntheticStream, delta_stream

ROBOT = "cell7-picker"


def write_jsonl(path: Path, batches: list[SampleBatch]) -> Path:
    path.write_bytes(b"".join(encode_json(b) + b"\n" for b in batches))
    return path


def monitor_for(stream: SyntheticStream) -> RobotMonitor:
    return RobotMonitor(ROBOT, stream.description, None, default_settings(stream.description))


@pytest.mark.parametrize("layout", ["jsonl", "csv"])
def test_streamed_analysis_finds_what_the_whole_file_finds(
    tmp_path: Path, rng: np.random.Generator, layout: str
) -> None:
    stream = delta_stream(rng, duration_s=9.0, impact_at_s=5.4)
    path = tmp_path / f"run.{layout}"
    if layout == "csv":
        path.write_text(csv_text(stream))
    else:
        write_jsonl(path, stream.batches(ROBOT, 10))
    whole = analyse(read_recording(path, stream.description, robot_id=ROBOT), monitor_for(stream))
    # blocks of 730 samples: not a whole number of the monitor's 50-message blocks, so the carry-over is exercised
    reader = RecordingReader(path, stream.description, robot_id=ROBOT, block_samples=730)
    streamed = analyse_stream(reader, monitor_for(stream))
    assert len(whole.events) == 1  # the half-sine pulse of tests/synthetic.py
    assert [(e["kind"], e["start_s"], e["end_s"]) for e in streamed.events] == [
        (e["kind"], e["start_s"], e["end_s"]) for e in whole.events
    ]
    assert_allclose(
        [e["figures"]["platform_force_n"] for e in streamed.events],
        [e["figures"]["platform_force_n"] for e in whole.events],
        rtol=0,
        atol=0,
    )
    assert [(f.parameter, f.value, f.std) for f in streamed.final_estimates()] == [
        (f.parameter, f.value, f.std) for f in whole.final_estimates()
    ]
    assert streamed.n_samples == whole.n_samples == stream.t.shape[0]
    info = streamed.recording
    assert (info.n_messages, info.start_s, info.end_s) == (
        whole.recording.n_messages,
        whole.recording.start_s,
        whole.recording.end_s,
    )


def _peak_bytes(path: Path, stream: SyntheticStream) -> tuple[int, int]:
    """Peak traced memory [bytes] of the streamed analysis, then of building its report page."""
    gc.collect()
    tracemalloc.start()
    try:
        monitor = monitor_for(stream)
        analysis = analyse_stream(RecordingReader(path, stream.description), monitor)
        _, analysis_peak = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        build_report(monitor, analysis)
        _, report_peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return analysis_peak, report_peak


def test_memory_of_analysis_and_report_does_not_grow_with_the_length(tmp_path: Path) -> None:
    peaks = []
    for duration_s in (40.0, 160.0):
        stream = delta_stream(np.random.default_rng(7), duration_s=duration_s, impact_at_s=duration_s / 2)
        path = write_jsonl(tmp_path / f"run-{duration_s:.0f}.jsonl", stream.batches(ROBOT, 10))
        peaks.append(_peak_bytes(path, stream))
    # the whole-file path (read_recording + analyse) holds every batch: 2.5 x the peak for 4 x the samples here
    (analysis_short, report_short), (analysis_long, report_long) = peaks
    assert analysis_long < 1.5 * analysis_short, f"analysis: {analysis_long / 1e6:.1f} MB vs {analysis_short / 1e6:.1f}"
    assert report_long < 1.5 * report_short, f"report: {report_long / 1e6:.1f} MB vs {report_short / 1e6:.1f}"


def _long_lines(stream: SyntheticStream) -> list[bytes]:
    return [encode_json(b) for b in stream.batches(ROBOT, 10)]


def test_bad_line_in_the_middle_of_a_long_file_strict_and_not(tmp_path: Path) -> None:
    stream = delta_stream(np.random.default_rng(3), duration_s=40.0)
    lines = _long_lines(stream)
    middle = len(lines) // 2
    lines[middle] = lines[middle].replace(b'"position"', b'"pozition"', 1)  # a field renamed on line middle + 1
    path = tmp_path / "long.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    analysis = analyse_stream(RecordingReader(path, stream.description, block_samples=1000), monitor_for(stream))
    info = analysis.recording
    assert info.skipped_total == 1 and [s.line for s in info.skipped] == [middle + 1]
    assert "position" in info.skipped[0].reason
    assert analysis.n_samples == stream.t.shape[0] - 10
    reader = RecordingReader(path, stream.description, strict=True, block_samples=1000)
    with pytest.raises(RecordingError, match=rf"long\.jsonl: line {middle + 1}: .*position"):
        analyse_stream(reader, monitor_for(stream))
    assert 0 < reader.n_samples < stream.t.shape[0]  # the analysis had run up to the bad line


def test_skipped_lines_are_counted_beyond_the_listed_ones(tmp_path: Path, rng: np.random.Generator) -> None:
    stream = delta_stream(rng, duration_s=3.0)
    lines = _long_lines(stream)
    for k in range(5, len(lines), 10):  # every tenth line cut short
        lines[k] = lines[k][:40]
    lines[3] = lines[2]  # a repeat: its time does not follow
    path = tmp_path / "many.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    reader = RecordingReader(path, stream.description, max_listed_skips=4)
    for _ in reader.blocks():
        pass
    info = reader.info()
    cut = len(range(5, len(lines), 10))
    assert info.skipped_total == cut + 1 and len(info.skipped) == 4
    assert [s.line for s in info.skipped] == [4, 6, 16, 26]
    counts = dict(info.skip_counts)
    assert counts["time"] == 1 and sum(counts.values()) == cut + 1


def test_a_second_robot_after_the_first_is_an_error_naming_its_line(tmp_path: Path, rng: np.random.Generator) -> None:
    stream = delta_stream(rng, duration_s=1.0)
    ours = stream.batches("cell7-sorter", 10)  # not the description's name: "the only robot" so far
    theirs = stream.batches("cell9-other", 10)
    path = write_jsonl(tmp_path / "two.jsonl", [*ours[:60], theirs[60], *ours[61:]])
    with pytest.raises(RecordingError, match=r"line 61: robot: the file holds several robots .*--robot"):
        read_recording(path, stream.description)
    rec = read_recording(path, stream.description, robot_id="cell7-sorter")
    assert [s.line for s in rec.skipped] == [61] and rec.other_robots == ("cell9-other",)


def test_progress_total_comes_from_the_bytes_read(tmp_path: Path, rng: np.random.Generator) -> None:
    stream = delta_stream(rng, duration_s=6.0)
    path = write_jsonl(tmp_path / "run.jsonl", stream.batches(ROBOT, 10))
    calls: list[tuple[int, int]] = []
    reader = RecordingReader(path, stream.description, block_samples=730)  # the reader runs ahead of the monitor
    analyse_stream(reader, monitor_for(stream), progress=lambda done, total, _: calls.append((done, total)))
    n = stream.t.shape[0]
    assert calls[-1] == (n, n)
    # every line has about the same length, so the estimate from the bytes read is close to the count
    assert all(abs(total - n) <= 0.05 * n for _, total in calls)
    assert all(done <= total for done, total in calls)


@pytest.mark.parametrize("n_rows", [1, 3, 6, 500, 5000])
def test_min_max_envelope_keeps_every_extreme_and_stays_bounded(rng: np.random.Generator, n_rows: int) -> None:
    values = rng.normal(size=n_rows)
    series = MinMaxSeries("value", max_buckets=16)
    for k, v in enumerate(values):
        series.add({"time_s": float(k), "value": float(v)})
    kept = series.rows()
    assert len(kept) <= 2 * 16
    assert min(r["value"] for r in kept) == values.min() and max(r["value"] for r in kept) == values.max()
    times = [r["time_s"] for r in kept]
    assert times == sorted(times) and len(set(times)) == len(times)
    if n_rows <= 16:
        assert len(kept) == n_rows  # nothing to decimate yet


def test_validation_windows_stay_few_and_spread(rng: np.random.Generator) -> None:
    stream = delta_stream(rng, duration_s=100.0)
    windows = WindowSet(2.0, max_windows=4)
    for b in stream.batches(ROBOT, 10):
        windows.feed(b)
    kept = windows.all()
    assert 2 <= len(kept) <= 5
    starts = np.array([w.start_s for w in kept]) - stream.t[0]
    assert starts[-1] - starts[0] > 50.0  # spread over the run, not the first few seconds
    assert all(w.end_s - w.start_s <= 2.0 + 0.01 for w in kept)
