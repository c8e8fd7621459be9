"""Reading a stored time range of one robot's raw samples, to analyse it like a recording.

The service can keep the raw sample batches it monitored (``raw_batches``: one row per wire message, the
wire-format binary encoding, rolling retention of ``database.raw_retention_s`` seconds, docs/service-config.md).
:func:`read_stored_range` reads the robot's retained messages that overlap ``[start_s, end_s)`` - whole
messages, in sequence order - checks them as a recording's lines are checked (the robot's actuator count and
ranges, time order) and returns a :class:`shadow.analysis.recording.Recording` with ``layout == "store"``, so
:func:`shadow.analysis.analyse` runs over it exactly as over a file. Nothing is written to the store.

What the range lacks is said, never hidden:

* no such robot, or a robot with no raw batches at all (retention off, or everything pruned):
  :class:`NoRetainedSamplesError`, naming the robots that do have raw batches and their retained spans;
* a robot whose retained span misses the range: :class:`RangeNotRetainedError`, naming the span that is retained;
* a range that is not a range (start not before end, not finite): :class:`BadRangeError`;
* a range with holes: :attr:`Recording.gaps` lists each stretch with no retained samples - messages missing
  from the sequence numbers (never received, refused as dead letters, or pruned), and the parts of the range
  before the oldest or after the newest retained message.

A stored message that cannot be used (it does not decode, belongs to another robot, or does not follow the
previous one in time) is skipped and listed by sequence number, or raises with ``strict=True``.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import sqlalchemy as sa

from shadow.analysis.recording import CoverageGap, Recording, SkippedLine, plausibility_limits
from shadow.errors import RecordingError, RejectedMessageError
from shadow.ingest.wire import SampleBatch, decode_binary
from shadow.robots.description import RobotDescription
from shadow.store import schema
from shadow.store.repository import SqlStore, StoreUnavailableError

__all__ = [
    "BadRangeError",
    "NoRetainedSamplesError",
    "RangeNotRetainedError",
    "RetainedSpan",
    "StoredRangeError",
    "parse_time",
    "read_stored_range",
    "retained_spans",
    "gap_rows",
]


class StoredRangeError(RecordingError):
    """A stored time range cannot be analysed (the message names the store, the robot and the range)."""


class BadRangeError(StoredRangeError):
    """The asked range is not a time range: a time that does not parse, or a start not before the end."""


class NoRetainedSamplesError(StoredRangeError):
    """The store holds no raw samples of the robot at all (unknown robot, retention off, or all pruned)."""


class RangeNotRetainedError(StoredRangeError):
    """The robot has raw samples in the store, but none in the asked range."""


@dataclass(frozen=True, slots=True)
class RetainedSpan:
    """What the store retains of one robot's raw samples."""

    robot_id: str
    n_messages: int
    n_samples: int
    first_seq: int
    last_seq: int
    first_time_s: float  # oldest retained sample [s, Unix UTC]
    last_time_s: float  # newest retained sample [s, Unix UTC]

    @property
    def span_s(self) -> float:
        return self.last_time_s - self.first_time_s

    def describe(self) -> str:
        return (
            f"{self.robot_id}: {self.n_messages} messages (seq {self.first_seq}..{self.last_seq}, "
            f"{self.n_samples} samples) from {iso(self.first_time_s)} to {iso(self.last_time_s)} "
            f"(a span of {_duration(self.span_s)})"
        )


def iso(t_s: float) -> str:
    """ISO 8601 UTC with milliseconds."""
    return dt.datetime.fromtimestamp(t_s, tz=dt.UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _duration(seconds: float) -> str:
    if seconds >= 3600:
        return f"{seconds / 3600:.2f} h"
    if seconds >= 60:
        return f"{seconds / 60:.1f} min"
    return f"{seconds:.3f} s"


def parse_time(option: str, text: str) -> float:
    """An ISO 8601 time (``2027-01-15T08:00:00Z``, an offset, or none = UTC) as Unix seconds.

    Raises
    ------
    BadRangeError naming the option and the text.
    """
    try:
        moment = dt.datetime.fromisoformat(text.strip())
    except ValueError:
        raise BadRangeError(
            f"{option}: {text!r} is not an ISO 8601 time (e.g. 2027-01-15T08:00:00Z or 2027-01-15T09:00:00+01:00)"
        ) from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=dt.UTC)  # documented: a time without an offset is UTC
    return moment.timestamp()


def retained_spans(store: SqlStore) -> dict[str, RetainedSpan]:
    """Per robot, what ``raw_batches`` holds (one grouped query; payloads are not read)."""
    t = schema.raw_batches
    query = sa.select(
        t.c.robot_id,
        sa.func.count(),
        sa.func.coalesce(sa.func.sum(t.c.n_samples), 0),
        sa.func.min(t.c.seq),
        sa.func.max(t.c.seq),
        sa.func.min(t.c.first_time_s),
        sa.func.max(t.c.last_time_s),
    ).group_by(t.c.robot_id)
    try:
        with store.engine.connect() as conn:
            rows = conn.execute(query).all()
    except (sa.exc.OperationalError, sa.exc.InterfaceError) as exc:
        raise StoreUnavailableError(f"database {store_name(store)} unreadable: {exc.orig}") from exc
    return {
        str(r[0]): RetainedSpan(str(r[0]), int(r[1]), int(r[2]), int(r[3]), int(r[4]), float(r[5]), float(r[6]))
        for r in rows
    }


def store_name(store: SqlStore) -> str:
    """The store's URL with any password masked (URLs may carry one; it never goes into a message)."""
    return store.engine.url.render_as_string(hide_password=True)


def _retention_hint(configured_retention_s: float | None, *, some_kept: bool = False) -> str:
    if configured_retention_s is None:
        if some_kept:
            return (
                "the service deletes raw samples older than its database.raw_retention_s "
                "(give --config to quote the configured value)"
            )
        return (
            "raw samples are kept only when the service's database.raw_retention_s is > 0, for that many seconds "
            "(give --config to check the configured value)"
        )
    if configured_retention_s <= 0:
        return "the configuration turns raw retention off (database.raw_retention_s = 0)"
    return (
        f"the configuration keeps raw samples for database.raw_retention_s = {configured_retention_s:g} s "
        f"({_duration(configured_retention_s)})"
    )


def read_stored_range(
    store: SqlStore,
    description: RobotDescription,
    *,
    robot_id: str,
    start_s: float,
    end_s: float,
    strict: bool = False,
    configured_retention_s: float | None = None,
) -> Recording:
    """The robot's retained raw messages overlapping ``[start_s, end_s)``, as a recording (``layout == "store"``).

    Parameters
    ----------
    store : the service's store (only read)
    description : the robot the samples must fit (actuator count and ranges, as for a recording)
    robot_id : ``site/cell/robot``
    start_s, end_s : the range [s, Unix UTC]; messages that overlap it are taken whole
    strict : raise on the first unusable stored message instead of skipping it
    configured_retention_s : the service configuration's ``database.raw_retention_s`` [s], if known; only
        used to explain a missing range

    Raises
    ------
    BadRangeError, NoRetainedSamplesError, RangeNotRetainedError (each naming the store, robot and range);
    RecordingError for an unusable message with ``strict``.
    """
    name = store_name(store)
    if not (math.isfinite(start_s) and math.isfinite(end_s)) or not start_s < end_s:
        raise BadRangeError(
            f"time range: the start ({_iso_or_raw(start_s)}) must be before the end ({_iso_or_raw(end_s)})"
        )
    asked = f"{iso(start_s)} .. {iso(end_s)}"
    spans = retained_spans(store)
    span = spans.get(robot_id)
    if span is None:
        with_raw = "; ".join(s.describe() for s in spans.values()) or "none"
        known = [str(r["robot_id"]) for r in store.robots()]
        if robot_id not in known:
            raise NoRetainedSamplesError(
                f"{name}: robot {robot_id!r} is not in the store (robots there: {', '.join(known) or 'none'}); "
                f"robots with raw samples: {with_raw}"
            )
        raise NoRetainedSamplesError(
            f"{name}: robot {robot_id!r} has no raw samples in the store: {_retention_hint(configured_retention_s)}, "
            f"or all of them were pruned; robots with raw samples: {with_raw}"
        )
    rows = store.raw_batches(robot_id, start_s=start_s, end_s=end_s)
    if not rows:
        raise RangeNotRetainedError(
            f"{name}: no raw samples of {robot_id} in {asked}; retained: {span.describe()}; "
            f"{_retention_hint(configured_retention_s, some_kept=True)}"
        )
    n = description.n_actuators
    limits = plausibility_limits(description)
    skipped: list[SkippedLine] = []

    def skip(seq: int, reason: str) -> None:
        if strict:
            raise RecordingError(f"{name}: {robot_id} seq {seq}: {reason}")
        skipped.append(SkippedLine(seq, reason, "seq"))

    sender = robot_id.rsplit("/", 1)[-1]  # a controller names itself by the last part (ingest.topics.check_sender)
    senders = {sender, robot_id}
    batches: list[SampleBatch] = []
    seqs: list[int] = []
    for row in rows:
        seq = int(row["seq"])
        try:
            batch = decode_binary(bytes(row["payload"]), n_actuators=n, limits=limits)
        except RejectedMessageError as exc:
            skip(seq, f"{exc.reason} [{exc.reason_code}]")
            continue
        if batch.robot_id not in senders:
            skip(seq, f"robot: the stored message names {batch.robot_id!r}, not {sender!r}")
            continue
        if batches and not batch.t[0] > batches[-1].t[-1]:
            skip(
                seq,
                f"time: first sample {float(batch.t[0])!r} s is not after the last sample of seq {seqs[-1]} "
                f"({float(batches[-1].t[-1])!r} s); messages must follow each other in time",
            )
            continue
        batches.append(batch)
        seqs.append(seq)
    if not batches:
        head = "; ".join(str(s) for s in skipped[:3])
        raise RangeNotRetainedError(f"{name}: no usable raw sample of {robot_id} in {asked}: {head}")
    gaps = _coverage_gaps(batches, seqs, span, start_s, end_s)
    path = Path(store.engine.url.database or "store")
    source = f"{name} raw samples of {robot_id}, {asked}"
    return Recording(path, "store", robot_id, tuple(batches), tuple(seqs), tuple(skipped), (), source, tuple(gaps))


def _iso_or_raw(t_s: float) -> str:
    return iso(t_s) if math.isfinite(t_s) else repr(t_s)


def _coverage_gaps(
    batches: list[SampleBatch], seqs: list[int], span: RetainedSpan, start_s: float, end_s: float
) -> list[CoverageGap]:
    """The stretches of ``[start_s, end_s)`` the retained messages do not cover, in time order."""
    gaps: list[CoverageGap] = []
    first_t, last_t = float(batches[0].t[0]), float(batches[-1].t[-1])
    if start_s < first_t and seqs[0] == span.first_seq:
        gaps.append(
            CoverageGap(
                start_s, first_t, f"before the oldest retained message (seq {seqs[0]}): older ones were pruned "
                "by the rolling retention, or the service did not follow the robot yet"
            )
        )  # fmt: skip
    for k in range(1, len(batches)):
        if seqs[k] != seqs[k - 1] + 1:
            a, b = seqs[k - 1] + 1, seqs[k] - 1
            which = f"message {a}" if a == b else f"messages {a}..{b}"
            gaps.append(
                CoverageGap(
                    float(batches[k - 1].t[-1]), float(batches[k].t[0]),
                    f"{which} not retained (never received, refused as dead letters, or skipped here)",
                )
            )  # fmt: skip
    if end_s > last_t and seqs[-1] == span.last_seq:
        gaps.append(CoverageGap(last_t, end_s, f"after the newest retained message (seq {seqs[-1]})"))
    return gaps


def gap_rows(gaps: tuple[CoverageGap, ...]) -> list[dict[str, Any]]:
    """The gaps as plain rows (start_s, end_s, duration_s, reason), for JSON."""
    return [{"start_s": g.start_s, "end_s": g.end_s, "duration_s": g.duration_s, "reason": g.reason} for g in gaps]
