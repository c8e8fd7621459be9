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
import signal
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


def start_mosquitto(workdir: Path, port: int, *, persistence: bool = False) -> Broker:
    """Start mosquitto with a generated configuration; logs go to ``workdir/mosquitto.log``.

    With ``persistence`` the broker keeps its sessions and queued messages in ``workdir`` and saves
    them after every change (``autosave_on_changes`` with an interval of 1), so a broker killed with
    SIGKILL and started again on the same configuration resumes from its last change.
    """
    exe = find_executable("mosquitto", [Path("/usr/sbin")])
    config = workdir / "mosquitto.conf"
    if persistence:
        stored = ["persistence true", f"persistence_location {workdir}/", "autosave_on_changes true",
                  "autosave_interval 1"]  # fmt: skip
    else:
        stored = ["persistence false"]
    config.write_text(
        "\n".join(
            [
                f"listener {port} 127.0.0.1",
                "allow_anonymous true",
                *stored,
                "log_dest stdout",
                "max_queued_messages 100000",
                # running as root, mosquitto would otherwise switch to its own user
                f"user {pwd.getpwuid(os.getuid()).pw_name}",
                "",
            ]
        )
    )
    return _run_mosquitto(exe, config, port)


def _run_mosquitto(exe: str, config: Path, port: int) -> Broker:
    log = open(config.parent / "mosquitto.log", "ab")  # noqa: SIM115 - closed with the process
    process = subprocess.Popen([exe, "-c", str(config)], stdout=log, stderr=subprocess.STDOUT)
    wait_for_port(port, timeout_s=10, process=process)
    return Broker("127.0.0.1", port, process, config)


class RestartableBroker:
    """A persistent mosquitto that a test can kill (SIGKILL) and start again on the same port and store."""

    def __init__(self, workdir: Path) -> None:
        self.workdir = workdir
        self.port = free_loopback_port()
        self.host = "127.0.0.1"
        self.current: Broker | None = start_mosquitto(workdir, self.port, persistence=True)

    def kill(self) -> None:
        """SIGKILL: no clean shutdown, no final save of the persistence file."""
        if self.current is not None:
            self.current.process.send_signal(signal.SIGKILL)
            self.current.process.wait(timeout=10)
            self.current = None

    def restart(self) -> None:
        """Start again on the same port and configuration (so from the same persistence file)."""
        if self.current is not None:
            raise RuntimeError("the broker is still running")
        exe = find_executable("mosquitto", [Path("/usr/sbin")])
        self.current = _run_mosquitto(exe, self.workdir / "mosquitto.conf", self.port)

    def stop(self) -> None:
        if self.current is not None:
            self.current.process.terminate()
            try:
                self.current.process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.current.process.kill()
            self.current = None


@pytest.fixture
def restartable_broker() -> Iterator[RestartableBroker]:
    """A mosquitto of its own, with persistence on, for one test that kills and restarts it."""
    with tempfile.TemporaryDirectory(prefix="shadow-mosquitto-p-") as tmp:
        broker = RestartableBroker(Path(tmp))
        try:
            yield broker
        finally:
            broker.stop()


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
    pg_ctl: str = "pg_ctl"
    run_as: str | None = None  # the unprivileged account the server runs as, when the tests run as root
    start_options: str = ""
    log_path: Path | None = None

    def stop(self, mode: str = "fast") -> None:
        """Shut the server down (``pg_ctl -m fast``: open connections are cut); data_dir and port stay."""
        subprocess.run(_as_user(self.run_as, [self.pg_ctl, "-D", str(self.data_dir), "-m", mode, "-w", "stop"]),
                       check=True, capture_output=True)  # fmt: skip

    def start(self) -> None:
        """Start the server again on the same data directory and port."""
        log = ["-l", str(self.log_path)] if self.log_path is not None else []
        subprocess.run(
            _as_user(
                self.run_as, [self.pg_ctl, "-D", str(self.data_dir), "-o", self.start_options, *log, "-w", "start"]
            ),
            check=True,
            capture_output=True,
        )
        wait_for_port(self.port, timeout_s=20)

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
        yield PostgresServer("127.0.0.1", port, db_user, data_dir, pg_ctl, run_as, options, tmp / "server.log")
    finally:
        if data_dir.exists():
            subprocess.run(
                _as_user(run_as, [pg_ctl, "-D", str(data_dir), "-m", "immediate", "stop"]), capture_output=True
            )
        shutil.rmtree(tmp, ignore_errors=True)
