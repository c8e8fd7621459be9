"""``shadow analyze``/``report`` over a stored time range: the service's retained raw samples, analysed like a file.

The store is filled by the service's own pipeline (:class:`shadow.service.RobotPipeline`: decode, sequence
order, monitor, raw retention, one transaction per step), fed the wire messages a controller would publish;
only the broker is left out. The same messages written as a JSON-lines recording are the reference: a range
analysis must find exactly the events the file analysis finds.
"""

from __future__ import annotations

import json
import queue
from pathlib import Path

import pytest
import sqlalchemy as sa

from shadow.analysis.stored import (
    BadRangeError,
    NoRetainedSamplesError,
    RangeNotRetainedError,
    parse_time,
)
from shadow.cli.analyze import iso
from shadow.errors import ConfigurationError
from shadow.ingest.mqtt import ReceivedMessage
from shadow.ingest.topics import RobotAddress, TopicLayout
from shadow.ingest.wire import PlausibilityLimits, SampleBatch, encode_binary, encode_json
from shadow.monitoring import RobotMonitor, default_settings
from shadow.robots.description import RobotDescription, load_description
from shadow.service import RobotPipeline
from shadow.store.repository import SqlStore
from tests.analysis.test_analyze_cli import (  # noqa: F401  (sim_recording is a fixture)
    START_TOLERANCE_S,
    delta_description,
    shadow_cli,
    sim_recording,
)
from tests.servers import PostgresServer
from tests.synthetic import EXAMPLE_DELTA, delta_stream

SITE, CELL = "kestrel", "line4"
RATE = "1000"  # the stream's rate, given to every analysis so the monitors are built alike


def fill_store(
    url: str,
    description: RobotDescription,
    robot: str,
    batches: list[SampleBatch],
    *,
    lost: frozenset[int] = frozenset(),
    keep_raw: bool = True,
) -> str:
    """Run ``batches`` (minus the seqs in ``lost``, which never arrive) through the service pipeline; the robot id."""
    address = RobotAddress(SITE, CELL, robot)
    store = SqlStore(url)
    store.register_robot(str(address), family=description.family, n_actuators=description.n_actuators)
    layout = TopicLayout()
    inbox: queue.Queue[ReceivedMessage] = queue.Queue()
    acknowledged: list[ReceivedMessage] = []
    settings = default_settings(description, sample_rate_hz=float(RATE))
    pipeline = RobotPipeline(
        address,
        RobotMonitor(str(address), description, None, settings),
        store,
        inbox=inbox,
        acknowledge=acknowledged.append,
        layout=layout,
        n_actuators=description.n_actuators,
        limits=PlausibilityLimits.for_parameters(description.parameters),
        keep_raw=keep_raw,
    )
    sent = [b for b in batches if b.seq not in lost]
    for k, batch in enumerate(sent):
        inbox.put(ReceivedMessage(layout.samples_topic(address), encode_binary(batch), k + 1, 1, False, batch.t[0]))
    while pipeline.step():
        pass
    assert len(acknowledged) == len(sent)  # every message went through the whole step
    store.close()
    return str(address)


def write_recording(path: Path, batches: list[SampleBatch]) -> Path:
    path.write_bytes(b"".join(encode_json(b) + b"\n" for b in batches))
    return path


def events_of(argv: list[str], out: Path) -> dict:
    assert shadow_cli([*argv, "--sample-rate-hz", RATE, "--events-json", str(out)]) == 0
    return json.loads(out.read_text())


def same_events(a: list[dict], b: list[dict]) -> None:
    """Same kinds, times and sizes, to the last bit (the same float64 samples went in)."""
    assert [(e["kind"], e["start_s"], e["end_s"], e["severity"]) for e in a] == [
        (e["kind"], e["start_s"], e["end_s"], e["severity"]) for e in b
    ]
    assert [e["figures"].get("platform_force_n") for e in a] == [e["figures"].get("platform_force_n") for e in b]


@pytest.fixture
def synthetic(tmp_path: Path, rng):  # type: ignore[no-untyped-def]
    """A 6 s synthetic delta stream with one impact at 3.3 s, in a store and as a recording file."""
    stream = delta_stream(rng, duration_s=6.0, impact_at_s=3.3)
    batches = stream.batches("picker-9", 10, first_seq=1)
    url = f"sqlite:///{tmp_path / 'store' / 'shadow.db'}"
    robot_id = fill_store(url, stream.description, "picker-9", batches)
    return url, robot_id, batches, write_recording(tmp_path / "run.jsonl", batches)


def test_stored_range_finds_the_events_of_the_recording(synthetic, tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    url, robot_id, batches, recording = synthetic
    t0, t1 = float(batches[0].t[0]), float(batches[-1].t[-1])
    from_file = events_of(["analyze", EXAMPLE_DELTA, str(recording)], tmp_path / "file.json")
    capsys.readouterr()
    rng_args = ["--from", iso(t0 - 60), "--to", iso(t1 + 60)]
    stored = events_of(["analyze", EXAMPLE_DELTA, "--database", url, "--robot", robot_id, *rng_args],
                       tmp_path / "stored.json")  # fmt: skip
    printed = capsys.readouterr().out
    assert len(from_file["events"]) == 1 and from_file["events"][0]["kind"] == "collision"
    # the half-sine pulse of tests/synthetic.py starts at 3.3 s (its definition)
    assert abs(stored["events"][0]["start_s"] - (t0 + 3.3)) <= START_TOLERANCE_S
    same_events(stored["events"], from_file["events"])
    assert stored["samples"] == from_file["samples"] == sum(b.n_samples for b in batches)
    assert stored["source_layout"] == "store" and robot_id in stored["recording"]
    # the range reaches a minute past either end of what is retained: both ends are named, nothing inside
    (before, after) = stored["not_retained"]
    assert before["start_s"] == pytest.approx(t0 - 60, abs=1e-3) and before["end_s"] == t0
    assert "oldest retained message (seq 1)" in before["reason"]
    assert after["start_s"] == t1 and "newest retained message" in after["reason"]
    assert f"source: {url}" in printed and "not retained in the range: 2 stretches" in printed
    # the service's own monitor saw the same stream: it stored the same event
    store = SqlStore(url, migrate_schema=False)
    (live,) = store.events(robot_id=robot_id)
    store.close()
    assert live["start_s"] == stored["events"][0]["start_s"]
    assert live["figures"]["platform_force_n"] == pytest.approx(stored["events"][0]["figures"]["platform_force_n"],
                                                                rel=1e-12, abs=1e-9)  # fmt: skip


def test_part_of_the_range_equals_the_same_part_of_the_file(synthetic, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    url, robot_id, batches, _ = synthetic
    start, end = float(batches[0].t[0]) + 1.0, float(batches[0].t[0]) + 5.0
    part = [b for b in batches if b.t[-1] >= start and b.t[0] < end]  # whole messages overlapping [start, end)
    recording = write_recording(tmp_path / "part.jsonl", part)
    from_file = events_of(["analyze", EXAMPLE_DELTA, str(recording)], tmp_path / "file.json")
    stored = events_of(
        ["analyze", EXAMPLE_DELTA, "--database", url, "--robot", robot_id, "--from", iso(start), "--to", iso(end)],
        tmp_path / "stored.json",
    )
    assert (
        stored["samples"] == from_file["samples"] == sum(b.n_samples for b in part) < sum(b.n_samples for b in batches)
    )
    assert len(stored["events"]) == 1
    same_events(stored["events"], from_file["events"])
    assert stored["not_retained"] == []  # retained before and after the range: no gap to report


def test_messages_missing_from_the_store_are_reported_as_gaps(tmp_path: Path, rng, capsys) -> None:  # type: ignore[no-untyped-def]
    stream = delta_stream(rng, duration_s=4.0)
    batches = stream.batches("picker-9", 10, first_seq=1)
    lost = frozenset(range(150, 156))  # six messages never reach the service
    url = f"sqlite:///{tmp_path / 'shadow.db'}"
    robot_id = fill_store(url, stream.description, "picker-9", batches, lost=lost)
    t0, t1 = float(batches[0].t[0]), float(batches[-1].t[-1])
    doc = events_of(
        ["analyze", EXAMPLE_DELTA, "--database", url, "--robot", robot_id, "--from", iso(t0), "--to", iso(t1)],
        tmp_path / "e.json",
    )
    (gap,) = doc["not_retained"]
    by_seq = {b.seq: b for b in batches}
    assert gap["start_s"] == float(by_seq[149].t[-1]) and gap["end_s"] == float(by_seq[156].t[0])
    assert "messages 150..155 not retained" in gap["reason"]
    assert doc["samples"] == sum(b.n_samples for b in batches if b.seq not in lost)
    assert "not retained in the range: 1 stretches" in capsys.readouterr().out


def test_report_of_a_stored_range(synthetic, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    url, robot_id, batches, recording = synthetic
    t0, t1 = float(batches[0].t[0]), float(batches[-1].t[-1])
    out = tmp_path / "stored.html"
    argv = ["report", EXAMPLE_DELTA, "--database", url, "--robot", robot_id, "--from", iso(t0), "--to", iso(t1)]
    assert shadow_cli([*argv, "--sample-rate-hz", RATE, "-o", str(out)]) == 0
    from_file = tmp_path / "file.html"
    assert shadow_cli(["report", EXAMPLE_DELTA, str(recording), "--sample-rate-hz", RATE, "-o", str(from_file)]) == 0
    page, reference = out.read_text(), from_file.read_text()
    assert "<th>stored range</th>" in page and robot_id in page
    assert "The store retains every message of the asked range." in page
    heading = "Event 1: collision at "
    assert page.count(heading) == reference.count(heading) == 1
    start = page.index(heading)
    assert page[start : start + 60] == reference[reference.index(heading) :][:60]


@pytest.mark.slow
def test_simulator_run_through_the_service_matches_its_recording(
    sim_recording: tuple[Path, list[float]],  # noqa: F811
    tmp_path: Path,
) -> None:
    from shadow.analysis.recording import read_recording

    path, impacts = sim_recording
    description = load_description(delta_description())
    batches = list(read_recording(path, description).batches)
    url = f"sqlite:///{tmp_path / 'shadow.db'}"
    robot_id = fill_store(url, description, batches[0].robot_id, batches)
    t0, t1 = float(batches[0].t[0]), float(batches[-1].t[-1])
    description_path = str(delta_description())
    from_file = events_of(["analyze", description_path, str(path)], tmp_path / "file.json")
    stored = events_of(
        ["analyze", description_path, "--database", url, "--robot", robot_id, "--from", iso(t0), "--to", iso(t1)],
        tmp_path / "stored.json",
    )
    assert len(stored["events"]) == len(impacts) >= 3  # the simulator's ground truth: one event per impact
    same_events(stored["events"], from_file["events"])


@pytest.mark.postgres
def test_stored_range_on_postgresql(postgres_server: PostgresServer, tmp_path: Path, rng) -> None:  # type: ignore[no-untyped-def]
    name = "analysis_stored_range"
    admin = sa.create_engine(postgres_server.url(), isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(sa.text(f"DROP DATABASE IF EXISTS {name}"))
        conn.execute(sa.text(f"CREATE DATABASE {name}"))
    admin.dispose()
    stream = delta_stream(rng, duration_s=5.0, impact_at_s=2.6)
    batches = stream.batches("picker-9", 10, first_seq=1)
    url = postgres_server.url(name)
    robot_id = fill_store(url, stream.description, "picker-9", batches, lost=frozenset({77}))
    t0, t1 = float(batches[0].t[0]), float(batches[-1].t[-1])
    file_batches = [b for b in batches if b.seq != 77]
    from_file = events_of(["analyze", EXAMPLE_DELTA, str(write_recording(tmp_path / "r.jsonl", file_batches))],
                          tmp_path / "file.json")  # fmt: skip
    stored = events_of(
        ["analyze", EXAMPLE_DELTA, "--database", url, "--robot", robot_id, "--from", iso(t0), "--to", iso(t1)],
        tmp_path / "stored.json",
    )
    assert len(stored["events"]) == 1
    same_events(stored["events"], from_file["events"])
    assert [g["reason"].split(" not retained")[0] for g in stored["not_retained"]] == ["message 77"]


# ---------------------------------------------------------------------------------------------- errors


def analyze_range(url: str, robot: str, start: str, end: str, *extra: str) -> int:
    return shadow_cli(["analyze", EXAMPLE_DELTA, "--database", url, "--robot", robot, "--from", start, "--to", end,
                       *extra])  # fmt: skip


def test_unknown_robot_names_the_robots_there(synthetic) -> None:  # type: ignore[no-untyped-def]
    url, robot_id, batches, _ = synthetic
    t0 = float(batches[0].t[0])
    with pytest.raises(NoRetainedSamplesError, match=r"robot 'kestrel/line4/nobody' is not in the store \(robots "
                       r"there: kestrel/line4/picker-9\); robots with raw samples: kestrel/line4/picker-9: 600 "
                       r"messages \(seq 1\.\.600"):  # fmt: skip
        analyze_range(url, "kestrel/line4/nobody", iso(t0), iso(t0 + 1))


def test_robot_without_raw_retention_says_so(tmp_path: Path, rng) -> None:  # type: ignore[no-untyped-def]
    stream = delta_stream(rng, duration_s=1.5)
    batches = stream.batches("picker-9", 10, first_seq=1)
    db = tmp_path / "shadow.db"
    robot_id = fill_store(f"sqlite:///{db}", stream.description, "picker-9", batches, keep_raw=False)
    t0 = float(batches[0].t[0])
    with pytest.raises(NoRetainedSamplesError, match=r"'kestrel/line4/picker-9' has no raw samples in the store: "
                       r"raw samples are kept only when .*database\.raw_retention_s is > 0.*robots with raw samples: "
                       r"none"):  # fmt: skip
        analyze_range(f"sqlite:///{db}", robot_id, iso(t0), iso(t0 + 1))
    config = tmp_path / "service.toml"
    config.write_text(f'[database]\nurl = "sqlite:///{db}"\nraw_retention_s = 0\n')
    with pytest.raises(NoRetainedSamplesError, match=r"the configuration turns raw retention off "
                       r"\(database\.raw_retention_s = 0\)"):  # fmt: skip
        shadow_cli(["analyze", EXAMPLE_DELTA, "--config", str(config), "--robot", robot_id, "--from", iso(t0),
                    "--to", iso(t0 + 1)])  # fmt: skip


def test_range_outside_the_retained_span_names_the_span(synthetic, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    url, robot_id, batches, _ = synthetic
    t0, t1 = float(batches[0].t[0]), float(batches[-1].t[-1])
    with pytest.raises(RangeNotRetainedError, match=rf"no raw samples of {robot_id} in .*; retained: {robot_id}: "
                       rf"600 messages \(seq 1\.\.600, 6000 samples\) from {iso(t0)} to {iso(t1)}"):  # fmt: skip
        analyze_range(url, robot_id, iso(t0 - 3600), iso(t0 - 1800))
    config = tmp_path / "service.toml"
    config.write_text(f'[database]\nurl = "{url}"\nraw_retention_s = 900\n')
    with pytest.raises(RangeNotRetainedError, match=r"keeps raw samples for database\.raw_retention_s = 900 s"):
        shadow_cli(["analyze", EXAMPLE_DELTA, "--config", str(config), "--robot", robot_id, "--from",
                    iso(t1 + 10), "--to", iso(t1 + 20)])  # fmt: skip


def test_bad_ranges_and_options_are_named(synthetic, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    url, robot_id, batches, recording = synthetic
    t0 = float(batches[0].t[0])
    with pytest.raises(BadRangeError, match=r"time range: the start \(.*\) must be before the end"):
        analyze_range(url, robot_id, iso(t0 + 2), iso(t0 + 1))
    with pytest.raises(BadRangeError, match=r"--to: 'yesterday' is not an ISO 8601 time"):
        analyze_range(url, robot_id, iso(t0), "yesterday")
    with pytest.raises(ConfigurationError, match=r"a stored range needs --robot, --to"):
        shadow_cli(["analyze", EXAMPLE_DELTA, "--database", url, "--from", iso(t0)])
    with pytest.raises(ConfigurationError, match=r"either a RECORDING file or a stored range"):
        shadow_cli(["analyze", EXAMPLE_DELTA, str(recording), "--database", url])
    with pytest.raises(ConfigurationError, match=r"nothing to analyse"):
        shadow_cli(["analyze", EXAMPLE_DELTA])
    missing = tmp_path / "elsewhere" / "none.db"
    with pytest.raises(ConfigurationError, match=rf"--database: no SQLite database at {missing}"):
        analyze_range(f"sqlite:///{missing}", robot_id, iso(t0), iso(t0 + 1))
    assert not missing.parent.exists()  # looking did not create it


def test_times_parse_as_iso_8601_utc_unless_an_offset_is_given() -> None:
    # 2027-01-15T08:00:00Z is 1 800 000 000 s after the Unix epoch (1800000000 = 20833 days + 8 h)
    assert parse_time("--from", "2027-01-15T08:00:00Z") == 1_800_000_000.0
    assert parse_time("--from", "2027-01-15T08:00:00") == 1_800_000_000.0
    assert parse_time("--from", "2027-01-15T09:00:00.250+01:00") == 1_800_000_000.25


def test_password_in_the_url_never_reaches_a_message(synthetic) -> None:  # type: ignore[no-untyped-def]
    from shadow.analysis.stored import store_name

    url, *_ = synthetic
    store = SqlStore(url, migrate_schema=False)
    store.engine.url = store.engine.url.set(password="s3cret-pw", username="shadow")
    try:
        assert "s3cret-pw" not in store_name(store) and "***" in store_name(store)
    finally:
        store.close()
