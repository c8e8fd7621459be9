"""``python -m simulators``: simulated robots that publish like a controller, or write a recording.

    python -m simulators live --family delta --port 1883 --site demo --cell line1 --robot picker-1
    python -m simulators record --family hexapod --duration 60 --out run.jsonl --truth run.truth.json
    python -m simulators scenario simulators/scenarios/wear_30_days.toml --record wear.jsonl --truth wear.truth.json

Every network target is the broker given (loopback by default). The recording holds the very messages a
controller would publish (JSON wire format, one per line); the truth file what really happened.
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import json
import os
import signal
import sys
import threading
import time
from pathlib import Path
from types import FrameType

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402

from shadow.errors import ShadowError  # noqa: E402
from shadow.ingest.mqtt import MqttSettings  # noqa: E402
from shadow.ingest.topics import RobotAddress, TopicLayout  # noqa: E402
from shadow.robots.description import example_paths, load_description  # noqa: E402
from simulators.live import Feed, FeedSettings, pace  # noqa: E402
from simulators.publish import BatchPublisher, RecordingWriter  # noqa: E402
from simulators.run import DemoEffects  # noqa: E402
from simulators.scenario import generate, load_scenario, truth_document  # noqa: E402


def feed_settings(family: str) -> tuple[FeedSettings, FeedSettings]:
    """(first run, later runs). The delta streams at 1 kHz, the hexapod at 250 Hz, both with a rigid drive train.

    The first run is small so the stream starts within seconds; later runs simulate more windows side by
    side, which costs little more per time step, so the feed keeps ahead of real time (measured 1.7x for
    8 delta windows, 2.8x for 16 hexapod windows on one core).
    """
    if family == "delta":
        return FeedSettings(windows_per_run=8, window_s=2.0), FeedSettings(windows_per_run=16, window_s=3.0)
    effects = DemoEffects(coupling_frequency_hz=None, jitter_std_s=2e-6)
    later = FeedSettings(windows_per_run=16, window_s=4.0, sample_step_s=4e-3, effects=effects)
    return FeedSettings(windows_per_run=8, window_s=2.0, sample_step_s=4e-3, effects=effects), later


def build_feed(args: argparse.Namespace, *, realtime_start: bool) -> Feed:
    path = args.description or next(p for p in example_paths() if args.family in p.name)
    description = load_description(path)
    if description.family != args.family:
        raise ShadowError(f"{path}: describes a {description.family}, not a {args.family}")
    first, later = feed_settings(args.family)
    for name in ("impact_fraction", "pick_fault_fraction"):
        value = getattr(args, name)
        if value is not None and not 0.0 <= value <= 1.0:
            raise ShadowError(f"--{name.replace('_', '-')}: must be within 0..1, got {value}")
    if args.impact_fraction is not None:
        first, later = (dataclasses.replace(s, impact_probability=args.impact_fraction) for s in (first, later))
    if args.pick_fault_fraction is not None:
        first, later = (
            dataclasses.replace(
                s, missed_pick_probability=args.pick_fault_fraction, double_pick_probability=args.pick_fault_fraction
            )
            for s in (first, later)
        )
    if args.no_impacts:
        first, later = (dataclasses.replace(s, impact_probability=0.0) for s in (first, later))
    samples = 10 if args.family == "delta" else 5  # 10 ms and 20 ms messages
    return Feed(description, args.robot, np.random.default_rng(args.seed), later, first, samples,
                realtime_start=realtime_start)  # fmt: skip


def live(args: argparse.Namespace) -> int:
    stop = threading.Event()

    def on_signal(signum: int, frame: FrameType | None) -> None:
        stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    feed = build_feed(args, realtime_start=True)
    address = RobotAddress(args.site, args.cell, args.robot)
    settings = MqttSettings(host=args.host, port=args.port, protocol=args.protocol)
    until = None if args.duration is None else time.time() + args.duration
    with BatchPublisher(address, settings, layout=TopicLayout(args.prefix), encoding=args.encoding) as pub:
        for batch in pace(feed.batches(time.time(), stop), realtime=not args.fast, until_s=until):
            pub.publish(batch)
            if stop.is_set():
                break
    stop.set()
    if args.truth:
        Path(args.truth).write_text(json.dumps({"robot": str(address), "windows": feed.truth}, indent=1))
    return 0


def record(args: argparse.Namespace) -> int:
    feed = build_feed(args, realtime_start=False)
    stop = threading.Event()
    start = args.start if args.start is not None else time.time()
    with RecordingWriter(args.out) as writer:
        for batch in pace(feed.batches(start, stop), realtime=False, until_s=start + args.duration):
            writer.write(batch)
    stop.set()
    truth = Path(args.truth or str(args.out) + ".truth.json")
    truth.write_text(json.dumps({"robot": args.robot, "windows": feed.truth}, indent=1))
    print(f"{writer.written} messages to {args.out}, ground truth in {truth}")  # noqa: T201
    return 0


def scenario(args: argparse.Namespace) -> int:
    """Simulate a scenario file into a recording and/or onto a broker, with its ground truth."""
    sc = load_scenario(args.file)
    if args.record is None and not args.publish:
        raise ShadowError("nothing to do: give --record FILE, --publish, or both")
    truth_path = Path(args.truth) if args.truth else Path(str(args.record or sc.name) + ".truth.json")
    address = RobotAddress(args.site, args.cell, sc.robot_id)
    total = sc.sampling.windows
    truths = []
    messages = 0
    with contextlib.ExitStack() as stack:
        writer = stack.enter_context(RecordingWriter(args.record)) if args.record is not None else None
        publisher = None
        if args.publish:
            settings = MqttSettings(host=args.host, port=args.port, protocol=args.protocol)
            layout = TopicLayout(args.prefix)
            publisher = stack.enter_context(BatchPublisher(address, settings, layout=layout, encoding=args.encoding))
        started = time.monotonic()
        for window in generate(sc):
            for batch in window.batches:
                if writer is not None:
                    writer.write(batch)
                if publisher is not None:
                    publisher.publish(batch)
            messages += len(window.batches)
            truths.append(window.truth)
            t = window.truth
            progress = (
                f"window {window.index + 1}/{total}  day {window.day:7.2f}  {len(window.batches)} messages  "
                f"{len(t.impacts)} impacts  {len(t.pick_faults)} pick faults  {len(t.sensor_faults)} sensor faults  "
                f"{time.monotonic() - started:.0f} s"
            )
            end = "\r" if sys.stderr.isatty() and window.index + 1 < total else "\n"
            print(progress, end=end, file=sys.stderr, flush=True)  # noqa: T201
    truth_path.parent.mkdir(parents=True, exist_ok=True)
    truth_path.write_text(json.dumps(truth_document(sc, truths), indent=1))
    where = " and ".join(
        w
        for w in (
            str(args.record) if args.record else "",
            f"{address} on {args.host}:{args.port}" if args.publish else "",
        )
        if w
    )
    print(f"{messages} messages of {total} windows to {where}, ground truth in {truth_path}")  # noqa: T201
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m simulators", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)  # fmt: skip
    sub = parser.add_subparsers(dest="command", required=True)
    for name, handler in (("live", live), ("record", record)):
        p = sub.add_parser(name, help=f"{name}: " + ("publish to a broker" if name == "live" else "write a file"))
        p.add_argument("--family", choices=("delta", "hexapod"), required=True)
        p.add_argument("--description", type=Path, default=None, help="robot description (default: the example)")
        p.add_argument("--robot", default="picker-1" if name == "live" else "sim-1", help="robot id (topic level)")
        p.add_argument("--seed", type=int, default=1)
        p.add_argument("--duration", type=float, default=None if name == "live" else 60.0, metavar="S")
        p.add_argument("--truth", default=None, help="ground-truth file (JSON)")
        p.add_argument("--no-impacts", action="store_true", help="a healthy run (for commissioning)")
        defaults = FeedSettings()
        p.add_argument("--impact-fraction", type=float, default=None, metavar="F",
                       help=f"share of windows with one impact (default {defaults.impact_probability})")  # fmt: skip
        p.add_argument("--pick-fault-fraction", type=float, default=None, metavar="F",
                       help="delta: share of cycles with a missed pick, and the same share with a double pick "
                       f"(default {defaults.missed_pick_probability})")  # fmt: skip
        p.set_defaults(handler=handler)
        if name == "live":
            p.add_argument("--host", default="127.0.0.1")
            p.add_argument("--port", type=int, default=1883)
            p.add_argument("--prefix", default="shadow", help="topic prefix")
            p.add_argument("--protocol", choices=("5", "3.1.1"), default="5", help="MQTT protocol version")
            p.add_argument("--site", default="demo-site")
            p.add_argument("--cell", default="cell-1")
            p.add_argument("--encoding", choices=("binary", "json"), default="binary")
            p.add_argument("--fast", action="store_true", help="as fast as possible instead of real time")
        else:
            p.add_argument("--out", type=Path, required=True)
            p.add_argument("--start", type=float, default=None, help="Unix time of the first sample")
    p = sub.add_parser("scenario", help="scenario: simulate a scenario file (docs/scenario-file.md)")
    p.add_argument("file", type=Path, help="scenario file (TOML)")
    p.add_argument("--record", type=Path, default=None, metavar="OUT", help="write the messages here (JSON lines)")
    p.add_argument("--truth", default=None, metavar="TRUTH", help="ground-truth file (default: OUT.truth.json)")
    p.add_argument("--publish", action="store_true", help="also publish to the broker (as fast as it takes them)")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=1883)
    p.add_argument("--prefix", default="shadow", help="topic prefix")
    p.add_argument("--protocol", choices=("5", "3.1.1"), default="5", help="MQTT protocol version")
    p.add_argument("--site", default="demo-site")
    p.add_argument("--cell", default="cell-1")
    p.add_argument("--encoding", choices=("binary", "json"), default="binary")
    p.set_defaults(handler=scenario)
    args = parser.parse_args(argv)
    try:
        return int(args.handler(args))
    except ShadowError as exc:
        print(f"python -m simulators {args.command}: error: {exc}", file=sys.stderr)  # noqa: T201
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
