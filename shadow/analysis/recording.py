"""Reading a recorded run for offline analysis: JSON lines of wire messages, or CSV, streamed in blocks.

Two layouts are read (docs/analysis.md):

- **JSON lines** (``.jsonl``, ``.json``, anything not ending in ``.csv``): one wire-format message per line
  (docs/wire-format.md), exactly what a controller publishes and ``python -m simulators record`` writes.
- **CSV** (``.csv``): a header line, then one sample per line. Columns, by name, in any order:
  ``time_s`` (Unix seconds, UTC), ``q1 .. qn`` (actuator positions [rad | m]), either ``effort1 .. effortn``
  (joint-side efforts [N m | N]) or ``current1 .. currentn`` (motor currents [A]), optionally ``gripping``
  (0/1, true/false) and ``temperature1_k .. temperaturen_k`` [K]. The robot id is the ``--robot`` given or
  the description's name.

:class:`RecordingReader` reads the file once, front to back, and yields blocks of decoded, checked batches
(about ``block_samples`` samples each), so memory does not grow with the recording's length;
:func:`read_recording` collects every block into a whole :class:`Recording` for the callers that need one.

Reading is lenient by default: a line that cannot be used (cut off, not a valid message, another robot, a
time that does not follow the previous line, a number that is not a number, a value outside the robot's
range) is skipped and counted with the field at fault; the first ``max_listed_skips`` such lines are kept with
their line numbers, beyond that only the count per reason. ``strict=True`` turns the first such line into a
:class:`RecordingError`. A file with nothing usable, a CSV header that does not fit the robot, or a JSON file
mixing robots without a choice of one, is always an error.

Which robot (JSON lines): ``robot_id`` if given; else the robot of the first decoded message (the
description's name, or the only robot of the file). Without a full pass "the only robot" cannot be known in
advance: when no ``robot_id`` is given and the first robot is not the description's name, a message of another
robot later in the file is an error naming its line (choose one with ``--robot``); when the first robot is the
description's name, the other robots' lines are skipped, as they are with ``robot_id``.
"""

from __future__ import annotations

import csv
import math
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO

import numpy as np
from numpy.typing import NDArray

from shadow.errors import RecordingError, RejectedMessageError
from shadow.ingest.wire import PlausibilityLimits, PositionUnit, SampleBatch, check_plausible, decode_json
from shadow.robots.description import RobotDescription
from shadow.robots.parameters import MeasuredQuantity

__all__ = [
    "CSV_BATCH_SAMPLES",
    "DEFAULT_BLOCK_SAMPLES",
    "MAX_LISTED_SKIPS",
    "CoverageGap",
    "Recording",
    "RecordingError",
    "RecordingInfo",
    "RecordingReader",
    "SkipLog",
    "SkippedLine",
    "plausibility_limits",
    "read_recording",
]

Array = NDArray[np.float64]

CSV_BATCH_SAMPLES = 10  # CSV rows are grouped into batches of this many samples (10 ms at 1 kHz)
DEFAULT_BLOCK_SAMPLES = 5000  # a block handed on by the reader holds about this many samples (5 s at 1 kHz)
MAX_LISTED_SKIPS = 1000  # skipped lines kept with their number and reason; beyond, only counts per reason
_TRUE = frozenset({"1", "true", "yes", "on"})
_FALSE = frozenset({"0", "false", "no", "off", ""})
_CUT_HINT = " (the last line is cut off: the recording looks truncated)"


@dataclass(frozen=True, slots=True)
class SkippedLine:
    """A line of the recording that was not analysed, and why (the reason names the field)."""

    line: int  # 1-based line number in the file, or the message's sequence number (``where == "seq"``)
    reason: str
    where: str = "line"  # "line" (a file) or "seq" (a stored message)

    def __str__(self) -> str:
        return f"{self.where} {self.line}: {self.reason}"


@dataclass(frozen=True, slots=True)
class CoverageGap:
    """A stretch of the asked time range for which the source holds no samples (a stored range only)."""

    start_s: float  # last sample before the gap, or the range's start [s, Unix UTC]
    end_s: float  # first sample after the gap, or the range's end [s, Unix UTC]
    reason: str  # in words: which messages are missing and why they may be

    @property
    def duration_s(self) -> float:
        return self.end_s - self.start_s


def _kind(reason: str) -> str:
    """The reason's class for the counts: the wire reason code in brackets, else the field before the colon."""
    if reason.endswith("]") and " [" in reason:
        return reason.rsplit(" [", 1)[1][:-1]
    if reason.endswith(_CUT_HINT):
        return _kind(reason[: -len(_CUT_HINT)])
    head = reason.split(":", 1)[0]
    return "fields" if head.endswith(" fields, the header has") or " fields" in head else head


@dataclass(frozen=True, slots=True)
class RecordingInfo:
    """What is known of a recording once it has been read, without its samples (bounded in size)."""

    path: Path  # the file; for a stored range the database file (SQLite) or the URL's database name
    layout: str  # "jsonl", "csv", or "store"
    robot_id: str
    n_messages: int
    n_samples: int
    start_s: float  # first sample [s, Unix UTC]
    end_s: float  # last sample [s, Unix UTC]
    skipped: tuple[SkippedLine, ...] = field(default=())  # the first MAX_LISTED_SKIPS skipped lines
    skipped_total: int = 0  # every skipped line, listed or not
    skip_counts: tuple[tuple[str, int], ...] = field(default=())  # (reason class, lines), most frequent first
    other_robots: tuple[str, ...] = field(default=())
    source: str = ""
    gaps: tuple[CoverageGap, ...] = field(default=())

    @property
    def origin(self) -> str:
        """The source in words: the file name, or the stored range."""
        return self.source or self.path.name

    @property
    def duration_s(self) -> float:
        return self.end_s - self.start_s


@dataclass(frozen=True, slots=True)
class Recording:
    """The usable part of a recorded run of one robot, as wire batches in time order."""

    path: Path  # the file; for a stored range the database file (SQLite) or the URL's database name
    layout: str  # "jsonl", "csv", or "store" (raw batches read from the store, shadow.analysis.stored)
    robot_id: str
    batches: tuple[SampleBatch, ...]
    first_lines: tuple[int, ...]  # line number of each batch's first sample (JSON: its line; store: its seq)
    skipped: tuple[SkippedLine, ...] = field(default=())  # a file: the first MAX_LISTED_SKIPS skipped lines
    other_robots: tuple[str, ...] = field(default=())  # robot ids found in the file besides robot_id
    source: str = ""  # how people name the source when it is not a file (a stored range: store, robot, range)
    gaps: tuple[CoverageGap, ...] = field(default=())  # stretches of a stored range with no retained samples
    skipped_total: int | None = None  # every skipped line (None: len(skipped))
    skip_counts: tuple[tuple[str, int], ...] | None = None  # (reason class, lines); None: counted from skipped

    @property
    def origin(self) -> str:
        """The source in words: the file name, or the stored range."""
        return self.source or self.path.name

    @property
    def n_samples(self) -> int:
        return sum(b.n_samples for b in self.batches)

    @property
    def start_s(self) -> float:
        return float(self.batches[0].t[0])

    @property
    def end_s(self) -> float:
        return float(self.batches[-1].t[-1])

    @property
    def duration_s(self) -> float:
        return self.end_s - self.start_s

    def info(self) -> RecordingInfo:
        """The recording without its samples."""
        counts = self.skip_counts
        if counts is None:
            counts = tuple(Counter(_kind(s.reason) for s in self.skipped).most_common())
        total = len(self.skipped) if self.skipped_total is None else self.skipped_total
        return RecordingInfo(self.path, self.layout, self.robot_id, len(self.batches), self.n_samples, self.start_s,
                             self.end_s, self.skipped, total, counts, self.other_robots, self.source,
                             self.gaps)  # fmt: skip


def plausibility_limits(description: RobotDescription) -> PlausibilityLimits:
    """The range checks of the described robot (the same ones the live ingest applies)."""
    return PlausibilityLimits.for_parameters(description.parameters)


class SkipLog:
    """Skipped lines: the first ``max_listed`` with number and reason, and a count per reason class.

    Raises at once when strict.
    """

    def __init__(self, path: Path, strict: bool, *, max_listed: int = MAX_LISTED_SKIPS) -> None:
        self.path = path
        self.strict = strict
        self.max_listed = max_listed
        self.lines: list[SkippedLine] = []
        self.counts: Counter[str] = Counter()
        self.total = 0

    def add(self, line: int, reason: str) -> None:
        if self.strict:
            raise RecordingError(f"{self.path}: line {line}: {reason}")
        self.total += 1
        self.counts[_kind(reason)] += 1
        if len(self.lines) < self.max_listed:
            self.lines.append(SkippedLine(line, reason))


class RecordingReader:
    """One pass over a recording file, yielding blocks of checked batches in time order.

    Parameters
    ----------
    path : the recording (layout chosen by the name: ``.csv`` or JSON lines)
    description : the robot it must belong to (actuator count, units and ranges are checked against it)
    robot_id : the robot to take from a file that holds several (JSON lines), or the id given to a CSV's
        samples; default: the description's name for a CSV, the first message's robot for JSON lines
    strict : raise on the first unusable line instead of skipping it
    block_samples : a block is handed on once it holds at least this many samples
    max_listed_skips : skipped lines kept with their number; beyond, only counted

    Iterate :meth:`blocks` once; each block is a list of (first line number, batch). :meth:`peek` reads the
    first block ahead (e.g. to find the stream's rate) without losing it. After the last block, :meth:`info`
    tells what was read. ``bytes_read`` / ``size_bytes`` tell how far the reading is.

    Raises
    ------
    RecordingError naming the file, the line and the field.
    """

    def __init__(
        self,
        path: Path,
        description: RobotDescription,
        *,
        robot_id: str | None = None,
        strict: bool = False,
        block_samples: int = DEFAULT_BLOCK_SAMPLES,
        max_listed_skips: int = MAX_LISTED_SKIPS,
    ) -> None:
        if block_samples < 1:
            raise RecordingError(f"block_samples: must be >= 1, got {block_samples}")
        self.path = Path(path)
        self.description = description
        self.layout = "csv" if str(path).lower().endswith(".csv") else "jsonl"
        self.requested_robot = robot_id
        self.robot_id: str | None = robot_id if robot_id is not None or self.layout == "jsonl" else description.name
        self.block_samples = block_samples
        self.skips = SkipLog(self.path, strict, max_listed=max_listed_skips)
        self.robots: Counter[str] = Counter()  # messages per robot id (JSON lines)
        self.n_messages = 0
        self.n_samples = 0
        self.start_s = math.nan
        self.end_s = math.nan
        self.bytes_read = 0
        self.finished = False
        try:
            self.size_bytes = self.path.stat().st_size
        except OSError as exc:
            raise RecordingError(f"{path}: cannot read the recording: {exc.strerror or exc}") from exc
        self._first: list[tuple[int, SampleBatch]] | None = None
        self._gen: Iterator[list[tuple[int, SampleBatch]]] | None = None
        self._started = False

    # -- public

    def blocks(self) -> Iterator[list[tuple[int, SampleBatch]]]:
        """The blocks, front to back (single use)."""
        if self._started:
            raise RecordingError(f"{self.path}: the reader has been iterated already")
        self._started = True
        if self._first is not None:
            first, self._first = self._first, None
            if first:
                yield first
        gen, self._gen = self._gen or self._read(), None
        yield from gen

    def peek(self) -> list[tuple[int, SampleBatch]]:
        """The first block, read ahead and kept for :meth:`blocks`."""
        if self._started:
            raise RecordingError(f"{self.path}: peek() after the blocks were taken")
        if self._first is None:
            self._gen = self._read()
            self._first = next(self._gen, [])
        return self._first

    def info(self) -> RecordingInfo:
        """What was read (after the last block)."""
        if not self.finished:
            raise RecordingError(f"{self.path}: info() before the whole recording was read")
        others = tuple(sorted(r for r in self.robots if r != self.robot_id))
        listed = tuple(sorted(self.skips.lines, key=lambda s: s.line))
        return RecordingInfo(self.path, self.layout, str(self.robot_id), self.n_messages, self.n_samples,
                             self.start_s, self.end_s, listed, self.skips.total,
                             tuple(self.skips.counts.most_common()), others)  # fmt: skip

    # -- internals

    def _read(self) -> Iterator[list[tuple[int, SampleBatch]]]:
        try:
            f = self.path.open("rb")
        except OSError as exc:
            raise RecordingError(f"{self.path}: cannot read the recording: {exc.strerror or exc}") from exc
        with f:
            inner = self._csv(f) if self.layout == "csv" else self._json_lines(f)
            for block in inner:
                self._account(block)
                yield block
        self._finish()

    def _account(self, block: list[tuple[int, SampleBatch]]) -> None:
        if not block:
            return
        if self.n_messages == 0:
            self.start_s = float(block[0][1].t[0])
        self.end_s = float(block[-1][1].t[-1])
        self.n_messages += len(block)
        self.n_samples += sum(b.n_samples for _, b in block)

    def _finish(self) -> None:
        if self.n_messages == 0:
            if self.layout == "jsonl" and self.requested_robot is not None and self.robots:
                raise RecordingError(
                    f"{self.path}: robot: no message of {self.requested_robot!r}; the file holds {_list(self.robots)}"
                )
            raise RecordingError(_nothing_usable(self.path, self.skips))
        self.finished = True

    def _json_lines(self, f: BinaryIO) -> Iterator[list[tuple[int, SampleBatch]]]:
        n = self.description.n_actuators
        limits = plausibility_limits(self.description)
        name = self.description.name
        block: list[tuple[int, SampleBatch]] = []
        in_block = 0
        last_end = -math.inf
        last_line = 0
        for number, line in enumerate(f, start=1):
            self.bytes_read += len(line)
            if not line.strip():
                continue
            try:
                batch = decode_json(line, n_actuators=n, limits=limits)
            except RejectedMessageError as exc:
                hint = _CUT_HINT if not line.endswith(b"\n") else ""  # only the last line can lack its newline
                self.skips.add(number, f"{exc.reason} [{exc.reason_code}]{hint}")
                continue
            robot = batch.robot_id
            self.robots[robot] += 1
            if self.robot_id is None:
                self.robot_id = robot  # the first robot seen: the description's name or the only robot
            if robot != self.robot_id:
                if self.requested_robot is None and self.robot_id != name:
                    first = next(iter(self.robots))
                    raise RecordingError(
                        f"{self.path}: line {number}: robot: the file holds several robots ({first!r} from the first "
                        f"message, {robot!r} here); choose one with --robot"
                    )
                self.skips.add(number, f"robot: {robot!r} is not the analysed robot {self.robot_id!r}")
                continue
            if not batch.t[0] > last_end:
                self.skips.add(
                    number,
                    f"time: first sample {float(batch.t[0])!r} s is not after the last sample of line {last_line} "
                    f"({last_end!r} s); lines must be in time order",
                )
                continue
            last_end, last_line = float(batch.t[-1]), number
            block.append((number, batch))
            in_block += batch.n_samples
            if in_block >= self.block_samples:
                yield block
                block, in_block = [], 0
        if block:
            yield block

    def _csv(self, f: BinaryIO) -> Iterator[list[tuple[int, SampleBatch]]]:
        n = self.description.n_actuators
        first = f.readline()
        self.bytes_read += len(first)
        header_row = next(csv.reader([_text(self.path, first, 1).removeprefix("\ufeff")]), None)
        if not header_row or not first.strip():
            raise RecordingError(f"{self.path}: no samples (the file is empty)")
        cols = _columns(self.path, header_row, n)
        width = len(header_row)
        header = [h.strip() for h in header_row]
        # a block of rows is a whole number of wire batches, so the batches are those of one pass over all rows
        rows_per_block = CSV_BATCH_SAMPLES * max(1, -(-self.block_samples // CSV_BATCH_SAMPLES))
        numbers: list[int] = []
        values: list[list[float]] = []
        grips: list[bool] = []
        last_t = -math.inf
        last_line = 0
        seq = 0
        for number, raw in enumerate(f, start=2):
            self.bytes_read += len(raw)
            row = next(csv.reader([_text(self.path, raw, number)]), [])
            if not row or all(not c.strip() for c in row):
                continue
            if len(row) != width:
                hint = _CUT_HINT if not raw.endswith(b"\n") else ""
                self.skips.add(number, f"{len(row)} fields, the header has {width}{hint}")
                continue
            parsed = _parse_row(row, header, cols)
            if isinstance(parsed, str):
                self.skips.add(number, parsed)
                continue
            numeric, grip = parsed
            t = numeric[0]
            if not t > last_t:
                self.skips.add(
                    number, f"time_s: {t!r} s is not after {last_t!r} s of line {last_line}; rows must be in time order"
                )
                continue
            last_t, last_line = t, number
            numbers.append(number)
            values.append(numeric)
            grips.append(grip)
            if len(values) >= rows_per_block:
                block = self._csv_block(numbers, values, grips, cols, header, seq)
                seq += len(block)
                numbers, values, grips = [], [], []
                if block:
                    yield block
        if values:
            block = self._csv_block(numbers, values, grips, cols, header, seq)
            if block:
                yield block

    def _csv_block(
        self, numbers: list[int], values: list[list[float]], grips: list[bool], cols: _Columns, header: list[str],
        seq: int,
    ) -> list[tuple[int, SampleBatch]]:  # fmt: skip
        batches, first_lines = _csv_batches(np.array(values), np.array(grips), numbers, cols, self.description,
                                            str(self.robot_id), header, self.skips, seq)  # fmt: skip
        return list(zip(first_lines, batches, strict=True))


def _text(path: Path, raw: bytes, line: int) -> str:
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RecordingError(f"{path}: line {line}: not UTF-8 text at byte {exc.start} of the line") from exc


def read_recording(
    path: Path,
    description: RobotDescription,
    *,
    robot_id: str | None = None,
    strict: bool = False,
    max_listed_skips: int = MAX_LISTED_SKIPS,
) -> Recording:
    """Read a whole recording of the described robot into memory (every block of :class:`RecordingReader`).

    Parameters and errors as :class:`RecordingReader`; prefer the reader for long recordings.
    """
    reader = RecordingReader(path, description, robot_id=robot_id, strict=strict, max_listed_skips=max_listed_skips)
    first_lines: list[int] = []
    batches: list[SampleBatch] = []
    for block in reader.blocks():
        for line, batch in block:
            first_lines.append(line)
            batches.append(batch)
    info = reader.info()
    return Recording(info.path, info.layout, info.robot_id, tuple(batches), tuple(first_lines), info.skipped,
                     info.other_robots, skipped_total=info.skipped_total, skip_counts=info.skip_counts)  # fmt: skip


def _list(robots: Counter[str]) -> str:
    return ", ".join(f"{r!r} ({k} messages)" for r, k in robots.most_common())


def _nothing_usable(path: Path, skips: SkipLog) -> str:
    if not skips.total:
        return f"{path}: no samples (the file is empty)"
    head = "; ".join(str(s) for s in skips.lines[:3])
    more = f" and {skips.total - 3} more" if skips.total > 3 else ""
    return f"{path}: no usable line: {head}{more}"


# ---------------------------------------------------------------------------------------------- CSV


@dataclass(frozen=True, slots=True)
class _Columns:
    time: int
    q: list[int]
    measured: list[int]
    kind: MeasuredQuantity
    gripping: int | None
    temperature: list[int] | None


def _columns(path: Path, header: list[str], n: int) -> _Columns:
    names = [h.strip() for h in header]
    index: dict[str, int] = {}
    for j, name in enumerate(names):
        if name in index:
            raise RecordingError(
                f"{path}: line 1: column {name!r} appears twice (columns {index[name] + 1} and {j + 1})"
            )
        index[name] = j

    def group(prefix: str, suffix: str = "") -> list[int] | None:
        wanted = [f"{prefix}{i}{suffix}" for i in range(1, n + 1)]
        found = [w for w in wanted if w in index]
        if not found:
            return None
        missing = [w for w in wanted if w not in index]
        if missing:
            raise RecordingError(
                f"{path}: line 1: column {missing[0]!r} missing; this robot has {n} actuators, so "
                f"{wanted[0]} .. {wanted[-1]} are needed"
            )
        return [index[w] for w in wanted]

    groups = (("q", ""), ("effort", ""), ("current", ""), ("temperature", "_k"))
    known = {"time_s", "gripping"} | {f"{p}{i}{s}" for i in range(1, n + 1) for p, s in groups}
    unknown = [name for name in names if name not in known]
    if unknown:
        raise RecordingError(
            f"{path}: line 1: column {unknown[0]!r} is not part of the layout (time_s, q1..q{n}, effort1..effort{n} "
            f"or current1..current{n}, gripping, temperature1_k..temperature{n}_k)"
        )
    if "time_s" not in index:
        raise RecordingError(f"{path}: line 1: column 'time_s' missing (the header must name the columns)")
    q = group("q")
    if q is None:
        raise RecordingError(f"{path}: line 1: columns 'q1' .. 'q{n}' missing")
    effort, current = group("effort"), group("current")
    if (effort is None) == (current is None):
        which = "both" if effort is not None else "neither"
        raise RecordingError(
            f"{path}: line 1: columns effort1 .. effort{n} or current1 .. current{n}: exactly one group is needed, "
            f"found {which}"
        )
    temperature = group("temperature", "_k")
    return _Columns(
        time=index["time_s"],
        q=q,
        measured=effort if effort is not None else current,  # type: ignore[arg-type]
        kind=MeasuredQuantity.EFFORT if effort is not None else MeasuredQuantity.MOTOR_CURRENT,
        gripping=index.get("gripping"),
        temperature=temperature,
    )


def _parse_row(row: list[str], header: list[str], cols: _Columns) -> tuple[list[float], bool] | str:
    """(time, q.., measured.., temperature..) and gripping, or the reason the row is unusable."""
    picks = [cols.time, *cols.q, *cols.measured, *(cols.temperature or [])]
    out = []
    for j in picks:
        cell = row[j].strip()
        try:
            x = float(cell)
        except ValueError:
            return f"{header[j]}: {cell!r} is not a number"
        if not math.isfinite(x):
            return f"{header[j]}: {cell!r} is not a finite number"
        out.append(x)
    grip = False
    if cols.gripping is not None:
        cell = row[cols.gripping].strip().lower()
        if cell in _TRUE:
            grip = True
        elif cell not in _FALSE:
            return f"gripping: {row[cols.gripping]!r} is not 0/1 or true/false"
    return out, grip


def _csv_batches(
    data: Array,
    grips: NDArray[np.bool_],
    numbers: list[int],
    cols: _Columns,
    description: RobotDescription,
    robot_id: str,
    header: list[str],
    skips: SkipLog,
    first_seq: int = 0,
) -> tuple[list[SampleBatch], list[int]]:
    """Group the parsed rows into wire batches; a batch that fails the range checks is split to find the row."""
    n = description.n_actuators
    limits = plausibility_limits(description)
    unit = PositionUnit.RAD if description.family == "delta" else PositionUnit.M
    temp = cols.temperature is not None
    has_grip = cols.gripping is not None

    def build(rows: slice, seq: int) -> SampleBatch:
        block = data[rows]
        measured = block[:, 1 + n : 1 + 2 * n]
        return SampleBatch(
            robot_id=robot_id,
            seq=seq,
            position_unit=unit,
            effort_kind=cols.kind,
            t=block[:, 0],
            q=block[:, 1 : 1 + n],
            effort=measured if cols.kind is MeasuredQuantity.EFFORT else None,
            current=measured if cols.kind is MeasuredQuantity.MOTOR_CURRENT else None,
            temperature_k=block[:, 1 + 2 * n : 1 + 3 * n] if temp else None,
            gripping=grips[rows] if has_grip else None,
        )

    batches: list[SampleBatch] = []
    first_lines: list[int] = []
    for s in range(0, data.shape[0], CSV_BATCH_SAMPLES):
        chunk = range(s, min(s + CSV_BATCH_SAMPLES, data.shape[0]))
        try:
            batch = build(slice(chunk[0], chunk[-1] + 1), first_seq + len(batches))
            check_plausible(batch, limits)
            batches.append(batch)
            first_lines.append(numbers[chunk[0]])
            continue
        except RejectedMessageError:
            pass
        for k in chunk:  # one row at a time, to name the line at fault
            try:
                batch = build(slice(k, k + 1), first_seq + len(batches))
                check_plausible(batch, limits)
            except RejectedMessageError as exc:
                skips.add(numbers[k], _csv_reason(exc.reason, header, cols))
                continue
            batches.append(batch)
            first_lines.append(numbers[k])
    return batches, first_lines


def _csv_reason(reason: str, header: list[str], cols: _Columns) -> str:
    """Name the CSV column in a wire-level reason ('effort: ... actuator 1 ...' -> 'effort2: ...')."""
    field_name, _, rest = reason.partition(": ")
    groups = {"position": cols.q, "effort": cols.measured, "current": cols.measured, "temperature": cols.temperature}
    columns = groups.get(field_name)
    marker = ", actuator "
    if columns is not None and marker in rest:
        j = int(rest.split(marker, 1)[1].split()[0])
        return f"{header[columns[j]]}: {rest}"
    return reason
