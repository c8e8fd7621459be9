"""Start a local MQTT broker for the demo: mosquitto when installed, else the embedded amqtt broker.

Both bind to loopback only. The embedded broker runs in a child Python process so that the demo
stays one process tree and stops with it. It is for the demo, not for load (see DEVELOPERS.md).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import logging
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

from shadow.errors import ShadowError

log = logging.getLogger(__name__)

LOOPBACK = "127.0.0.1"


class BrokerStartError(ShadowError, RuntimeError):
    """The local broker could not be started."""


@dataclass
class LocalBroker:
    """A broker child process on 127.0.0.1."""

    kind: str  # "mosquitto" or "embedded"
    host: str
    port: int
    process: subprocess.Popen[bytes]
    workdir: Path = field(repr=False)

    def stop(self, *, timeout_s: float = 5.0) -> None:
        """Terminate the broker and wait for it (kill after ``timeout_s``)."""
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=timeout_s)
        shutil.rmtree(self.workdir, ignore_errors=True)


def free_port() -> int:
    """A TCP port that was free on loopback a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return int(s.getsockname()[1])


def _wait_listening(port: int, process: subprocess.Popen[bytes], timeout_s: float) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise BrokerStartError(f"broker exited with code {process.returncode} before listening on port {port}")
        with contextlib.suppress(OSError), socket.create_connection((LOOPBACK, port), timeout=0.2):
            return
        time.sleep(0.05)
    process.kill()
    raise BrokerStartError(f"broker did not listen on {LOOPBACK}:{port} within {timeout_s} s")


def start_local_broker(port: int | None = None, *, prefer: str = "auto", timeout_s: float = 15.0) -> LocalBroker:
    """Start mosquitto (``prefer="mosquitto"`` or auto when found) or the embedded broker on loopback."""
    port = port or free_port()
    workdir = Path(tempfile.mkdtemp(prefix="shadow-broker-"))
    mosquitto = shutil.which("mosquitto") or ("/usr/sbin/mosquitto" if Path("/usr/sbin/mosquitto").exists() else None)
    if prefer == "mosquitto" and mosquitto is None:
        raise BrokerStartError("mosquitto is not installed (apt-get install mosquitto), use --broker embedded")
    if mosquitto is not None and prefer in ("auto", "mosquitto"):
        import getpass

        config = workdir / "mosquitto.conf"
        config.write_text(
            f"listener {port} {LOOPBACK}\nallow_anonymous true\npersistence false\nlog_dest stdout\n"
            f"user {getpass.getuser()}\n"
        )
        log_file = open(workdir / "mosquitto.log", "ab")  # noqa: SIM115 - lives as long as the broker
        process = subprocess.Popen([mosquitto, "-c", str(config)], stdout=log_file, stderr=subprocess.STDOUT)
        kind = "mosquitto"
    else:
        process = subprocess.Popen(
            [sys.executable, "-m", "shadow.ingest.broker", "--port", str(port)],
            stdout=subprocess.DEVNULL,
            stderr=open(workdir / "embedded.log", "ab"),  # noqa: SIM115
        )
        kind = "embedded"
    _wait_listening(port, process, timeout_s)
    log.info("started %s broker on %s:%d", kind, LOOPBACK, port)
    return LocalBroker(kind, LOOPBACK, port, process, workdir)


async def _run_embedded(port: int) -> None:
    from amqtt.broker import Broker

    config = {
        "listeners": {"default": {"type": "tcp", "bind": f"{LOOPBACK}:{port}"}},
        "plugins": {"amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": True}},
    }
    broker = Broker(config)
    await broker.start()
    await asyncio.Event().wait()


def main(argv: list[str] | None = None) -> None:
    """Run the embedded broker in the foreground (used as a child process by the demo)."""
    parser = argparse.ArgumentParser(prog="python -m shadow.ingest.broker")
    parser.add_argument("--port", type=int, required=True)
    args = parser.parse_args(argv)
    with contextlib.suppress(KeyboardInterrupt):
        asyncio.run(_run_embedded(args.port))


if __name__ == "__main__":
    main()
