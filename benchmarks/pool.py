"""Worker pool: how many 1 kHz robots 1, 2 and 4 ``shadow serve`` workers follow, and the fail-over gap.

Run: ``python -m benchmarks.pool`` (needs mosquitto and PostgreSQL installed; about 2 minutes). Everything runs
on loopback: a mosquitto and a throw-away PostgreSQL cluster started here, workers as subprocesses.

* **Capacity.** For W = 1, 2, 4 workers on one PostgreSQL store: the workers start and share the robots, then
  a backlog of ``BACKLOG_BATCHES`` messages per robot (10 samples each, the example delta's synthetic motion,
  so one message is 10 ms of a 1 kHz robot) is published as fast as one publisher can. The drain rate is
  messages stored per second, from the first to the last checkpoint write on the database's clock (a
  trigger logs them); divided by 100 messages/s it is the number of 1 kHz robots the pool keeps up with.
  The ratio to W = 1 shows how the pool scales *on this machine*: with 2 shared cores, 4 workers cannot be
  faster than 2.
* **Fail-over gap.** Two workers follow the robots; one is killed with SIGKILL. The gap is the time from the
  kill to the moment each of its robots was granted to the survivor, on the database's clock, with the
  lease length printed beside it (the gap is bounded by about lease + heartbeat).

Figures vary from run to run by up to 2x on a shared machine (FIELD-NOTES); compare the ratios of one run.
"""

from __future__ import annotations

import contextlib
import os
import pwd
import shutil
import signal
import subprocess
import tempfile
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import sqlalchemy as sa

from simulators.publish import BatchPublisher
from tests.pool.harness import PoolPlant, as_robot, wait_until
from tests.servers import POSTGRES_BIN_DIRS, free_loopback_port, start_mosquitto, wait_for_port
from tests.synthetic import delta_stream

N_ROBOTS = 16
BACKLOG_BATCHES = 300  # per robot: 3 s of a 1 kHz robot at 10 samples per message
SAMPLES_PER_BATCH = 10
MESSAGES_PER_ROBOT_S = 1000 / SAMPLES_PER_BATCH
WORKER_LEVELS = (1, 2, 4)
LEASE_S = 2.5
HEARTBEAT_S = 0.5


def _as_user(user: str | None, argv: list[str]) -> list[str]:
    return argv if user is None else ["runuser", "-u", user, "--", *argv]


@contextlib.contextmanager
def postgres(tmp: Path) -> Iterator[str]:
    """A throw-away PostgreSQL cluster; yields the URL of its ``postgres`` database."""
    bins = [d for d in POSTGRES_BIN_DIRS if (d / "initdb").exists()]
    if not bins:
        raise SystemExit("PostgreSQL is not installed: apt-get install -y postgresql")
    initdb, pg_ctl = str(bins[0] / "initdb"), str(bins[0] / "pg_ctl")
    user = "postgres" if os.geteuid() == 0 else None
    if user is not None:
        entry = pwd.getpwnam(user)
        os.chown(tmp, entry.pw_uid, entry.pw_gid)
    data, port = tmp / "data", free_loopback_port()
    subprocess.run(_as_user(user, [initdb, "-D", str(data), "-U", "shadow", "--auth=trust", "--no-sync"]),
                   check=True, capture_output=True)  # fmt: skip
    options = f"-c listen_addresses=127.0.0.1 -c port={port} -c unix_socket_directories={tmp} -c fsync=off"
    subprocess.run(_as_user(user, [pg_ctl, "-D", str(data), "-o", options, "-l", str(tmp / "pg.log"), "-w", "start"]),
                   check=True, capture_output=True)  # fmt: skip
    wait_for_port(port, timeout_s=20)
    try:
        yield f"postgresql+psycopg://shadow@127.0.0.1:{port}"
    finally:
        subprocess.run(_as_user(user, [pg_ctl, "-D", str(data), "-m", "immediate", "stop"]), capture_output=True)


def new_database(server_url: str, name: str) -> str:
    admin = sa.create_engine(f"{server_url}/postgres", isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(sa.text(f"CREATE DATABASE {name}"))
    admin.dispose()
    return f"{server_url}/{name}"


def new_plant(workdir: Path, broker_port: int, server_url: str, tag: str) -> PoolPlant:
    (workdir / tag).mkdir()
    plant = PoolPlant(workdir / tag, "127.0.0.1", broker_port, new_database(server_url, tag), N_ROBOTS,
                      f"bench{tag}{uuid.uuid4().hex[:4]}", lease_s=LEASE_S, heartbeat_s=HEARTBEAT_S)  # fmt: skip
    plant.install_write_log()
    plant.create_sessions()
    return plant


def drain_rate(plant: PoolPlant, n_workers: int) -> tuple[float, float]:
    """Messages per second the pool stored from a backlog, and the seconds it took."""
    names = {f"w{i}" for i in range(1, n_workers + 1)}
    for name in sorted(names):
        plant.start_worker(name)
    if not wait_until(lambda: plant.settled(names), 90):
        raise RuntimeError(f"{n_workers} workers did not share the robots: {plant.shares()}")
    batches = delta_stream(np.random.default_rng(7), duration_s=BACKLOG_BATCHES * SAMPLES_PER_BATCH / 1000).batches(
        "r", SAMPLES_PER_BATCH
    )
    publishers = [BatchPublisher(a, plant.mqtt) for a in plant.addresses]
    for p in publishers:
        p.connect()
    for batch in batches:
        for p, address in zip(publishers, plant.addresses, strict=True):
            p.publish(as_robot(batch, address.robot))
    for p in publishers:
        p.close()
    total = len(batches) * N_ROBOTS
    if not wait_until(lambda: sum(plant.stored_counts().values()) >= total, 300, step_s=0.2):
        raise RuntimeError(f"not everything was stored: {sum(plant.stored_counts().values())} of {total}")
    times = [w["at_s"] for w in plant.writes()]
    plant.stop_all()
    elapsed = max(times) - min(times)
    return total / elapsed, elapsed


def failover_gaps(plant: PoolPlant) -> list[float]:
    for name in ("w1", "w2"):
        plant.start_worker(name)
    if not wait_until(lambda: plant.settled({"w1", "w2"}), 90):
        raise RuntimeError(f"two workers did not share the robots: {plant.shares()}")
    victims = {rid for rid, owner in plant.live_owners().items() if owner == "w2"}
    killed_at = plant.now_s()
    plant.signal("w2", signal.SIGKILL)
    if not wait_until(lambda: plant.shares() == {"w1": N_ROBOTS}, 60):
        raise RuntimeError(f"the survivor did not take the robots over: {plant.shares()}")
    history = plant.history()
    plant.stop_all()
    return sorted(next(g["acquired_at_s"] for g in history[r] if g["owner"] == "w1") - killed_at for r in victims)


def main() -> int:
    started = time.monotonic()
    tmp = Path(tempfile.mkdtemp(prefix="shadow-bench-pool-"))
    try:
        (tmp / "broker").mkdir()
        (tmp / "pg").mkdir()
        broker = start_mosquitto(tmp / "broker", free_loopback_port())
        try:
            with postgres(tmp / "pg") as server_url:
                print(f"{N_ROBOTS} robots, backlog of {BACKLOG_BATCHES} messages of {SAMPLES_PER_BATCH} samples each "
                      f"per robot; lease {LEASE_S} s, heartbeat {HEARTBEAT_S} s; {os.cpu_count()} cores")  # fmt: skip
                print("workers  msgs/s  drain s  1 kHz robots  ratio to 1 worker")
                base = None
                for n in WORKER_LEVELS:
                    plant = new_plant(tmp, broker.port, server_url, f"w{n}")
                    try:
                        rate, elapsed = drain_rate(plant, n)
                    finally:
                        plant.close()
                    base = base or rate
                    robots = rate / MESSAGES_PER_ROBOT_S
                    print(f"{n:7d}  {rate:6.0f}  {elapsed:7.1f}  {robots:12.1f}  {rate / base:17.2f}")
                plant = new_plant(tmp, broker.port, server_url, "failover")
                try:
                    gaps = failover_gaps(plant)
                finally:
                    plant.close()
                worst = max(gaps) / LEASE_S
                print(f"fail-over after SIGKILL, {len(gaps)} robots: gap {min(gaps):.2f}-{max(gaps):.2f} s "
                      f"(lease {LEASE_S} s, heartbeat {HEARTBEAT_S} s; gap / lease {worst:.2f})")  # fmt: skip
        finally:
            broker.process.terminate()
            broker.process.wait(10)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    print(f"total time {time.monotonic() - started:.0f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
