"""Reading recordings for analysis: JSON lines and CSV, and the lines that cannot be used."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from shadow.analysis.recording import CSV_BATCH_SAMPLES, RecordingError, read_recording
from shadow.ingest.wire import SampleBatch, encode_json
from shadow.robots.parameters import MeasuredQuantity
from tests.synthetic import SyntheticStream, delta_stream

ROBOT = "cell7-picker"


@pytest.fixture
def stream(rng: np.random.Generator) -> SyntheticStream:
    return delta_stream(rng, duration_s=0.5)


def write_jsonl(path: Path, batches: list[SampleBatch]) -> Path:
    path.write_bytes(b"".join(encode_json(b) + b"\n" for b in batches))
    return path


def csv_text(stream: SyntheticStream, rows: slice = slice(None), *, header: str | None = None) -> str:
    n = stream.q.shape[1]
    head = header or ",".join(
        ["time_s", *(f"q{i}" for i in range(1, n + 1)), *(f"effort{i}" for i in range(1, n + 1)), "gripping"]
    )
    lines = [head]
    for k in range(stream.t.shape[0])[rows]:
        values = [repr(float(stream.t[k])), *map(repr, stream.q[k].tolist()), *map(repr, stream.effort[k].tolist())]
        lines.append(",".join([*values, "1" if stream.gripping[k] else "0"]))
    return "\n".join(lines) + "\n"


def test_json_lines_give_back_every_sample(tmp_path: Path, stream: SyntheticStream) -> None:
    path = write_jsonl(tmp_path / "run.jsonl", stream.batches(ROBOT, 10))
    rec = read_recording(path, stream.description)
    assert rec.robot_id == ROBOT and rec.layout == "jsonl" and rec.skipped == ()
    # reference: the standard library's own JSON parser on each line
    docs = [json.loads(line) for line in path.read_text().splitlines()]
    assert_array_equal(np.concatenate([b.t for b in rec.batches]), np.concatenate([d["time"] for d in docs]))
    assert_array_equal(np.concatenate([b.q for b in rec.batches]), np.concatenate([d["position"] for d in docs]))
    assert rec.first_lines == tuple(range(1, len(docs) + 1))
    assert rec.n_samples == stream.t.shape[0]


def test_csv_reads_the_same_samples_as_json_lines(tmp_path: Path, stream: SyntheticStream) -> None:
    csv_path = tmp_path / "run.csv"
    csv_path.write_text(csv_text(stream))
    rec = read_recording(csv_path, stream.description, robot_id=ROBOT)
    assert rec.layout == "csv" and rec.skipped == ()
    assert all(b.n_samples <= CSV_BATCH_SAMPLES for b in rec.batches)
    assert_array_equal(np.concatenate([b.t for b in rec.batches]), stream.t)
    assert_array_equal(np.concatenate([b.q for b in rec.batches]), stream.q)
    assert_array_equal(np.concatenate([b.measured for b in rec.batches]), stream.effort)
    assert_array_equal(np.concatenate([b.gripping for b in rec.batches]), stream.gripping)
    assert rec.first_lines[:2] == (2, 2 + CSV_BATCH_SAMPLES)  # line 1 is the header


def test_csv_with_currents_and_temperatures(tmp_path: Path, stream: SyntheticStream) -> None:
    n = stream.q.shape[1]
    header = ",".join(
        [
            "temperature1_k",
            "temperature2_k",
            "temperature3_k",
            "time_s",
            "q1",
            "q2",
            "q3",
            "current1",
            "current2",
            "current3",
        ]  # fmt: skip
    )
    lines = [header]
    for k in range(20):
        lines.append(",".join(["300", "301", "302", repr(float(stream.t[k])), *map(repr, stream.q[k].tolist()),
                               *["0.5"] * n]))  # fmt: skip
    path = tmp_path / "currents.csv"
    path.write_text("\n".join(lines) + "\n")
    rec = read_recording(path, stream.description)
    assert all(b.effort_kind is MeasuredQuantity.MOTOR_CURRENT for b in rec.batches)
    assert_allclose(rec.batches[0].temperature_k[0], [300.0, 301.0, 302.0], rtol=0, atol=0)
    assert_allclose(rec.batches[0].current, 0.5, rtol=0, atol=0)
    assert rec.batches[0].gripping is None


def test_truncated_last_line_is_skipped_and_named(tmp_path: Path, stream: SyntheticStream) -> None:
    batches = stream.batches(ROBOT, 10)
    text = b"".join(encode_json(b) + b"\n" for b in batches)
    path = tmp_path / "cut.jsonl"
    path.write_bytes(text[: len(text) - 40])  # the writer was stopped in the middle of the last line
    rec = read_recording(path, stream.description)
    assert len(rec.batches) == len(batches) - 1
    (skip,) = rec.skipped
    assert skip.line == len(batches)
    assert "truncated" in skip.reason
    with pytest.raises(RecordingError, match=rf"line {len(batches)}: .*truncated"):
        read_recording(path, stream.description, strict=True)


def test_other_robots_are_skipped_with_their_lines(tmp_path: Path, stream: SyntheticStream) -> None:
    ours = stream.batches(ROBOT, 10)
    theirs = stream.batches("cell7-sorter", 10)
    mixed = [b for pair in zip(ours, theirs, strict=True) for b in pair]
    path = write_jsonl(tmp_path / "mixed.jsonl", mixed)
    with pytest.raises(RecordingError, match=r"robot: the file holds several robots .*--robot"):
        read_recording(path, stream.description)
    rec = read_recording(path, stream.description, robot_id=ROBOT)
    assert len(rec.batches) == len(ours) and rec.other_robots == ("cell7-sorter",)
    assert [s.line for s in rec.skipped] == list(range(2, 2 * len(ours) + 1, 2))
    assert "robot: 'cell7-sorter' is not the analysed robot 'cell7-picker'" in rec.skipped[0].reason
    with pytest.raises(RecordingError, match=r"line 2: robot: 'cell7-sorter'"):
        read_recording(path, stream.description, robot_id=ROBOT, strict=True)
    with pytest.raises(RecordingError, match=r"robot: no message of 'nobody'"):
        read_recording(path, stream.description, robot_id="nobody")


def test_lines_out_of_time_order_are_skipped(tmp_path: Path, stream: SyntheticStream) -> None:
    batches = stream.batches(ROBOT, 10)
    order = [0, 1, 3, 2, *range(4, len(batches))]  # line 4 holds samples from before line 3's
    path = write_jsonl(tmp_path / "swapped.jsonl", [batches[i] for i in order])
    rec = read_recording(path, stream.description)
    (skip,) = rec.skipped
    assert skip.line == 4 and skip.reason.startswith("time: first sample") and "line 3" in skip.reason
    t = np.concatenate([b.t for b in rec.batches])
    assert (np.diff(t) > 0).all()
    with pytest.raises(RecordingError, match=r"line 4: time: first sample .* not after the last sample of line 3"):
        read_recording(path, stream.description, strict=True)


def test_csv_rows_out_of_order_and_bad_numbers(tmp_path: Path, stream: SyntheticStream) -> None:
    lines = csv_text(stream, slice(0, 40)).splitlines()
    lines[5] = lines[5].replace(lines[5].split(",")[2], "abc", 1)  # q2 of line 6 is not a number
    lines[10], lines[11] = lines[11], lines[10]  # line 12 goes back in time
    lines[20] = lines[20] + ",7"  # one field too many on line 21
    path = tmp_path / "bad.csv"
    path.write_text("\n".join(lines) + "\n")
    rec = read_recording(path, stream.description)
    reasons = {s.line: s.reason for s in rec.skipped}
    assert reasons[6] == "q2: 'abc' is not a number"
    assert reasons[12].startswith("time_s:") and "line 11" in reasons[12]
    assert reasons[21].startswith("9 fields, the header has 8")
    assert rec.n_samples == 40 - 3
    with pytest.raises(RecordingError, match=r"line 6: q2: 'abc' is not a number"):
        read_recording(path, stream.description, strict=True)


def test_csv_value_out_of_range_names_line_and_column(tmp_path: Path, stream: SyntheticStream) -> None:
    lines = csv_text(stream, slice(0, 30)).splitlines()
    cells = lines[13].split(",")
    cells[5] = "1e6"  # effort2 far beyond 3 x rated
    lines[13] = ",".join(cells)
    path = tmp_path / "range.csv"
    path.write_text("\n".join(lines) + "\n")
    rec = read_recording(path, stream.description)
    (skip,) = rec.skipped
    assert skip.line == 14 and skip.reason.startswith("effort2: 1000000.0 N.m")
    assert rec.n_samples == 29


@pytest.mark.parametrize(
    ("header", "message"),
    [
        ("time_s,q1,q2,q3,torque1,torque2,torque3", r"line 1: column 'torque1' is not part of the layout"),
        ("time_s,q1,q2,effort1,effort2,effort3", r"line 1: column 'q3' missing; this robot has 3 actuators"),
        ("t,q1,q2,q3,effort1,effort2,effort3", r"line 1: column 't' is not part of the layout"),
        ("q1,q2,q3,effort1,effort2,effort3", r"line 1: column 'time_s' missing"),
        ("time_s,q1,q2,q3", r"line 1: columns effort1 .. effort3 or current1 .. current3: .* found neither"),
        ("time_s,q1,q2,q3,q1,effort1,effort2,effort3", r"line 1: column 'q1' appears twice"),
    ],
)
def test_csv_header_that_does_not_fit_is_an_error(
    tmp_path: Path, stream: SyntheticStream, header: str, message: str
) -> None:
    path = tmp_path / "header.csv"
    path.write_text(header + "\n1800000000.0,0,0,0,0,0,0\n")
    with pytest.raises(RecordingError, match=message):
        read_recording(path, stream.description)


def test_nothing_usable_is_an_error(tmp_path: Path, stream: SyntheticStream) -> None:
    empty = tmp_path / "empty.jsonl"
    empty.write_bytes(b"")
    with pytest.raises(RecordingError, match="no samples"):
        read_recording(empty, stream.description)
    junk = tmp_path / "junk.jsonl"
    junk.write_bytes(b"{not json\n[1, 2]\n")
    with pytest.raises(RecordingError, match=r"no usable line: line 1: .*; line 2: "):
        read_recording(junk, stream.description)
    with pytest.raises(RecordingError, match="cannot read the recording"):
        read_recording(tmp_path / "missing.jsonl", stream.description)
