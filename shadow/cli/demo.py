"""``shadow demo``: the whole chain on one machine with embedded defaults, as one process tree.

1. a local MQTT broker on 127.0.0.1 (mosquitto when installed, else the embedded pure-Python broker);
2. commissioning: a short healthy run of each simulated robot is recorded and ``shadow commission``
   identifies its baseline (friction, offsets, payload, noise), as an engineer would at start-up;
3. ``shadow serve`` on a SQLite file with the read-only API and the dashboard;
4. the simulator publishing one delta picker (1 kHz) and one hexapod (250 Hz) in real time, impacts included.

Everything stops on Ctrl-C or after ``--duration`` seconds. All traffic stays on loopback. The demo's
files (recordings, baselines, configuration, database) are kept in ``--workdir`` (default: a new
temporary folder, removed at the end).
"""

from __future__ import annotations

import argparse
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from types import FrameType

from shadow.errors import ShadowError
from shadow.ingest.broker import free_port, start_local_broker
from shadow.robots.description import example_paths

CAUTION = (
    "shadow is advisory only: it never sends anything to a robot controller. Keep the certified safety "
    "functions (ISO 10218-1/-2, ISO 13849) in place and defer to local codes and qualified people."
)
SITE, CELL = "demo-site", "cell-1"
# a few faults per robot in ten minutes, so the page shows events without staying on them (invented for the demo):
# one window in 25 (3-4 s each) with an impact, one delta cycle in 200 with a missed pick and one with a double pick
DEMO_IMPACT_FRACTION = 0.04
DEMO_PICK_FAULT_FRACTION = 0.005


@dataclass(frozen=True)
class DemoRobot:
    family: str
    robot: str
    seed: int
    sample_rate_hz: float
    # the healthy run commissioning calibrates on must hold every phase of the live motion: the hexapod's first
    # simulated windows are 2 s, its later ones 4 s; 12 s of it set collision thresholds of 7-9 N that three
    # move starts in 200 s of live motion crossed; 48 s set 17-22 N, and 286 s of the demo raised its 3 impacts
    # (peaks near 120 N) and nothing else
    healthy_run_s: float

    @property
    def description(self) -> Path:
        return next(p for p in example_paths() if self.family in p.name)


ROBOTS = (DemoRobot("delta", "picker-1", 11, 1000.0, 12.0), DemoRobot("hexapod", "aligner-1", 12, 250.0, 48.0))


class DemoError(ShadowError, RuntimeError):
    """A part of the demo failed to start."""


def register(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = commands.add_parser(
        "demo",
        help="run the demo: broker, simulated robots, shadow, dashboard",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument(
        "--duration", type=float, default=None, metavar="S", help="stop after S seconds (default: Ctrl-C)"
    )
    parser.add_argument(
        "--broker",
        choices=("auto", "mosquitto", "embedded"),
        default="auto",
        help="which local broker to start (default: mosquitto when installed)",
    )
    parser.add_argument("--port", type=int, default=8470, help="dashboard and API port on 127.0.0.1 (0: any free)")
    parser.add_argument("--workdir", type=Path, default=None, help="keep the demo's files here")
    parser.add_argument(
        "--commission-s", type=float, default=None, metavar="S", help="length of the healthy runs (default: 12 s "
        "of the delta, 48 s of the hexapod)"
    )  # fmt: skip
    parser.set_defaults(handler=run)


def _python(*args: str) -> list[str]:
    return [sys.executable, *args]


def _check(step: str, result: subprocess.CompletedProcess[str]) -> None:
    if result.returncode != 0:
        tail = (result.stderr or result.stdout).strip().splitlines()[-5:]
        raise DemoError(f"{step} failed (exit {result.returncode}): " + " | ".join(tail))


def commission(robot: DemoRobot, workdir: Path, duration_s: float) -> Path:
    """Record a healthy run of the simulated robot and identify its baseline with ``shadow commission``."""
    recording = workdir / f"{robot.robot}-healthy.jsonl"
    baseline = workdir / f"{robot.robot}-baseline.json"
    _check(
        f"recording the healthy run of {robot.robot}",
        subprocess.run(
            _python(
                "-m",
                "simulators",
                "record",
                "--family",
                robot.family,
                "--robot",
                robot.robot,
                "--seed",
                str(robot.seed + 100),
                "--duration",
                str(duration_s),
                "--no-impacts",
                "--out",
                str(recording),
            ),
            capture_output=True,
            text=True,
            check=False,
        ),  # fmt: skip
    )
    _check(
        f"commissioning {robot.robot}",
        subprocess.run(
            _python(
                "-m",
                "shadow",
                "commission",
                str(robot.description),
                str(recording),
                "-o",
                str(baseline),
                "--robot",
                robot.robot,
            ),
            capture_output=True,
            text=True,
            check=False,
        ),  # fmt: skip
    )
    return baseline


def write_config(workdir: Path, broker_port: int, api_port: int, baselines: dict[str, Path], protocol: str) -> Path:
    lines = [
        "# written by shadow demo",
        "[mqtt]",
        'host = "127.0.0.1"',
        f"port = {broker_port}",
        f'protocol = "{protocol}"',
        "[database]",
        f'url = "sqlite:///{workdir / "shadow-demo.db"}"',
        "raw_retention_s = 600",
        "[api]",
        'host = "127.0.0.1"',
        f"port = {api_port}",
    ]
    for r in ROBOTS:
        lines += [
            "[[robots]]",
            f'site = "{SITE}"',
            f'cell = "{CELL}"',
            f'robot = "{r.robot}"',
            f'description = "{r.description}"',
            f'baseline = "{baselines[r.robot]}"',
            f"sample_rate_hz = {r.sample_rate_hz:g}",
        ]
    path = workdir / "shadow-demo.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


def _stop(processes: list[subprocess.Popen[bytes]]) -> None:
    for p in processes:
        if p.poll() is None:
            p.send_signal(signal.SIGTERM)
    for p in processes:
        try:
            p.wait(timeout=10)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait(timeout=5)


def run(args: argparse.Namespace) -> int:
    if args.duration is not None and args.duration <= 0:
        raise SystemExit("shadow demo: error: --duration must be > 0 seconds")
    if args.commission_s is not None and not args.commission_s > 0:
        raise SystemExit("shadow demo: error: --commission-s must be > 0 seconds")
    stop = threading.Event()

    def on_signal(signum: int, frame: FrameType | None) -> None:
        stop.set()

    previous = signal.signal(signal.SIGTERM, on_signal)
    print(CAUTION, flush=True)
    temporary = args.workdir is None
    workdir = Path(tempfile.mkdtemp(prefix="shadow-demo-")) if temporary else args.workdir
    workdir.mkdir(parents=True, exist_ok=True)
    started = time.monotonic()
    broker = start_local_broker(prefer=args.broker)
    processes: list[subprocess.Popen[bytes]] = []
    try:
        print(f"broker: {broker.kind} on mqtt://{broker.host}:{broker.port}", flush=True)
        print("commissioning: recording a healthy run of each robot and identifying its baseline ...", flush=True)
        baselines = {
            r.robot: commission(r, workdir, r.healthy_run_s if args.commission_s is None else args.commission_s)
            for r in ROBOTS
        }
        api_port = args.port or free_port()
        protocol = "5" if broker.kind == "mosquitto" else "3.1.1"  # the embedded broker speaks MQTT 3.1.1 only
        config = write_config(workdir, broker.port, api_port, baselines, protocol)
        log = open(workdir / "demo.log", "ab")  # noqa: SIM115 - closed when the demo ends
        processes.append(subprocess.Popen(_python("-m", "shadow", "serve", "--config", str(config)), stdout=log,
                                          stderr=log))  # fmt: skip
        for r in ROBOTS:
            processes.append(
                subprocess.Popen(
                    _python(
                        "-m",
                        "simulators",
                        "live",
                        "--family",
                        r.family,
                        "--robot",
                        r.robot,
                        "--seed",
                        str(r.seed),
                        "--port",
                        str(broker.port),
                        "--site",
                        SITE,
                        "--cell",
                        CELL,
                        "--protocol",
                        protocol,
                        "--truth",
                        str(workdir / f"{r.robot}-truth.json"),
                        "--impact-fraction",
                        str(DEMO_IMPACT_FRACTION),
                        "--pick-fault-fraction",
                        str(DEMO_PICK_FAULT_FRACTION),
                    ),
                    stdout=log,
                    stderr=log,
                )  # fmt: skip
            )
        print(f"dashboard: http://127.0.0.1:{api_port}/   (API: http://127.0.0.1:{api_port}/api/v1/robots)", flush=True)
        print(f"files: {workdir}; stop with Ctrl-C", flush=True)
        while not stop.is_set():
            if args.duration is not None and time.monotonic() - started >= args.duration:
                break
            dead = [p for p in processes if p.poll() is not None] + ([broker.process] if broker.process.poll() else [])
            if dead:
                print(f"a part of the demo exited early (code {dead[0].returncode}); see {workdir / 'demo.log'}",
                      file=sys.stderr)  # fmt: skip
                return 1
            stop.wait(0.2)
    except KeyboardInterrupt:
        pass
    finally:
        _stop(processes)
        broker.stop()
        signal.signal(signal.SIGTERM, previous)
        if temporary:
            shutil.rmtree(workdir, ignore_errors=True)
    print("demo stopped", flush=True)
    return 0
