"""``shadow analyze``: run the live monitor over a recorded run, much faster than real time.

``shadow analyze DESCRIPTION RECORDING [--baseline B.json] [--sample-rate-hz R] [--robot ID] [--events-json OUT]``
``shadow analyze DESCRIPTION --database URL | --config FILE  --robot ID --from ISO8601 --to ISO8601 [...]``

RECORDING is JSON lines of wire messages or a CSV (layout in docs/analysis.md). Instead of a file, the raw
samples the service retained in its store can be analysed over a time range (``--database`` or the service
``--config``; whole messages overlapping ``[--from, --to)``, in sequence order; the stretches of the range with
no retained samples are listed; shadow.analysis.stored). The monitor is built exactly
as ``shadow serve`` builds it (description, baseline or the description's nominal values, default settings at
the stream's rate) and fed the recording in blocks of messages, so it finds what the live service would have
found. Lines that cannot be used are skipped and listed (``--strict`` stops at the first one instead). At
the end it prints the samples, duration and speed, every event found (time, kind, size, platform force) and
the estimates at the end with their standard deviations. Advisory only: nothing is sent to a controller.
"""

from __future__ import annotations

import argparse
import base64
import datetime as dt
import json
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from sqlalchemy import make_url
from sqlalchemy.exc import ArgumentError

from shadow.analysis import DEFAULT_BLOCK_MESSAGES, DEFAULT_STRETCH_S, Analysis, analyse, analyse_stream
from shadow.analysis.recording import Recording, RecordingReader
from shadow.analysis.stored import gap_rows, parse_time, read_stored_range
from shadow.cli.serve import load_baseline
from shadow.config import load_config
from shadow.errors import ConfigurationError
from shadow.ingest.wire import SampleBatch
from shadow.monitoring import RobotMonitor, default_settings
from shadow.robots.description import RobotDescription, load_description
from shadow.store.database import normalise_url
from shadow.store.repository import SqlStore

PROGRESS_PERIOD_S = 0.25  # the bar is redrawn at most four times a second
BAR_WIDTH = 30


def register(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = commands.add_parser(
        "analyze",
        help="run the monitor over a recorded run and list what it found",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    add_common_arguments(parser)
    parser.add_argument("--events-json", type=Path, metavar="OUT", help="write the events found to OUT (JSON)")
    parser.set_defaults(handler=run)


def add_common_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments shared by ``shadow analyze`` and ``shadow report``."""
    parser.add_argument("description", type=Path, metavar="DESCRIPTION", help="robot description (TOML, schema 1)")
    parser.add_argument(
        "recording",
        type=Path,
        nargs="?",
        metavar="RECORDING",
        help="JSON lines of wire messages, or CSV (or give a stored range instead: --database/--config)",
    )
    stored = parser.add_argument_group("a stored time range instead of a recording")
    where = stored.add_mutually_exclusive_group()
    where.add_argument("--database", metavar="URL", help="the store's URL (sqlite:///shadow.db, postgresql://...)")
    where.add_argument(
        "--config", type=Path, metavar="FILE", help="the service configuration: its database url and raw retention"
    )
    stored.add_argument("--from", dest="range_from", metavar="ISO8601", help="start of the range (no offset: UTC)")
    stored.add_argument("--to", dest="range_to", metavar="ISO8601", help="end of the range, exclusive (no offset: UTC)")
    parser.add_argument("--baseline", type=Path, metavar="B.json", help="commissioning baseline (shadow commission)")
    parser.add_argument(
        "--sample-rate-hz",
        type=float,
        default=None,
        metavar="R",
        help="nominal stream rate for the false-alarm bound (default: the recording's median rate)",
    )
    parser.add_argument(
        "--robot", metavar="ID", help="robot id to analyse (default: the description's name; a stored range needs it)"
    )
    parser.add_argument("--strict", action="store_true", help="stop at the first unusable line instead of skipping")
    parser.add_argument(
        "--progress", action="store_true", help="show the progress bar even when stderr is not a terminal"
    )
    parser.add_argument(
        "--block-messages",
        type=int,
        default=DEFAULT_BLOCK_MESSAGES,
        metavar="K",
        help=f"messages per monitor call (default {DEFAULT_BLOCK_MESSAGES})",
    )


class ProgressBar:
    """A one-line bar on a stream: share done, samples, rate and time left; redrawn at most every period_s."""

    def __init__(self, stream: TextIO, *, period_s: float = PROGRESS_PERIOD_S) -> None:
        self.stream = stream
        self.period_s = period_s
        self._last_draw = -float("inf")
        self.drawn = 0

    def __call__(self, done: int, total: int, elapsed_s: float) -> None:
        now = time.monotonic()
        if done < total and now - self._last_draw < self.period_s:
            return
        self._last_draw = now
        self.drawn += 1
        self.stream.write("\r" + progress_line(done, total, elapsed_s))
        if done >= total:
            self.stream.write("\n")
        self.stream.flush()


def progress_line(done: int, total: int, elapsed_s: float) -> str:
    """``[#####.....]  45 %  12345/27000 samples  6.7k samples/s  0:02 left``."""
    share = done / total if total else 1.0
    filled = int(round(BAR_WIDTH * share))
    rate = done / elapsed_s if elapsed_s > 0 else 0.0
    left = (total - done) / rate if rate > 0 else float("nan")
    left_text = "--:--" if not np.isfinite(left) else f"{int(left // 60)}:{int(left % 60):02d}"
    return (
        f"[{'#' * filled}{'.' * (BAR_WIDTH - filled)}] {100 * share:3.0f} %  {done}/{total} samples  "
        f"{_si(rate)} samples/s  {left_text} left"
    )


def _si(x: float) -> str:
    if x >= 1e6:
        return f"{x / 1e6:.1f}M"
    if x >= 1e3:
        return f"{x / 1e3:.1f}k"
    return f"{x:.0f}"


def iso(t_s: float) -> str:
    """ISO 8601 UTC with milliseconds."""
    return dt.datetime.fromtimestamp(t_s, tz=dt.UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def median_rate_hz(batches: Sequence[SampleBatch]) -> float:
    """The stream's rate from the median step between samples within messages (gaps between them do not count).

    A file is streamed, so ``shadow analyze`` takes the median over the first block the reader hands on (about
    DEFAULT_BLOCK_SAMPLES samples); a stored range over all of it.
    """
    steps = np.concatenate([np.diff(b.t) for b in batches if b.n_samples > 1] or [np.zeros(0)])
    if steps.size == 0:
        raise ConfigurationError("--sample-rate-hz: the recording has no two samples in one message; give the rate")
    return float(1.0 / np.median(steps))


def build_monitor(
    description: RobotDescription,
    robot_id: str,
    batches: Sequence[SampleBatch],
    baseline_path: Path | None,
    sample_rate_hz: float | None,
) -> RobotMonitor:
    """The monitor exactly as the live service builds it (rate: given, or the median of ``batches``)."""
    rate = median_rate_hz(batches) if sample_rate_hz is None else sample_rate_hz
    if not rate > 0:
        raise ConfigurationError(f"--sample-rate-hz: must be > 0, got {rate}")
    settings = default_settings(description, sample_rate_hz=rate)
    return RobotMonitor(robot_id, description, load_baseline(baseline_path), settings)


def read_source(args: argparse.Namespace, description: RobotDescription) -> Recording | RecordingReader:
    """A reader streaming the recording file, or the whole stored range of ``--database``/``--config``,
    ``--robot``, ``--from``, ``--to``."""
    from_store = args.database is not None or args.config is not None
    range_given = args.range_from is not None or args.range_to is not None
    if args.recording is not None:
        if from_store or range_given:
            raise ConfigurationError(
                "give either a RECORDING file or a stored range (--database or --config with --from and --to), not both"
            )
        return RecordingReader(args.recording, description, robot_id=args.robot, strict=args.strict)
    if not from_store:
        raise ConfigurationError("nothing to analyse: give a RECORDING file, or --database/--config with a range")
    missing = [o for o, v in (("--robot", args.robot), ("--from", args.range_from), ("--to", args.range_to)) if not v]
    if missing:
        raise ConfigurationError(
            f"a stored range needs {', '.join(missing)} (robot id site/cell/robot, ISO 8601 times)"
        )
    start_s = parse_time("--from", args.range_from)
    end_s = parse_time("--to", args.range_to)
    retention: float | None = None
    url = args.database
    if args.config is not None:
        config = load_config(args.config)
        url, retention = config.database_url, config.raw_retention_s
    store = open_store_for_reading(url)
    try:
        return read_stored_range(
            store,
            description,
            robot_id=args.robot,
            start_s=start_s,
            end_s=end_s,
            strict=args.strict,
            configured_retention_s=retention,
        )
    finally:
        store.close()


def open_store_for_reading(url: str) -> SqlStore:
    """The store at ``url`` without migrating it (analysis only reads); a missing SQLite file is an error."""
    try:
        parsed = make_url(normalise_url(url))
    except ArgumentError:
        raise ConfigurationError(
            "--database: not a database URL (expected sqlite:///file.db or postgresql://user@host/db)"
        ) from None
    database = parsed.database
    if parsed.get_backend_name() == "sqlite" and database and database != ":memory:" and not Path(database).exists():
        raise ConfigurationError(f"--database: no SQLite database at {database} (is this the service's store?)")
    return SqlStore(url, migrate_schema=False)


def run_analysis(args: argparse.Namespace) -> tuple[RobotDescription, RobotMonitor, Analysis]:
    """Read, build and analyse, with the progress bar if wanted (shared with ``shadow report``).

    A recording file is streamed block by block (memory bounded whatever its length); a stored range is read whole.
    """
    if args.block_messages < 1:
        raise ConfigurationError(f"--block-messages: must be >= 1, got {args.block_messages}")
    stretch_s = getattr(args, "stretch_s", DEFAULT_STRETCH_S)
    description = load_description(args.description)
    source = read_source(args, description)
    show = args.progress or sys.stderr.isatty()
    bar = ProgressBar(sys.stderr) if show else None
    if isinstance(source, RecordingReader):
        first = [b for _, b in source.peek()]
        robot_id = source.robot_id if source.robot_id is not None else description.name
        monitor = build_monitor(description, robot_id, first, args.baseline, args.sample_rate_hz)
        analysis = analyse_stream(
            source, monitor, block_messages=args.block_messages, progress=bar, stretch_s=stretch_s
        )
    else:
        monitor = build_monitor(description, source.robot_id, source.batches, args.baseline, args.sample_rate_hz)
        analysis = analyse(source, monitor, block_messages=args.block_messages, progress=bar, stretch_s=stretch_s)
    rec = analysis.recording
    what = "messages" if rec.layout == "store" else "lines"
    for skip in rec.skipped[:20]:
        print(f"shadow {args.command}: skipped {rec.origin}: {skip}", file=sys.stderr)
    if rec.skipped_total > 20:
        print(f"shadow {args.command}: ... {rec.skipped_total - 20} more {what} skipped", file=sys.stderr)
    return description, monitor, analysis


def force_of(event: dict[str, Any]) -> tuple[str, list[float]]:
    """(key, vector) of the event's estimated platform force [N] (delta) or wrench [N, N m] (hexapod)."""
    figures = event.get("figures", {})
    for key in ("platform_force_n", "platform_wrench_n_nm"):
        if key in figures:
            return key, [float(x) for x in figures[key]]
    return "", []


def summary_lines(description: RobotDescription, analysis: Analysis) -> list[str]:
    """The readable summary printed at the end of ``shadow analyze``."""
    rec = analysis.recording
    delta = description.family == "delta"
    lines = [
        f"{rec.robot_id} ({description.family}, {description.name}): {rec.n_messages} messages, "
        f"{analysis.n_samples} samples over {rec.duration_s:.3f} s from {iso(rec.start_s)}",
        f"analysed in {analysis.elapsed_s:.2f} s: {analysis.samples_per_s:,.0f} samples/s "
        f"({rec.duration_s / analysis.elapsed_s if analysis.elapsed_s > 0 else float('inf'):.1f} x real time)",
    ]
    if rec.layout == "store":
        lines.insert(1, f"source: {rec.origin}")
    if rec.skipped_total:
        what = "messages" if rec.layout == "store" else "lines"
        counts = ", ".join(f"{kind} {k}" for kind, k in rec.skip_counts)
        listed = "listed on stderr" if rec.skipped_total <= 20 else "the first 20 listed on stderr"
        if rec.skipped_total > len(rec.skipped):
            listed += f"; only the first {len(rec.skipped)} are kept, the rest counted"
        lines.append(f"skipped {what}: {rec.skipped_total} ({listed}; by reason: {counts})")
    if rec.gaps:
        lines.append(
            f"not retained in the range: {len(rec.gaps)} stretches, {sum(g.duration_s for g in rec.gaps):.3f} s"
        )
        for g in rec.gaps[:20]:
            lines.append(f"  {iso(g.start_s)} .. {iso(g.end_s)}  {g.duration_s:10.3f} s  {g.reason}")
        if len(rec.gaps) > 20:
            lines.append(f"  ... and {len(rec.gaps) - 20} more")
    if rec.other_robots:
        lines.append(f"other robots in the file, not analysed: {', '.join(rec.other_robots)}")
    digest = analysis.results
    finals = analysis.final_estimates()
    tail_s = rec.end_s - finals[-1].time_s if finals else rec.duration_s
    if tail_s > 0:
        lines.append(f"not examined: the last {tail_s:.3f} s (the monitor works in whole output periods)")
    if digest.unmonitored_count:
        lines.append(f"not monitored: {digest.unmonitored_count} stretches, {digest.unmonitored_s:.3f} s")
    events = analysis.events
    lines.append(f"events: {len(events)}")
    for e in events:
        key, f = force_of(e)
        size = float(np.linalg.norm(f[:3])) if f else float("nan")
        vec = ", ".join(f"{x:.1f}" for x in f)
        force = f"platform force {size:.1f} N ({vec})" if delta else f"platform wrench ({vec}) N, N m"
        lines.append(
            f"  {iso(e['start_s'])}  +{e['start_s'] - rec.start_s:8.3f} s  {e['kind']:<10} "
            f"{1000 * (e['end_s'] - e['start_s']):5.0f} ms  {e['severity']:<6}  {force}"
        )
        lines.append(f"      {e['summary']}")
    if finals:
        lines.append(f"estimates at the end ({iso(finals[-1].time_s)}):")
        for est in finals:
            flag = "" if est.identifiable else "  (not identifiable from this run)"
            lines.append(f"  {est.parameter:<18} {est.value:>11.5g} +- {est.std:.3g}{flag}")
    last = digest.last_robot_health
    if last is not None:
        lines.append(f"health at the end: {last['state']}")
        lines += [f"  - {r}" for r in last["reasons"]]
    lines.append("advisory only: nothing was sent to any controller")
    return lines


def events_document(analysis: Analysis) -> dict[str, Any]:
    """The events as JSON: times also as ISO 8601, evidence as base64 of the wire binary encoding."""
    rec = analysis.recording
    out = []
    for e in analysis.events:
        row = {k: v for k, v in e.items() if k != "evidence"}
        row["start_utc"] = iso(e["start_s"])
        row["end_utc"] = iso(e["end_s"])
        blob = e.get("evidence")
        row["evidence_wire_binary_base64"] = None if blob is None else base64.b64encode(blob).decode("ascii")
        out.append(row)
    return {
        "robot": rec.robot_id,
        "recording": rec.origin if rec.layout == "store" else str(rec.path),
        "source_layout": rec.layout,
        "samples": analysis.n_samples,
        "start_utc": iso(rec.start_s),
        "end_utc": iso(rec.end_s),
        "skipped_lines": [{s.where: s.line, "reason": s.reason} for s in rec.skipped],  # the first ones
        "skipped_total": rec.skipped_total,
        "skipped_by_reason": dict(rec.skip_counts),
        "not_retained": gap_rows(rec.gaps),
        "events": out,
    }


def _json_safe(value: Any) -> Any:
    """JSON has no NaN or infinity: None in their place, recursively."""
    if isinstance(value, float):
        return value if np.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    return value


def run(args: argparse.Namespace) -> int:
    description, _, analysis = run_analysis(args)
    if args.events_json is not None:
        try:
            args.events_json.parent.mkdir(parents=True, exist_ok=True)
            text = json.dumps(_json_safe(events_document(analysis)), indent=1, allow_nan=False)
            args.events_json.write_text(text + "\n", encoding="utf-8")
        except (OSError, ValueError) as exc:
            raise ConfigurationError(f"{args.events_json}: cannot write the events: {exc}") from exc
    print("\n".join(summary_lines(description, analysis)))
    if args.events_json is not None:
        print(f"events written to {args.events_json}")
    return 0
