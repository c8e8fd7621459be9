"""A small plant for the pool: simulated robots on a real mosquitto, ``shadow serve`` workers as subprocesses.

Used by tests/pool/test_pool_processes.py and benchmarks/pool.py. Everything runs on loopback.

* The robots' persistent sessions are created before any worker runs (a client with each robot's client
  id subscribes once and leaves), so the broker keeps every message from the first one on, whoever
  follows the robot and whenever.
* A trigger on ``checkpoints`` (installed by :meth:`PoolPlant.install_write_log`) records every
  checkpoint write with its fencing token, last sequence number and the database's clock: the record of
  who wrote what when, independent of the workers' own account.
"""

from __future__ import annotations

import ast
import contextlib
import signal
import subprocess
import sys
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import sqlalchemy as sa
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from shadow.ingest.mqtt import MqttSettings, client_id_for
from shadow.ingest.topics import RobotAddress, TopicLayout
from shadow.ingest.wire import SampleBatch
from shadow.store import schema
from shadow.store.repository import SqlStore
from simulators.publish import BatchPublisher
from tests.synthetic import EXAMPLE_DELTA

ROOT = Path(__file__).resolve().parents[2]
NOW_SQL = "extract(epoch from clock_timestamp())::float8"

WRITE_LOG_SQL = [
    "CREATE TABLE checkpoint_writes (robot_id text, fencing_token bigint, last_seq bigint, at_s float8)",
    f"""CREATE FUNCTION log_checkpoint_write() RETURNS trigger AS $$
        BEGIN
            INSERT INTO checkpoint_writes VALUES (NEW.robot_id, NEW.fencing_token, NEW.last_seq, {NOW_SQL});
            RETURN NEW;
        END $$ LANGUAGE plpgsql""",
    """CREATE TRIGGER checkpoint_written AFTER INSERT OR UPDATE ON checkpoints
        FOR EACH ROW EXECUTE FUNCTION log_checkpoint_write()""",
]


def wait_until(predicate: Callable[[], bool], timeout_s: float, *, step_s: float = 0.1) -> bool:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(step_s)
    return predicate()


@dataclass
class Worker:
    """One ``shadow serve`` subprocess."""

    name: str
    process: subprocess.Popen[bytes]
    log_path: Path

    def log(self) -> str:
        return self.log_path.read_text(errors="replace")

    def final_counters(self) -> dict[str, Any] | None:
        """The pool counters the worker printed when it left the pool (None: it did not leave cleanly)."""
        for line in self.log().splitlines():
            if ": left the pool; " in line:
                return dict(ast.literal_eval(line.split(": left the pool; ", 1)[1]))
        return None


@dataclass
class Publishing:
    """A running publisher: how many batches each robot has sent so far."""

    sent: int = 0
    stop: threading.Event = field(default_factory=threading.Event)
    failures: list[BaseException] = field(default_factory=list)
    thread: threading.Thread | None = None

    def running(self) -> bool:
        return self.thread is not None and self.thread.is_alive()


@dataclass
class PoolPlant:
    """Robots, their sessions, a configuration file and the workers following them."""

    workdir: Path
    broker_host: str
    broker_port: int
    database_url: str
    n_robots: int
    cell: str
    lease_s: float = 2.5
    heartbeat_s: float = 0.5
    sample_rate_hz: float = 1000.0
    workers: dict[str, Worker] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.addresses = [RobotAddress("kestrel", self.cell, f"r{i:02d}") for i in range(self.n_robots)]
        self.robot_ids = [str(a) for a in self.addresses]
        self.prefix = f"shadow-{self.cell}"
        self.mqtt = MqttSettings(host=self.broker_host, port=self.broker_port, client_id_prefix=self.prefix)
        self.layout = TopicLayout()
        self.config_path = self.config_for(self.broker_port)
        self.store = SqlStore(self.database_url)  # migrates, so the trigger can be installed before workers

    def config_for(self, broker_port: int) -> Path:
        """The pool's configuration file with the broker at ``broker_port`` (a proxy in front of it, for one
        worker); everything else, the robots' session ids included, is the same for every worker."""
        path = self.workdir / ("pool.toml" if broker_port == self.broker_port else f"pool-{broker_port}.toml")
        robots = "".join(
            f'[[robots]]\nsite = "{a.site}"\ncell = "{a.cell}"\nrobot = "{a.robot}"\n'
            f'description = "{ROOT / EXAMPLE_DELTA}"\nsample_rate_hz = {self.sample_rate_hz}\n\n'
            for a in self.addresses
        )
        path.write_text(
            f'[mqtt]\nhost = "{self.broker_host}"\nport = {broker_port}\nclient_id_prefix = "{self.prefix}"\n\n'
            f'[database]\nurl = "{self.database_url}"\nraw_retention_s = 3600\n\n'
            f"[pool]\nlease_s = {self.lease_s}\nheartbeat_s = {self.heartbeat_s}\n\n{robots}"
        )
        return path

    # --- set-up -------------------------------------------------------------------------------
    def install_write_log(self) -> None:
        with self.store.engine.begin() as conn:
            for statement in WRITE_LOG_SQL:
                conn.execute(sa.text(statement))

    def create_sessions(self) -> None:
        """Each robot's persistent session, subscribed, so the broker queues from now on."""
        for address, rid in zip(self.addresses, self.robot_ids, strict=True):
            done = threading.Event()
            client = mqtt.Client(
                mqtt.CallbackAPIVersion.VERSION2, client_id=client_id_for(rid, self.prefix), protocol=mqtt.MQTTv5
            )
            client.on_subscribe = lambda c, u, mid, codes, props, done=done: done.set()
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = 3600
            client.connect(self.broker_host, self.broker_port, clean_start=False, properties=props)
            client.loop_start()
            result, _ = client.subscribe(self.layout.samples_topic(address), qos=1)
            if result != mqtt.MQTT_ERR_SUCCESS or not done.wait(10):
                raise RuntimeError(f"could not create the session of {rid}: {mqtt.error_string(result)}")
            client.disconnect()
            client.loop_stop()

    # --- workers ------------------------------------------------------------------------------
    def start_worker(self, name: str, *, broker_port: int | None = None) -> Worker:
        """``shadow serve --worker name``; ``broker_port``: reach the broker there (a proxy) instead."""
        config = self.config_path if broker_port is None else self.config_for(broker_port)
        log_path = self.workdir / f"{name}.log"
        log = log_path.open("ab")
        process = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "shadow",
                "-v",
                "serve",
                "--config",
                str(config),
                "--worker",
                name,
                "--no-api",
            ],  # fmt: skip
            stdout=log,
            stderr=subprocess.STDOUT,
            cwd=ROOT,
        )
        log.close()
        worker = Worker(name, process, log_path)
        self.workers[name] = worker
        return worker

    def signal(self, name: str, signum: int) -> None:
        self.workers[name].process.send_signal(signum)

    def stop_all(self, *, timeout_s: float = 20.0) -> None:
        """SIGTERM every running worker (they leave the pool cleanly), SIGKILL what does not exit."""
        running = [w for w in self.workers.values() if w.process.poll() is None]
        for w in running:
            w.process.send_signal(signal.SIGCONT)  # a stopped process cannot handle SIGTERM
            w.process.terminate()
        for w in running:
            try:
                w.process.wait(timeout_s)
            except subprocess.TimeoutExpired:
                w.process.kill()
                w.process.wait(10)

    def close(self) -> None:
        self.stop_all()
        self.store.close()

    # --- publishing ---------------------------------------------------------------------------
    @contextlib.contextmanager
    def publishing(self, batches: Sequence[SampleBatch], period_s: float) -> Iterator[Publishing]:
        """Publish ``batches`` (one robot's stream) for every robot, one batch per robot every ``period_s``,
        until the stream ends or the context closes; ``Publishing.sent`` is then the number of batches
        each robot published."""
        state = Publishing()

        def run() -> None:
            publishers = [BatchPublisher(a, self.mqtt) for a in self.addresses]
            try:
                for p in publishers:
                    p.connect()
                t0 = time.monotonic()
                for k, batch in enumerate(batches):
                    if state.stop.is_set():
                        break
                    time.sleep(max(0.0, t0 + period_s * k - time.monotonic()))
                    for p, address in zip(publishers, self.addresses, strict=True):
                        p.publish(as_robot(batch, address.robot))
                    state.sent = k + 1
            except BaseException as exc:  # reported when the context closes
                state.failures.append(exc)
            finally:
                for p in publishers:
                    with contextlib.suppress(Exception):
                        p.close()

        state.thread = threading.Thread(target=run, name="pool-publisher", daemon=True)
        state.thread.start()
        try:
            yield state
        finally:
            state.stop.set()
            state.thread.join(60)
            if state.failures:
                raise state.failures[0]

    # --- reading back -------------------------------------------------------------------------
    def now_s(self) -> float:
        with self.store.engine.connect() as conn:
            return float(conn.execute(sa.text(f"select {NOW_SQL}")).scalar_one())

    def live_owners(self) -> dict[str, str]:
        """robot -> owner of every unexpired lease."""
        t = schema.robot_leases
        with self.store.engine.connect() as conn:
            rows = conn.execute(
                sa.select(t.c.robot_id, t.c.owner).where(t.c.owner.is_not(None), t.c.expires_at_s > sa.text(NOW_SQL))
            )
            return {str(r.robot_id): str(r.owner) for r in rows}

    def shares(self) -> dict[str, int]:
        """owner -> number of robots it holds under an unexpired lease."""
        return dict(Counter(self.live_owners().values()))

    def settled(self, owners: set[str]) -> bool:
        """Every robot held, by exactly these workers, each holding its share ``ceil(robots / workers)``."""
        live = self.live_owners()
        share = -(-self.n_robots // len(owners))
        counts = Counter(live.values())
        return len(live) == self.n_robots and set(counts) == owners and max(counts.values()) <= share

    def history(self) -> dict[str, list[dict[str, Any]]]:
        h = schema.lease_history
        with self.store.engine.connect() as conn:
            rows = conn.execute(sa.select(h).order_by(h.c.robot_id, h.c.fencing_token))
            out: dict[str, list[dict[str, Any]]] = {}
            for r in rows:
                out.setdefault(str(r.robot_id), []).append(dict(r._mapping))
            return out

    def writes(self) -> list[dict[str, Any]]:
        with self.store.engine.connect() as conn:
            rows = conn.execute(sa.text("select * from checkpoint_writes order by at_s"))
            return [dict(r._mapping) for r in rows]

    def raw_seqs(self, robot_id: str) -> list[int]:
        t = schema.raw_batches
        with self.store.engine.connect() as conn:
            rows = conn.execute(sa.select(t.c.seq).where(t.c.robot_id == robot_id).order_by(t.c.seq))
            return [int(r[0]) for r in rows]

    def stored_counts(self) -> dict[str, int]:
        t = schema.raw_batches
        with self.store.engine.connect() as conn:
            rows = conn.execute(sa.select(t.c.robot_id, sa.func.count()).group_by(t.c.robot_id))
            return {str(r[0]): int(r[1]) for r in rows}

    def first_writes_after(self, t_s: float) -> dict[str, float]:
        """robot -> database time of its first checkpoint write after ``t_s`` by a lease granted after ``t_s``
        (the first result of a new owner; needs the write log)."""
        h = schema.lease_history
        with self.store.engine.connect() as conn:
            grants = conn.execute(sa.select(h.c.robot_id, h.c.fencing_token).where(h.c.acquired_at_s > t_s)).all()
            newer = {(str(r.robot_id), int(r.fencing_token)) for r in grants}
            rows = conn.execute(sa.text("select * from checkpoint_writes where at_s > :t order by at_s"), {"t": t_s})
            first: dict[str, float] = {}
            for w in rows:
                if (w.robot_id, w.fencing_token) in newer:
                    first.setdefault(str(w.robot_id), float(w.at_s))
            return first

    def first_stored_at(self) -> dict[str, float]:
        """robot -> database time of its first checkpoint write (needs the write log)."""
        with self.store.engine.connect() as conn:
            rows = conn.execute(sa.text("select robot_id, min(at_s) from checkpoint_writes group by robot_id"))
            return {str(r[0]): float(r[1]) for r in rows}


def as_robot(batch: SampleBatch, robot: str) -> SampleBatch:
    """The same samples, sent as another robot's."""
    return SampleBatch(
        robot_id=robot,
        seq=batch.seq,
        position_unit=batch.position_unit,
        effort_kind=batch.effort_kind,
        t=batch.t,
        q=batch.q,
        effort=batch.effort,
        gripping=batch.gripping,
    )


def ownership_gaps(history: dict[str, list[dict[str, Any]]]) -> list[tuple[str, float, str]]:
    """(robot, gap [s], how the earlier lease ended) between consecutive grants; negative means an overlap."""
    gaps = []
    for rid, grants in history.items():
        for before, after in zip(grants, grants[1:], strict=False):
            end = before["ended_at_s"]
            gaps.append((rid, float("-inf") if end is None else after["acquired_at_s"] - end, str(before["end_cause"])))
    return gaps


def stale_writes(history: dict[str, list[dict[str, Any]]], writes: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Checkpoint writes made under a token after a newer token of the same robot had been granted."""
    stale = []
    for w in writes:
        newer = [g for g in history.get(w["robot_id"], []) if g["fencing_token"] > (w["fencing_token"] or 0)]
        if w["fencing_token"] is None or any(g["acquired_at_s"] < w["at_s"] for g in newer):
            stale.append(w)
    return stale


def regressions(writes: list[dict[str, Any]]) -> list[tuple[dict[str, Any], dict[str, Any]]]:
    """Consecutive checkpoint writes of a robot whose last sequence number went backwards."""
    last: dict[str, dict[str, Any]] = {}
    out = []
    for w in writes:
        prev = last.get(w["robot_id"])
        if prev is not None and w["last_seq"] < prev["last_seq"]:
            out.append((prev, w))
        last[w["robot_id"]] = w
    return out
