"""``shadow analyze``: the live monitor over a recording, checked against the simulator's ground truth."""

from __future__ import annotations

import argparse
import base64
import io
import json
import subprocess
import sys
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from shadow.analysis import analyse
from shadow.analysis.recording import Recording, RecordingError, read_recording
from shadow.cli import analyze, report
from shadow.ingest.wire import decode_binary, encode_json
from shadow.monitoring import RobotMonitor, default_settings
from shadow.robots.description import example_paths, load_description
from shadow.store.repository import StepResults
from tests.synthetic import EXAMPLE_DELTA, delta_stream

ROBOT = "sim-1"
SIM_START_S = 1_780_000_000.0
SIM_DURATION_S = 20.0
SIM_SEED = 2  # this seed puts four impacts into the first 20 s
START_TOLERANCE_S = 0.020  # an event must start within 20 ms of the impact


def shadow_cli(argv: Sequence[str]) -> int:
    """The two analysis commands under a ``shadow``-like parser."""
    parser = argparse.ArgumentParser(prog="shadow")
    commands = parser.add_subparsers(dest="command", required=True)
    analyze.register(commands)
    report.register(commands)
    args = parser.parse_args(list(argv))
    return int(args.handler(args))


def delta_description() -> Path:
    return next(p for p in example_paths() if "delta" in p.name)


@pytest.fixture(scope="module")
def sim_recording(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list[float]]:
    """A 20 s delta run written by the simulator, and the start times of its impacts (ground truth)."""
    out = tmp_path_factory.getbasetemp() / "analysis-sim" / "run.jsonl"  # shared by the modules of one session
    truth_path = Path(str(out) + ".truth.json")
    if not truth_path.exists():
        out.parent.mkdir(exist_ok=True)
        subprocess.run(
            [sys.executable, "-m", "simulators", "record", "--family", "delta", "--duration", str(SIM_DURATION_S),
             "--seed", str(SIM_SEED), "--start", str(SIM_START_S), "--out", str(out)],
            check=True, capture_output=True, timeout=300,
        )  # fmt: skip
    truth = json.loads(truth_path.read_text())
    impacts = [w["impact_start_s"] for w in truth["windows"] if w["impact_start_s"] is not None]
    return out, [t for t in impacts if t < SIM_START_S + SIM_DURATION_S - 0.1]


@pytest.mark.slow
def test_finds_every_impact_of_the_simulator(
    sim_recording: tuple[Path, list[float]], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path, impacts = sim_recording
    assert len(impacts) >= 3  # the run must hold something to find
    events_json = tmp_path / "events.json"
    assert shadow_cli(["analyze", str(delta_description()), str(path), "--events-json", str(events_json)]) == 0
    doc = json.loads(events_json.read_text())
    starts = np.array([e["start_s"] for e in doc["events"]])
    # ground truth: the simulator's own record of when each impact began
    for t_impact in impacts:
        assert np.min(np.abs(starts - t_impact)) <= START_TOLERANCE_S, f"impact at {t_impact} not found"
    assert len(starts) == len(impacts)  # and nothing else
    printed = capsys.readouterr().out
    assert f"events: {len(impacts)}" in printed
    assert "estimates at the end" in printed and "work_piece_mass" in printed


@pytest.mark.slow
def test_analysis_equals_the_live_monitor_on_the_simulator_run(sim_recording: tuple[Path, list[float]]) -> None:
    path, _ = sim_recording
    description = load_description(delta_description())
    rec = read_recording(path, description)
    offline = analyse(rec, RobotMonitor(ROBOT, description, None, default_settings(description)))
    live = RobotMonitor(ROBOT, description, None, default_settings(description))
    rows = StepResults(ROBOT)
    for batch in rec.batches:  # what the service does with each 10 ms message
        rows.extend(live.process(batch))
    assert [e["start_s"] for e in offline.events] == [e["start_s"] for e in rows.events]
    assert_allclose(
        [e["figures"]["platform_force_n"] for e in offline.events],
        [e["figures"]["platform_force_n"] for e in rows.events],
        rtol=1e-12,
        atol=1e-9,
    )


def synthetic_recording(rng: np.random.Generator, **kwargs: float) -> tuple[Recording, RobotMonitor]:
    stream = delta_stream(rng, **kwargs)
    batches = stream.batches(ROBOT, 10)
    rec = Recording(Path("synthetic.jsonl"), "jsonl", ROBOT, tuple(batches), tuple(range(1, len(batches) + 1)))
    return rec, RobotMonitor(ROBOT, stream.description, None, default_settings(stream.description))


@pytest.mark.parametrize("block_messages", [1, 3, 50])
def test_blocks_give_the_same_events_as_message_by_message(rng: np.random.Generator, block_messages: int) -> None:
    rec, monitor = synthetic_recording(rng, duration_s=6.0, impact_at_s=3.3)
    offline = analyse(rec, monitor, block_messages=block_messages)
    _, live = synthetic_recording(np.random.default_rng(0), duration_s=1.0)
    rows = StepResults(ROBOT)
    for batch in rec.batches:
        rows.extend(live.process(batch))
    assert len(offline.events) == 1 == len(rows.events)
    # the half-sine pulse of tests/synthetic.py starts at 3.3 s (its definition)
    assert abs(offline.events[0]["start_s"] - (rec.start_s + 3.3)) <= START_TOLERANCE_S
    assert offline.events[0]["start_s"] == rows.events[0]["start_s"]
    assert_allclose(offline.events[0]["figures"]["platform_force_n"], rows.events[0]["figures"]["platform_force_n"],
                    rtol=1e-12, atol=1e-9)  # fmt: skip


def test_event_near_the_end_is_released_with_its_evidence(rng: np.random.Generator) -> None:
    # the 1 s output ending near 4 s holds the impact; its 1 s evidence window reaches past the end at 4.2 s
    rec, monitor = synthetic_recording(rng, duration_s=4.2, impact_at_s=3.3)
    result = analyse(rec, monitor)
    (event,) = result.events
    evidence = decode_binary(event["evidence"])
    assert evidence.t[0] <= event["start_s"] <= evidence.t[-1] == rec.end_s


def test_events_json_and_summary(tmp_path: Path, rng: np.random.Generator, capsys: pytest.CaptureFixture[str]) -> None:
    stream = delta_stream(rng, duration_s=5.0, impact_at_s=2.5)
    path = tmp_path / "run.jsonl"
    path.write_bytes(b"".join(encode_json(b) + b"\n" for b in stream.batches(ROBOT, 10)))
    out = tmp_path / "out" / "events.json"
    assert shadow_cli(["analyze", EXAMPLE_DELTA, str(path), "--robot", ROBOT, "--events-json", str(out)]) == 0
    doc = json.loads(out.read_text())
    (event,) = doc["events"]
    assert doc["robot"] == ROBOT and doc["samples"] == stream.t.shape[0] and doc["skipped_lines"] == []
    assert event["kind"] == "collision" and event["start_utc"].endswith("Z")
    batch = decode_binary(base64.b64decode(event["evidence_wire_binary_base64"]))
    assert batch.t[0] <= event["start_s"] <= batch.t[-1]
    # the applied pulse pushes along +x: the estimated platform force must point that way (tests/synthetic.py)
    force = np.array(event["figures"]["platform_force_n"])
    assert force[0] > 0.9 * np.linalg.norm(force)
    printed = capsys.readouterr().out
    assert "events: 1" in printed and "collision" in printed and "advisory only" in printed


def test_bad_lines_are_listed_and_strict_stops(
    tmp_path: Path, rng: np.random.Generator, capsys: pytest.CaptureFixture[str]
) -> None:
    stream = delta_stream(rng, duration_s=1.5)
    lines = [encode_json(b) for b in stream.batches(ROBOT, 10)]
    lines[7] = lines[7][:50]  # a damaged line in the middle
    path = tmp_path / "run.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    assert shadow_cli(["analyze", EXAMPLE_DELTA, str(path)]) == 0
    captured = capsys.readouterr()
    assert "skipped" in captured.err and "line 8:" in captured.err
    assert "skipped lines: 1" in captured.out
    with pytest.raises(RecordingError, match=r"line 8: "):
        shadow_cli(["analyze", EXAMPLE_DELTA, str(path), "--strict"])


def test_progress_bar_is_throttled_and_finishes() -> None:
    stream = io.StringIO()
    bar = analyze.ProgressBar(stream, period_s=3600.0)
    for done in range(0, 1001, 10):
        bar(done, 1000, 0.5 + done / 1000)
    assert bar.drawn == 2  # the first call and the last one
    assert stream.getvalue().endswith("100 %  1000/1000 samples  667 samples/s  0:00 left\n")
    line = analyze.progress_line(250, 1000, 2.0)
    assert line.startswith("[" + "#" * 8 + "." * 22 + "]") and "125 samples/s" in line and "0:06 left" in line


def test_progress_only_when_asked_off_a_terminal(
    tmp_path: Path, rng: np.random.Generator, capsys: pytest.CaptureFixture[str]
) -> None:
    stream = delta_stream(rng, duration_s=1.2)
    path = tmp_path / "run.jsonl"
    path.write_bytes(b"".join(encode_json(b) + b"\n" for b in stream.batches(ROBOT, 10)))
    shadow_cli(["analyze", EXAMPLE_DELTA, str(path)])
    assert "samples/s  " not in capsys.readouterr().err  # captured stderr is not a terminal
    shadow_cli(["analyze", EXAMPLE_DELTA, str(path), "--progress"])
    assert "] 100 %" in capsys.readouterr().err
