"""Real servers for the integration tests, started on loopback and torn down after the session.

``mosquitto_broker`` starts a mosquitto from a generated configuration on a free 127.0.0.1 port;
``postgres_server`` creates a throw-away PostgreSQL cluster in a temporary directory (initdb + pg_ctl),
run as an unprivileged user when the tests run as root, since the server refuses to run as root.
Tests that use them carry the ``mosquitto`` or ``postgres`` marker; CI installs both servers and runs them all.
A test asking for a server that is not installed fails with the install command in the message (it is
never skipped silently).
"""

from __future__ import annotations

import contextlib
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

POSTGRES_BIN_DIRS = sorted(Path("/usr/lib/postgresql").glob("*/bin"), reverse=True)


def free_loopback_port() -> int:
    """A TCP port that was free on 127.0.0.1 a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_for_port(port: int, *, timeout_s: float, process: subprocess.Popen[bytes] | None = None) -> None:
    """Block until something accepts connections on 127.0.0.1:port, or fail naming the server."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if process is not None and process.poll() is not None:
            raise RuntimeError(f"server on port {port} exited early with code {process.returncode}")
        with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", port), timeout=0.2):
            return
        time.sleep(0.05)
    raise TimeoutError(f"nothing listens on 127.0.0.1:{port} after {timeout_s} s")


def find_executable(name: str, extra_dirs: list[Path] | None = None) -> str:
    """Path of an installed server binary, or a test failure that says how to install it."""
    found = shutil.which(name)
    for d in extra_dirs or []:
        if found is None and (d / name).exists():
            found = str(d / name)
    if found is None:
        package = "mosquitto" if name.startswith("mosquitto") else "postgresql"
        pytest.fail(f"{name} is not installed; run: apt-get install -y {package}")
    return found


@dataclass(frozen=True)
class Broker:
    """A running mosquitto on loopback."""

    host: str
    port: int
    process: subprocess.Popen[bytes]
    config_path: Path


def start_mosquitto(workdir: Path, port: int) -> Broker:
    """Start mosquitto with a generated configuration; logs go to ``workdir/mosquitto.log``."""
    exe = find_executable("mosquitto", [Path("/usr/sbin")])
    config = workdir / "mosquitto.conf"
    config.write_text(
        "\n".join(
            [
                f"listener {port} 127.0.0.1",
                "allow_anonymous true",
                "persistence false",
                "log_dest stdout",
                "max_queued_messages 100000",
                # running as root, mosquitto would otherwise switch to its own user
                f"user {pwd.getpwuid(os.getuid()).pw_name}",
                "",
            ]
        )
    )
    log = open(workdir / "mosquitto.log", "ab")  # noqa: SIM115 - closed with the process
    process = subprocess.Popen([exe, "-c", str(config)], stdout=log, stderr=subprocess.STDOUT)
    wait_for_port(port, timeout_s=10, process=process)
    return Broker("127.0.0.1", port, process, config)


@pytest.fixture(scope="session")
def mosquitto_broker() -> Iterator[Broker]:
    """A real mosquitto on a free loopback port for the whole test session."""
    with tempfile.TemporaryDirectory(prefix="shadow-mosquitto-") as tmp:
        broker = start_mosquitto(Path(tmp), free_loopback_port())
        try:
            yield broker
        finally:
            broker.process.terminate()
            try:
                broker.process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                broker.process.kill()


@dataclass(frozen=True)
class PostgresServer:
    """A running throw-away PostgreSQL cluster on loopback (trust authentication)."""

    host: str
    port: int
    user: str
    data_dir: Path

    def url(self, database: str = "postgres", driver: str = "psycopg") -> str:
        """SQLAlchemy URL of a database on this server."""
        return f"postgresql+{driver}://{self.user}@{self.host}:{self.port}/{database}"


def _as_user(user: str | None, argv: list[str]) -> list[str]:
    if user is None:
        return argv
    return ["runuser", "-u", user, "--", *argv]


@pytest.fixture(scope="session")
def postgres_server() -> Iterator[PostgresServer]:
    """A real PostgreSQL in a temporary data directory, for the whole test session."""
    initdb = find_executable("initdb", POSTGRES_BIN_DIRS)
    pg_ctl = find_executable("pg_ctl", POSTGRES_BIN_DIRS)
    run_as: str | None = None
    if os.geteuid() == 0:  # the server refuses root: use the packaged unprivileged account
        run_as = "postgres"
        try:
            pwd.getpwnam(run_as)
        except KeyError:
            pytest.fail("running as root needs a 'postgres' user: apt-get install -y postgresql creates it")
    tmp = Path(tempfile.mkdtemp(prefix="shadow-pg-"))
    data_dir = tmp / "data"
    port = free_loopback_port()
    try:
        if run_as is not None:
            entry = pwd.getpwnam(run_as)
            os.chown(tmp, entry.pw_uid, entry.pw_gid)
        db_user = "shadow"
        subprocess.run(
            _as_user(run_as, [initdb, "-D", str(data_dir), "-U", db_user, "--auth=trust", "-E", "UTF8", "--no-sync"]),
            check=True,
            capture_output=True,
        )
        options = f"-c listen_addresses=127.0.0.1 -c port={port} -c unix_socket_directories={tmp} -c fsync=off"
        subprocess.run(
            _as_user(
                run_as, [pg_ctl, "-D", str(data_dir), "-o", options, "-l", str(tmp / "server.log"), "-w", "start"]
            ),
            check=True,
            capture_output=True,
        )
        wait_for_port(port, timeout_s=20)
        yield PostgresServer("127.0.0.1", port, db_user, data_dir)
    finally:
        if data_dir.exists():
            subprocess.run(
                _as_user(run_as, [pg_ctl, "-D", str(data_dir), "-m", "immediate", "stop"]), capture_output=True
            )
        shutil.rmtree(tmp, ignore_errors=True)
