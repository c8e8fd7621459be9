"""Reading a recorded run for offline analysis: JSON lines of wire messages, or CSV.

Two layouts are read (docs/analysis.md):

- **JSON lines** (``.jsonl``, ``.json``, anything not ending in ``.csv``): one wire-format message per line
  (docs/wire-format.md), exactly what a controller publishes and ``python -m simulators record`` writes.
- **CSV** (``.csv``): a header line, then one sample per line. Columns, by name, in any order:
  ``time_s`` (Unix seconds, UTC), ``q1 .. qn`` (actuator positions [rad | m]), either ``effort1 .. effortn``
  (joint-side efforts [N m | N]) or ``current1 .. currentn`` (motor currents [A]), optionally ``gripping``
  (0/1, true/false) and ``temperature1_k .. temperaturen_k`` [K]. The robot id is the ``--robot`` given or
  the description's name.

Reading is lenient by default: a line that cannot be used (cut off, not a valid message, another robot, a
time that does not follow the previous line, a number that is not a number, a value outside the robot's
range) is skipped and listed with its line number and the field at fault, and everything else is analysed.
``strict=True`` turns the first such line into a :class:`RecordingError`. A file with nothing usable, a
CSV header that does not fit the robot, or a JSON file mixing robots without a choice of one, is always
an error.
"""

from __future__ import annotations

import csv
import io
import math
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from shadow.errors import RecordingError, RejectedMessageError
from shadow.ingest.wire import PlausibilityLimits, PositionUnit, SampleBatch, check_plausible, decode_json
from shadow.robots.description import RobotDescription
from shadow.robots.parameters import MeasuredQuantity

__all__ = [
    "CSV_BATCH_SAMPLES",
    "CoverageGap",
    "Recording",
    "RecordingError",
    "SkippedLine",
    "plausibility_limits",
    "read_recording",
]

Array = NDArray[np.float64]

CSV_BATCH_SAMPLES = 10  # CSV rows are grouped into batches of this many samples (10 ms at 1 kHz)
_TRUE = frozenset({"1", "true", "yes", "on"})
_FALSE = frozenset({"0", "false", "no", "off", ""})


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


@dataclass(frozen=True, slots=True)
class Recording:
    """The usable part of a recorded run of one robot, as wire batches in time order."""

    path: Path  # the file; for a stored range the database file (SQLite) or the URL's database name
    layout: str  # "jsonl", "csv", or "store" (raw batches read from the store, shadow.analysis.stored)
    robot_id: str
    batches: tuple[SampleBatch, ...]
    first_lines: tuple[int, ...]  # line number of each batch's first sample (JSON: its line; store: its seq)
    skipped: tuple[SkippedLine, ...] = field(default=())
    other_robots: tuple[str, ...] = field(default=())  # robot ids found in the file besides robot_id
    source: str = ""  # how people name the source when it is not a file (a stored range: store, robot, range)
    gaps: tuple[CoverageGap, ...] = field(default=())  # stretches of a stored range with no retained samples

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


def plausibility_limits(description: RobotDescription) -> PlausibilityLimits:
    """The range checks of the described robot (the same ones the live ingest applies)."""
    return PlausibilityLimits.for_parameters(description.parameters)


def read_recording(
    path: Path, description: RobotDescription, *, robot_id: str | None = None, strict: bool = False
) -> Recording:
    """Read a recording of the described robot (layout chosen by the file name: ``.csv`` or JSON lines).

    Parameters
    ----------
    path : the recording
    description : the robot it must belong to (actuator count, units and ranges are checked against it)
    robot_id : the robot to take from a file that holds several (JSON lines), or the id given to a CSV's
        samples; default: the description's name, else the only robot in the file
    strict : raise on the first unusable line instead of skipping it

    Raises
    ------
    RecordingError naming the file, the line and the field.
    """
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        raise RecordingError(f"{path}: cannot read the recording: {exc.strerror or exc}") from exc
    if str(path).lower().endswith(".csv"):
        return _read_csv(Path(path), raw, description, robot_id=robot_id, strict=strict)
    return _read_json_lines(Path(path), raw, description, robot_id=robot_id, strict=strict)


class _Skips:
    """Collects skipped lines, or raises at once when strict."""

    def __init__(self, path: Path, strict: bool) -> None:
        self.path = path
        self.strict = strict
        self.lines: list[SkippedLine] = []

    def add(self, line: int, reason: str) -> None:
        if self.strict:
            raise RecordingError(f"{self.path}: line {line}: {reason}")
        self.lines.append(SkippedLine(line, reason))


# ---------------------------------------------------------------------------------------------- JSON lines


def _read_json_lines(
    path: Path, raw: bytes, description: RobotDescription, *, robot_id: str | None, strict: bool
) -> Recording:
    n = description.n_actuators
    limits = plausibility_limits(description)
    lines = raw.split(b"\n")
    ends_with_newline = raw.endswith(b"\n")
    skips = _Skips(path, strict)
    decoded: list[tuple[int, SampleBatch]] = []
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            decoded.append((number, decode_json(line, n_actuators=n, limits=limits)))
        except RejectedMessageError as exc:
            cut = number == len(lines) and not ends_with_newline
            hint = " (the last line is cut off: the recording looks truncated)" if cut else ""
            skips.add(number, f"{exc.reason} [{exc.reason_code}]{hint}")
    robots = Counter(b.robot_id for _, b in decoded)
    wanted = _choose_robot(path, robots, robot_id, description.name)
    batches: list[SampleBatch] = []
    first_lines: list[int] = []
    for number, batch in decoded:
        if batch.robot_id != wanted:
            skips.add(number, f"robot: {batch.robot_id!r} is not the analysed robot {wanted!r}")
            continue
        if batches and not batch.t[0] > batches[-1].t[-1]:
            skips.add(
                number,
                f"time: first sample {float(batch.t[0])!r} s is not after the last sample of line {first_lines[-1]} "
                f"({float(batches[-1].t[-1])!r} s); lines must be in time order",
            )
            continue
        batches.append(batch)
        first_lines.append(number)
    if not batches:
        raise RecordingError(_nothing_usable(path, skips.lines))
    others = tuple(sorted(r for r in robots if r != wanted))
    return Recording(path, "jsonl", wanted, tuple(batches), tuple(first_lines), tuple(skips.lines), others)


def _choose_robot(path: Path, robots: Counter[str], robot_id: str | None, name: str) -> str:
    if robot_id is not None:
        if robots and robot_id not in robots:
            raise RecordingError(f"{path}: robot: no message of {robot_id!r}; the file holds {_list(robots)}")
        return robot_id
    if name in robots or not robots:
        return name
    if len(robots) == 1:
        return next(iter(robots))
    raise RecordingError(f"{path}: robot: the file holds several robots ({_list(robots)}); choose one with --robot")


def _list(robots: Counter[str]) -> str:
    return ", ".join(f"{r!r} ({k} messages)" for r, k in robots.most_common())


def _nothing_usable(path: Path, skipped: list[SkippedLine]) -> str:
    if not skipped:
        return f"{path}: no samples (the file is empty)"
    head = "; ".join(str(s) for s in skipped[:3])
    more = f" and {len(skipped) - 3} more" if len(skipped) > 3 else ""
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


def _read_csv(
    path: Path, raw: bytes, description: RobotDescription, *, robot_id: str | None, strict: bool
) -> Recording:
    n = description.n_actuators
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise RecordingError(f"{path}: not UTF-8 text at byte {exc.start}") from exc
    rows = list(csv.reader(io.StringIO(text)))
    if not rows:
        raise RecordingError(f"{path}: no samples (the file is empty)")
    cols = _columns(path, rows[0], n)
    width = len(rows[0])
    header = [h.strip() for h in rows[0]]
    ends_with_newline = text.endswith("\n")
    skips = _Skips(path, strict)
    numbers: list[int] = []
    values: list[list[float]] = []
    grips: list[bool] = []
    last_t = -math.inf
    last_line = 0
    for number, row in enumerate(rows[1:], start=2):
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) != width:
            cut = number == len(rows) and not ends_with_newline
            hint = " (the last line is cut off: the recording looks truncated)" if cut else ""
            skips.add(number, f"{len(row)} fields, the header has {width}{hint}")
            continue
        parsed = _parse_row(row, header, cols)
        if isinstance(parsed, str):
            skips.add(number, parsed)
            continue
        numeric, grip = parsed
        t = numeric[0]
        if not t > last_t:
            skips.add(
                number, f"time_s: {t!r} s is not after {last_t!r} s of line {last_line}; rows must be in time order"
            )
            continue
        last_t, last_line = t, number
        numbers.append(number)
        values.append(numeric)
        grips.append(grip)
    if not values:
        raise RecordingError(_nothing_usable(path, skips.lines))
    data = np.array(values)
    wanted = robot_id if robot_id is not None else description.name
    batches, first_lines = _csv_batches(data, np.array(grips), numbers, cols, description, wanted, header, skips)
    if not batches:
        raise RecordingError(_nothing_usable(path, skips.lines))
    order = sorted(skips.lines, key=lambda s: s.line)
    return Recording(path, "csv", wanted, tuple(batches), tuple(first_lines), tuple(order))


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
    skips: _Skips,
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
            batch = build(slice(chunk[0], chunk[-1] + 1), len(batches))
            check_plausible(batch, limits)
            batches.append(batch)
            first_lines.append(numbers[chunk[0]])
            continue
        except RejectedMessageError:
            pass
        for k in chunk:  # one row at a time, to name the line at fault
            try:
                batch = build(slice(k, k + 1), len(batches))
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
