"""Worker pool: how many 1 kHz robots 1, 2 and 4 ``shadow serve`` workers keep up with, and the fail-over gaps.

Run: ``python -m benchmarks.pool`` (about 6 minutes) or ``python -m benchmarks.pool --quick`` (about 3). Needs
mosquitto and PostgreSQL installed; everything runs on loopback: a mosquitto and a throw-away PostgreSQL
cluster started here, workers as ``shadow serve --worker`` subprocesses, robots simulated in publisher
subprocesses.

* **Robots.** One closed-loop simulation of the example delta (``simulators.live``: pick-and-place windows
  with impacts, 1 kHz, 10 samples per message) is run once; publisher processes replay it for every robot
  in real time (QoS 1, the wire format of ``simulators.publish``), stamped with the wall clock, with the
  feed's pause between windows. See :func:`publish_robots` for why not one connection per robot.
* **Robots followed.** A trial starts W workers on a fresh database and N robots, lets the workers share
  them, publishes for a warm-up and a measured window, and samples every robot's *lag* twice a second:
  the database's clock minus the newest sample time in the robot's checkpoint (the checkpoint is written
  with the step's results, so this is stream time against processed time; it includes the pause between
  windows). The trial keeps up when the worst robot's lag stayed bounded, at most ``LAG_LIMIT_S`` at 95 %
  of the polls, and did not grow (by at most ``LAG_GROWTH_LIMIT_S`` from the first to the last third of
  the window): a worker falling behind shows a lag that grows by the missing fraction every second. For
  W = 1, 2, 4 a bounded search (doubling, then halving the interval; at most ``trials`` trials) finds the
  largest N kept up with. The table prints it with its ratio to W = 1 measured in this run, and the cores
  the workers, publishers, broker and PostgreSQL used in that trial, and the whole machine (other work
  on it included): on 2 cores they all share the CPU, so more workers cannot follow more robots once the
  cores are full.
* **Fail-over gap.** Two workers, N robots (half of what one worker kept up with, so the survivor can take
  them all); one worker is killed with SIGKILL. Per robot of the killed worker: the time from the kill to
  the grant to the survivor and to the survivor's first result (first checkpoint write under the new
  lease), on the database's clock, and when its lag was back under the limit. Printed for the test
  timings (lease 2.5 s, heartbeat 0.5 s) and, without ``--quick``, the defaults (10 s, 2 s).
* **Broker cut-off.** Two workers, one reaching the broker through a TCP proxy that is then cut (it keeps
  its database): the time from the cut to its release of each robot and to the other worker's first result.

Figures vary from run to run by up to 2x on a shared machine (FIELD-NOTES); compare the ratios of one run.
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import multiprocessing as mp
import os
import pwd
import shutil
import signal
import subprocess
import tempfile
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import sqlalchemy as sa

from shadow.ingest.topics import RobotAddress, TopicLayout
from shadow.ingest.wire import BINARY_HEADER, SampleBatch, encode_binary
from shadow.robots.description import load_description
from simulators.live import FeedSettings, simulate_windows, window_batches
from tests.pool.harness import ROOT, PoolPlant, wait_until
from tests.pool.proxy import CuttableProxy
from tests.servers import POSTGRES_BIN_DIRS, PostgresServer, free_loopback_port, start_mosquitto, wait_for_port
from tests.synthetic import EXAMPLE_DELTA

SAMPLES_PER_BATCH = 10  # 10 ms messages, as the live delta feed sends them
WORKER_LEVELS = (1, 2, 4)
LAG_LIMIT_S = 1.0  # the worst robot's lag, 95th percentile over a trial's polls
LAG_GROWTH_LIMIT_S = 0.5  # how much the worst robot's lag may grow from the first to the last third of a trial
LAG_POLL_S = 0.5
TEST_TIMINGS = (2.5, 0.5)  # lease_s, heartbeat_s of tests/pool
DEFAULT_TIMINGS = (10.0, 2.0)  # the [pool] defaults
ROBOTS_PER_PUBLISHER = 24  # one publisher process per this many robots (a Python publisher is one core at most)
MAX_UNACKNOWLEDGED = 200  # QoS 1 messages in flight per publisher connection


@dataclass(frozen=True)
class Plan:
    """How long and how much one run measures."""

    warmup_s: float
    window_s: float
    trials: int  # per worker level
    first_n: int  # robots in the first trial of one worker
    windows: int  # simulated windows of the stream (replayed in a loop)
    sim_window_s: float
    default_failover: bool


FULL = Plan(warmup_s=3.0, window_s=10.0, trials=5, first_n=8, windows=6, sim_window_s=4.0, default_failover=True)
QUICK = Plan(warmup_s=2.0, window_s=6.0, trials=3, first_n=8, windows=4, sim_window_s=2.5, default_failover=False)


# --- servers ------------------------------------------------------------------------------------
def _as_user(user: str | None, argv: list[str]) -> list[str]:
    return argv if user is None else ["runuser", "-u", user, "--", *argv]


@contextlib.contextmanager
def postgres_cluster() -> Iterator[tuple[PostgresServer, int]]:
    """A throw-away PostgreSQL cluster (as tests/servers.py makes one); yields it and the postmaster's pid."""
    bins = [d for d in POSTGRES_BIN_DIRS if (d / "initdb").exists()]
    if not bins:
        raise SystemExit("PostgreSQL is not installed: apt-get install -y postgresql")
    initdb, pg_ctl = str(bins[0] / "initdb"), str(bins[0] / "pg_ctl")
    user = "postgres" if os.geteuid() == 0 else None  # the server refuses to run as root
    tmp = Path(tempfile.mkdtemp(prefix="shadow-bench-pg-"))
    if user is not None:
        entry = pwd.getpwnam(user)
        os.chown(tmp, entry.pw_uid, entry.pw_gid)
    data, port = tmp / "data", free_loopback_port()
    options = (
        f"-c listen_addresses=127.0.0.1 -c port={port} -c unix_socket_directories={tmp} -c fsync=off "
        "-c max_connections=200"
    )
    try:
        subprocess.run(_as_user(user, [initdb, "-D", str(data), "-U", "shadow", "--auth=trust", "--no-sync"]),
                       check=True, capture_output=True)  # fmt: skip
        subprocess.run(_as_user(user, [pg_ctl, "-D", str(data), "-o", options, "-l", str(tmp / "pg.log"), "-w",
                                       "start"]), check=True, capture_output=True)  # fmt: skip
        wait_for_port(port, timeout_s=20)
        postmaster = int((data / "postmaster.pid").read_text().split()[0])
        yield PostgresServer("127.0.0.1", port, "shadow", data, pg_ctl, user, options, tmp / "pg.log"), postmaster
    finally:
        if data.exists():
            subprocess.run(_as_user(user, [pg_ctl, "-D", str(data), "-m", "immediate", "stop"]), capture_output=True)
        shutil.rmtree(tmp, ignore_errors=True)


def new_database(server: PostgresServer, name: str) -> str:
    admin = sa.create_engine(server.url(), isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(sa.text(f"CREATE DATABASE {name}"))
    admin.dispose()
    return server.url(name)


# --- CPU accounting -----------------------------------------------------------------------------
CLOCK_TICKS_S = os.sysconf("SC_CLK_TCK")


def cpu_s(pid: int) -> float:
    """User + system CPU of one process so far [s] (0 when it is gone)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / CLOCK_TICKS_S


def children_of(pid: int) -> list[int]:
    out = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            with contextlib.suppress(OSError):
                if int((entry / "stat").read_text().rsplit(")", 1)[1].split()[1]) == pid:
                    out.append(int(entry.name))
    return out


def machine_busy_s() -> tuple[float, float]:
    """(busy, total) CPU seconds of the whole machine so far, all cores (/proc/stat)."""
    values = [int(v) for v in Path("/proc/stat").read_text().splitlines()[0].split()[1:]]
    idle = values[3] + values[4]
    return (sum(values) - idle) / CLOCK_TICKS_S, sum(values) / CLOCK_TICKS_S


@dataclass
class CpuGroups:
    """Processes whose CPU a trial reports, by group."""

    groups: dict[str, list[int]] = field(default_factory=dict)

    def sample(self) -> dict[str, float]:
        return {name: sum(cpu_s(p) for p in pids) for name, pids in self.groups.items()}


# --- the simulated robots -----------------------------------------------------------------------
def simulated_stream(plan: Plan) -> tuple[list[tuple[float, SampleBatch]], float]:
    """One robot's replayable stream: (send time in the cycle [s], batch with times from 0) and the cycle length.

    The windows are simulated side by side once (closed loop, ``simulators.live``) and played one after the
    other with the feed's pause between them; a batch is sent when its last sample is taken.
    """
    description = load_description(ROOT / EXAMPLE_DELTA)
    settings = FeedSettings(windows_per_run=plan.windows, window_s=plan.sim_window_s)
    windows = simulate_windows(description, np.random.default_rng(20261202), settings)
    schedule: list[tuple[float, SampleBatch]] = []
    start_s = 0.0
    for window in windows:
        batches = window_batches(window, "x", start_s=start_s, first_seq=0, samples_per_batch=SAMPLES_PER_BATCH,
                                 family=description.family)  # fmt: skip
        schedule.extend((float(b.t[-1]), b) for b in batches)
        start_s += float(window.t_s[-1]) + settings.gap_s
    return schedule, start_s


def payloads_for(batch: SampleBatch, robots: list[str]) -> list[bytes]:
    """``encode_binary`` of ``batch`` as sent by each robot, encoded once: the robot id is the only difference,
    at a fixed place in the header (docs/wire-format.md) when the ids have one length; else encoded per robot."""
    first = dataclasses.replace(batch, robot_id=robots[0])
    base = encode_binary(first)
    if len({len(r) for r in robots}) > 1:
        return [base, *(encode_binary(dataclasses.replace(batch, robot_id=r)) for r in robots[1:])]
    at, size = BINARY_HEADER.size, len(robots[0])
    return [base[:at] + r.encode("ascii") + base[at + size :] for r in robots]


def publish_robots(
    port: int,
    addresses: list[tuple[str, str, str]],
    schedule: list[tuple[float, SampleBatch]],
    cycle_s: float,
    duration_s: float,
    start: Any,
    out: Any,
) -> None:
    """Every robot's stream in real time (a publisher process); reports sent messages, lateness and CPU.

    One MQTT connection for the process's robots, driven from this thread (no network thread): the load
    generator shares the two cores with the workers, so it must cost little. ``BatchPublisher`` (one
    connection and one network thread per robot) was measured at about 0.4 ms of CPU per message for 12
    robots in one process, mostly threads contending for the interpreter; this costs a fraction of that.
    Same topics, payloads (``encode_binary``) and QoS 1 as the simulators' publisher; every ``rc`` checked.
    Connects first, says so on ``out``, then waits for ``start`` (an event and the wall-clock start in a
    shared value) so that every publisher process begins at the same moment.
    """
    layout = TopicLayout()
    robots = [RobotAddress(*a) for a in addresses]
    topics = [layout.samples_topic(a) for a in robots]
    unacked = [0]
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"bench-sim-{os.getpid()}", protocol=mqtt.MQTTv5)
    client.max_inflight_messages_set(MAX_UNACKNOWLEDGED)
    client.max_queued_messages_set(0)

    def on_publish(c: mqtt.Client, u: Any, mid: int, reason: Any, props: Any) -> None:
        unacked[0] -= 1

    client.on_publish = on_publish
    client.connect("127.0.0.1", port, keepalive=60)
    deadline = time.monotonic() + 10
    while not client.is_connected():
        client.loop(timeout=0.05)
        if time.monotonic() > deadline:
            raise RuntimeError(f"publisher: no connection to 127.0.0.1:{port}")
    out.put({"ready": True})
    go, at_s = start
    while not go.wait(0.05):
        client.loop(timeout=0.0)
    start_at_s = at_s.value
    until_s = start_at_s + duration_s
    k, late_s = 0, 0.0
    while True:
        cycle, i = divmod(k, len(schedule))
        offset_s, template = schedule[i]
        base_s = start_at_s + cycle * cycle_s
        send_at_s = base_s + offset_s
        if send_at_s > until_s:
            break
        while (wait_s := send_at_s - time.time()) > 0:
            client.loop(timeout=min(wait_s, 0.05))  # PUBACKs and pings while waiting
        late_s = max(late_s, -wait_s)
        batch = dataclasses.replace(template, seq=k, t=base_s + template.t)
        payloads = payloads_for(batch, [a.robot for a in robots])
        if k == 0 and payloads[-1] != encode_binary(dataclasses.replace(batch, robot_id=robots[-1].robot)):
            raise RuntimeError("publisher: a patched payload differs from encode_binary's")  # wire format changed
        for topic, payload in zip(topics, payloads, strict=True):
            info = client.publish(topic, payload, qos=1)
            if info.rc != mqtt.MQTT_ERR_SUCCESS:
                raise RuntimeError(f"publisher: {topic}: {mqtt.error_string(info.rc)}")
            unacked[0] += 1
        if unacked[0] > 50 * MAX_UNACKNOWLEDGED:
            raise RuntimeError(f"publisher: the broker acknowledges too slowly ({unacked[0]} messages waiting)")
        k += 1
        client.loop(timeout=0.0)
    deadline = time.monotonic() + 30
    while unacked[0] > 0 and time.monotonic() < deadline:
        client.loop(timeout=0.05)
    client.disconnect()
    out.put({"sent": k * len(robots), "late_s": late_s, "cpu_s": time.process_time()})


READY_TIMEOUT_S = 120.0


@dataclass
class Publishers:
    """Publisher processes for the robots of a plant."""

    processes: list[Any]
    results: Any
    started_at_s: float
    until_s: float

    def pids(self) -> list[int]:
        return [p.pid for p in self.processes if p.pid is not None]

    def finish(self) -> dict[str, float]:
        reports = [self.results.get(timeout=max(30.0, self.until_s - time.time() + 30.0)) for _ in self.processes]
        for p in self.processes:
            p.join(10)
        return {
            "sent": sum(r["sent"] for r in reports),
            "late_s": max(r["late_s"] for r in reports),
            "cpu_s": sum(r["cpu_s"] for r in reports),
        }

    def stop(self) -> None:
        for p in self.processes:
            if p.is_alive():
                p.terminate()
            p.join(10)


def start_publishers(
    plant: PoolPlant, schedule: list[tuple[float, SampleBatch]], cycle_s: float, duration_s: float
) -> Publishers:
    """Publisher processes for every robot of the plant, connected; the stream starts when this returns."""
    ctx = mp.get_context("spawn")
    results = ctx.Queue()
    go, at_s = ctx.Event(), ctx.Value("d", 0.0)
    addresses = [(a.site, a.cell, a.robot) for a in plant.addresses]
    groups = [addresses[i : i + ROBOTS_PER_PUBLISHER] for i in range(0, len(addresses), ROBOTS_PER_PUBLISHER)]
    processes = [
        ctx.Process(
            target=publish_robots, args=(plant.broker_port, g, schedule, cycle_s, duration_s, (go, at_s), results)
        )
        for g in groups
    ]
    for p in processes:
        p.start()
    for _ in processes:
        results.get(timeout=READY_TIMEOUT_S)  # connected
    at_s.value = time.time() + 0.1
    go.set()
    return Publishers(processes, results, at_s.value, at_s.value + duration_s)


# --- measuring ----------------------------------------------------------------------------------
def lags_s(plant: PoolPlant, stream_start_s: float) -> tuple[float, dict[str, float]]:
    """(database time, robot -> database time minus the newest sample processed) for every robot of the plant."""
    with plant.store.engine.connect() as conn:
        now = float(conn.execute(sa.text("select extract(epoch from clock_timestamp())::float8")).scalar_one())
        rows = conn.execute(sa.text("select robot_id, last_time_s from checkpoints")).all()
    newest = {str(r.robot_id): float(r.last_time_s) for r in rows}
    return now, {rid: now - max(newest.get(rid, stream_start_s), stream_start_s) for rid in plant.robot_ids}


@dataclass
class Trial:
    workers: int
    robots: int
    kept_up: bool
    worst_lag_s: float  # largest lag of any robot at any poll
    p95_lag_s: float  # 95th percentile over the polls of the worst robot's lag
    growth_s: float  # worst robot's lag, mean of the last third of the polls minus mean of the first third
    publisher_late_s: float
    messages_s: float
    cores: dict[str, float]
    note: str = ""


@dataclass
class Bench:
    """The servers and the stream of one run."""

    workdir: Path
    broker_port: int
    broker_pid: int
    server: PostgresServer
    postmaster_pid: int
    schedule: list[tuple[float, SampleBatch]]
    cycle_s: float
    plan: Plan
    counter: int = 0

    def plant(self, n_robots: int, timings: tuple[float, float] = TEST_TIMINGS) -> PoolPlant:
        self.counter += 1
        tag = f"t{self.counter}"
        (self.workdir / tag).mkdir()
        plant = PoolPlant(self.workdir / tag, "127.0.0.1", self.broker_port, new_database(self.server, tag),
                          n_robots, f"bench{tag}{uuid.uuid4().hex[:4]}", lease_s=timings[0],
                          heartbeat_s=timings[1])  # fmt: skip
        plant.install_write_log()
        plant.create_sessions()
        return plant

    def cpu_groups(self, plant: PoolPlant, publishers: Publishers) -> CpuGroups:
        return CpuGroups({
            "workers": [w.process.pid for w in plant.workers.values()],
            "publishers": publishers.pids(),
            "broker": [self.broker_pid],
            "postgres": [self.postmaster_pid, *children_of(self.postmaster_pid)],
        })  # fmt: skip


def shared(plant: PoolPlant, names: list[str]) -> bool:
    """Every worker in the pool, every robot held, none holding more than ``ceil(robots / workers)`` (with fewer
    robots than that allows some workers hold none)."""
    with plant.store.engine.connect() as conn:
        live = conn.execute(sa.text("select count(*) from workers where expires_at_s > "
                                    "extract(epoch from clock_timestamp())")).scalar_one()  # fmt: skip
    owners = plant.live_owners()
    counts = plant.shares()
    share = -(-plant.n_robots // len(names))
    return live == len(names) and len(owners) == plant.n_robots and max(counts.values(), default=0) <= share


def start_workers(plant: PoolPlant, names: list[str], *, proxy_for: dict[str, int] | None = None) -> None:
    for name in names:
        plant.start_worker(name, broker_port=(proxy_for or {}).get(name))
    if not wait_until(lambda: shared(plant, names), 90):
        raise RuntimeError(f"{len(names)} workers did not share the robots: {plant.shares()}")


def run_trial(bench: Bench, n_workers: int, n_robots: int) -> Trial:
    plan = bench.plan
    plant = bench.plant(n_robots)
    publishers: Publishers | None = None
    try:
        start_workers(plant, [f"w{i}" for i in range(1, n_workers + 1)])
        publishers = start_publishers(plant, bench.schedule, bench.cycle_s, plan.warmup_s + plan.window_s)
        groups = bench.cpu_groups(plant, publishers)
        measure_from_s = publishers.started_at_s + plan.warmup_s
        time.sleep(max(0.0, measure_from_s - time.time()))
        cpu_before, (busy_before, total_before) = groups.sample(), machine_busy_s()
        polls: list[float] = []  # the worst robot's lag at each poll
        while time.time() < publishers.until_s:
            polls.append(max(lags_s(plant, publishers.started_at_s)[1].values()))
            time.sleep(LAG_POLL_S)
        cpu_after, (busy_after, total_after) = groups.sample(), machine_busy_s()
        elapsed_s = plan.window_s
        sent = publishers.finish()
        publishers = None
        cores = {k: (cpu_after[k] - cpu_before[k]) / elapsed_s for k in cpu_before}
        n_cores = os.cpu_count() or 1
        cores["machine"] = n_cores * (busy_after - busy_before) / max(total_after - total_before, 1e-9)
        lag = np.asarray(polls)
        third = max(1, len(lag) // 3)
        p95, growth = float(np.quantile(lag, 0.95)), float(lag[-third:].mean() - lag[:third].mean())
        # a late publisher stamps its samples on schedule, so its delay is in the lag too
        note = f"(publishers up to {sent['late_s']:.2f} s late)" if sent["late_s"] > 0.1 else ""
        kept = p95 <= LAG_LIMIT_S and growth <= LAG_GROWTH_LIMIT_S
        return Trial(n_workers, n_robots, kept, float(lag.max()), p95, growth,
                     sent["late_s"], sent["sent"] / (plan.warmup_s + plan.window_s), cores, note)  # fmt: skip
    finally:
        if publishers is not None:
            publishers.stop()
        kill_workers(plant)
        plant.close()


def kill_workers(plant: PoolPlant) -> None:
    """SIGKILL: a trial's workers need no clean exit (the database is thrown away), and a worker far behind
    would take a while to stop."""
    for w in plant.workers.values():
        if w.process.poll() is None:
            w.process.kill()
            w.process.wait(10)


def search(bench: Bench, n_workers: int, first_n: int, print_trial: Any) -> tuple[int, Trial | None]:
    """Largest robot count kept up with: double from ``first_n`` until a trial fails, then halve the interval;
    at most ``plan.trials`` trials. Returns it (0: not even one) and its trial."""
    passed, failed = 0, None
    best: Trial | None = None
    n = max(1, first_n)
    for _ in range(bench.plan.trials):
        trial = run_trial(bench, n_workers, n)
        print_trial(trial)
        if trial.kept_up:
            passed, best = n, trial
        else:
            failed = n
        if failed is None:
            n *= 2
            continue
        if failed - passed <= max(1, passed // 8):
            break
        n = (passed + failed) // 2
    return passed, best


# --- fail-over and cut-off ----------------------------------------------------------------------
@dataclass
class Handover:
    label: str
    timings: tuple[float, float]
    robots: int
    claimed_s: list[float]
    first_result_s: list[float]
    caught_up_s: list[float]


def run_failover(bench: Bench, n_robots: int, timings: tuple[float, float], *, cut_off: bool) -> Handover:
    """Two workers; at ``warmup`` into the stream w2 is killed (SIGKILL) or its broker proxy is cut."""
    plan = bench.plan
    lease_s, heartbeat_s = timings
    plant = bench.plant(n_robots, timings)
    proxy = CuttableProxy(bench.broker_port).start() if cut_off else None
    budget_s = plan.warmup_s + lease_s + 4 * heartbeat_s + 12.0  # the stream outlasts the hand-over
    publishers: Publishers | None = None
    try:
        start_workers(plant, ["w1", "w2"], proxy_for={"w2": proxy.port} if proxy else None)
        publishers = start_publishers(plant, bench.schedule, bench.cycle_s, budget_s)
        time.sleep(max(0.0, publishers.started_at_s + plan.warmup_s - time.time()))
        victims = {rid for rid, owner in plant.live_owners().items() if owner == "w2"}
        event_at = plant.now_s()
        if proxy is not None:
            proxy.cut()
        else:
            plant.signal("w2", signal.SIGKILL)
        caught: dict[str, float] = {}
        while time.time() < publishers.until_s and len(caught) < len(victims):
            now, lags = lags_s(plant, publishers.started_at_s)
            owners = plant.live_owners()
            for rid in victims - set(caught):
                if owners.get(rid) == "w1" and lags[rid] <= LAG_LIMIT_S:
                    caught[rid] = now - event_at
            time.sleep(0.2)
        history = plant.history()
        claimed = [
            next(g["acquired_at_s"] for g in history[r] if g["owner"] == "w1" and g["acquired_at_s"] > event_at)
            - event_at
            for r in victims
        ]
        first = plant.first_writes_after(event_at)
        missing = victims - (set(first) & set(caught))
        if missing:
            raise RuntimeError(f"robots not taken over and caught up with within the stream: {sorted(missing)}")
        label = "broker cut-off" if cut_off else "SIGKILL"
        return Handover(label, timings, n_robots, sorted(claimed), sorted(first[r] - event_at for r in victims),
                        sorted(caught.values()))  # fmt: skip
    finally:
        if publishers is not None:
            publishers.stop()
        if proxy is not None:
            proxy.close()
        kill_workers(plant)
        plant.close()


def span(values: list[float]) -> str:
    return f"{min(values):5.2f}-{max(values):5.2f}" if values else "  n/a"


# --- main ---------------------------------------------------------------------------------------
def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.pool", description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="shorter trials, fewer of them (about 3 minutes)")
    args = parser.parse_args(argv)
    plan = QUICK if args.quick else FULL
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    started = time.monotonic()
    schedule, cycle_s = simulated_stream(plan)
    per_robot_msgs_s = len(schedule) / cycle_s
    workdir = Path(tempfile.mkdtemp(prefix="shadow-bench-pool-"))
    try:
        (workdir / "broker").mkdir()
        broker = start_mosquitto(workdir / "broker", free_loopback_port())
        try:
            with postgres_cluster() as (server, postmaster):
                bench = Bench(workdir, broker.port, broker.process.pid, server, postmaster, schedule, cycle_s, plan)
                report(bench, per_robot_msgs_s)
        finally:
            broker.process.terminate()
            broker.process.wait(10)
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    print(f"total time {time.monotonic() - started:.0f} s")
    return 0


def report(bench: Bench, per_robot_msgs_s: float) -> None:
    plan = bench.plan
    print(f"{os.cpu_count()} cores; simulated delta at 1 kHz, {SAMPLES_PER_BATCH} samples per message, "
          f"{per_robot_msgs_s:.0f} messages/s per robot on average (pauses between windows included); "
          f"lease {TEST_TIMINGS[0]} s, heartbeat {TEST_TIMINGS[1]} s")  # fmt: skip
    print(f"a trial: {plan.warmup_s:.0f} s warm-up, {plan.window_s:.0f} s measured; kept up: the worst robot's lag "
          f"<= {LAG_LIMIT_S} s at 95 % of the polls and growing by <= {LAG_GROWTH_LIMIT_S} s")  # fmt: skip
    print("trials:  workers  robots  worst lag s  p95 lag s  lag growth s  kept up")

    def print_trial(t: Trial) -> None:
        print(f"         {t.workers:7d}  {t.robots:6d}  {t.worst_lag_s:11.2f}  {t.p95_lag_s:9.2f}  {t.growth_s:12.2f}  "
              f"{'yes' if t.kept_up else 'no'} {t.note}", flush=True)  # fmt: skip

    followed: dict[int, tuple[int, Trial | None]] = {}
    first_n = plan.first_n
    for n_workers in WORKER_LEVELS:
        followed[n_workers] = search(bench, n_workers, first_n, print_trial)
        first_n = max(1, followed[n_workers][0])
    base = followed[WORKER_LEVELS[0]][0]
    print()
    print("workers  robots followed  ratio to 1 worker  msgs/s  cores used: workers  publishers  broker  postgres  "
          "machine")  # fmt: skip
    for n_workers, (n, trial) in followed.items():
        ratio = n / base if base else float("nan")
        if trial is None:
            print(f"{n_workers:7d}  {n:15d}  {ratio:17.2f}")
            continue
        c = trial.cores
        print(f"{n_workers:7d}  {n:15d}  {ratio:17.2f}  {trial.messages_s:6.0f}  {c['workers']:19.2f}  "
              f"{c['publishers']:10.2f}  {c['broker']:6.2f}  {c['postgres']:8.2f}  {c['machine']:7.2f}")  # fmt: skip
    print()
    n_failover = max(2, base // 2)
    runs = [(TEST_TIMINGS, False), (TEST_TIMINGS, True)]
    if plan.default_failover:
        runs.insert(1, (DEFAULT_TIMINGS, False))
    print(f"hand-overs, two workers, {n_failover} robots; times from the kill (or the cut) [s], database clock:")
    print("event           lease s  heartbeat s  claimed by survivor  first result  lag back <= 1 s  "
          "first result / lease")  # fmt: skip
    for timings, cut in runs:
        h = run_failover(bench, n_failover, timings, cut_off=cut)
        print(f"{h.label:14s}  {timings[0]:7.1f}  {timings[1]:11.1f}  {span(h.claimed_s):>19s}  "
              f"{span(h.first_result_s):>12s}  {span(h.caught_up_s):>15s}  "
              f"{max(h.first_result_s) / timings[0]:20.2f}", flush=True)  # fmt: skip


if __name__ == "__main__":
    raise SystemExit(main())
