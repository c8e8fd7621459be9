"""``shadow demo``: the whole chain on one machine with embedded defaults.

Starts, as one process tree, a local MQTT broker (mosquitto when installed, else the embedded
pure-Python broker), then the parts of shadow that follow the stream, and stops everything on
Ctrl-C or after ``--duration`` seconds. All network traffic stays on 127.0.0.1.
"""

from __future__ import annotations

import argparse
import signal
import sys
import threading
import time
from types import FrameType

from shadow.ingest.broker import start_local_broker

CAUTION = (
    "shadow is advisory only: it never sends anything to a robot controller. Keep the certified safety "
    "functions (ISO 10218-1/-2, ISO 13849) in place and defer to local codes and qualified people."
)


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
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.duration is not None and args.duration <= 0:
        raise SystemExit("shadow demo: error: --duration must be > 0 seconds")
    stop = threading.Event()

    def on_signal(signum: int, frame: FrameType | None) -> None:
        stop.set()

    previous = signal.signal(signal.SIGTERM, on_signal)
    print(CAUTION, flush=True)
    broker = start_local_broker(prefer=args.broker)
    print(f"broker: {broker.kind} on mqtt://{broker.host}:{broker.port}", flush=True)
    started = time.monotonic()
    try:
        while not stop.is_set():
            if args.duration is not None and time.monotonic() - started >= args.duration:
                break
            if broker.process.poll() is not None:
                print(f"broker exited with code {broker.process.returncode}", file=sys.stderr)
                return 1
            stop.wait(0.2)
    except KeyboardInterrupt:
        pass
    finally:
        broker.stop()
        signal.signal(signal.SIGTERM, previous)
    print("demo stopped", flush=True)
    return 0
