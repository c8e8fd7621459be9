"""End to end: how many 1 kHz delta robots one service process follows on one core, through a real mosquitto.

Run: ``python -m benchmarks.service`` (needs ``mosquitto``; about 2-3 minutes). Everything is on loopback.

What is measured, in one run on one machine:

* **Robots kept up with.** For 1, 2, 4, ... robots, a publisher process (pinned to the other core) sends
  every robot's 10 ms batch of 10 samples every 10 ms (QoS 1, the example delta's synthetic motion), and the
  service (this process, pinned to core 0: pipeline thread, paho threads, SQLite store with raw batches kept)
  follows them for a few seconds. The *delay* of a batch is the time from its last sample (the moment the
  publisher sends it, as a controller would) to the commit of the step that stored it as a raw batch (the
  service acknowledges the message right after that commit; the acknowledgement is what is timed). A level is
  kept up with when at least 98 % of the batches were stored in the run and the median delay of the last third
  is not more than 0.25 s above that of the first third (the lag does not grow).
* **Drain rate.** A backlog of messages for the largest level is left in the broker, then the service is
  started and the rate at which it stores them is timed: the service's capacity in messages per second.
* **No-op subscriber.** A paho subscriber (QoS 1, automatic acknowledgements) that does nothing with the
  messages, on the same core, drains the same kind of backlog; its rate is the ceiling of a Python client.

Figures vary from run to run by up to 2x on a shared machine (FIELD-NOTES); compare the ratios of one run.
"""

from __future__ import annotations

import contextlib
import dataclasses
import multiprocessing as mp
import os
import shutil
import socket
import subprocess
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from shadow.cli.serve import build_service
from shadow.config import RobotEntry, ServiceConfig
from shadow.ingest.mqtt import MqttSettings, ReceivedMessage
from shadow.ingest.topics import RobotAddress, TopicLayout
from shadow.ingest.wire import SampleBatch, decode_message, encode_binary
from shadow.store.repository import SqlStore
from tests.synthetic import EXAMPLE_DELTA, delta_stream

SERVICE_CORE = 0
PUBLISHER_CORE = 1
LEVEL_DURATION_S = 8.0
SAMPLES_PER_BATCH = 10
BATCH_PERIOD_S = 0.01  # 10 samples at 1 kHz
KEPT_UP_FRACTION = 0.98
LAG_GROWTH_LIMIT_S = 0.25
TIME_BUDGET_S = 150.0
ROBOT_LEVELS = (1, 2, 4, 6, 8, 12, 16, 24, 32, 48, 64)


# --- broker -----------------------------------------------------------------------------------------
def free_loopback_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start_broker(workdir: Path) -> tuple[subprocess.Popen[bytes], int]:
    exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    port = free_loopback_port()
    user = os.environ.get("USER") or "root"
    config = workdir / "mosquitto.conf"
    config.write_text(
        f"listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\nlog_dest none\n"
        f"max_queued_messages 1000000\nuser {user}\n"
    )
    process = subprocess.Popen([exe, "-c", str(config)], stdout=subprocess.DEVNULL, stderr=subprocess.STDOUT)
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:
        with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", port), timeout=0.2):
            return process, port
        time.sleep(0.05)
    process.kill()
    raise RuntimeError(f"mosquitto did not listen on 127.0.0.1:{port}")


# --- publisher process ------------------------------------------------------------------------------
def template_batches(n_batches: int) -> list[SampleBatch]:
    """Synthetic batches of the example delta (times are replaced at publish time)."""
    duration_s = n_batches * BATCH_PERIOD_S
    return delta_stream(np.random.default_rng(5), duration_s=duration_s).batches("x", SAMPLES_PER_BATCH)


def _pin(core: int) -> None:
    if hasattr(os, "sched_setaffinity") and core < (os.cpu_count() or 1):
        os.sched_setaffinity(0, {core})


def _publisher_client(port: int, name: str) -> mqtt.Client:
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=name, protocol=mqtt.MQTTv5)
    client.max_queued_messages_set(0)
    client.connect("127.0.0.1", port)
    client.loop_start()
    return client


def realtime_publisher(port: int, robots: list[str], duration_s: float, out: Any) -> None:
    """Every robot's batch every 10 ms, stamped with the wall clock; reports how many were sent and late."""
    _pin(PUBLISHER_CORE)
    layout = TopicLayout()
    n_batches = int(round(duration_s / BATCH_PERIOD_S))
    templates = template_batches(n_batches)
    client = _publisher_client(port, f"bench-rt-{os.getpid()}")
    topics = [layout.samples_topic(RobotAddress("bench", "cell", r)) for r in robots]
    offsets = np.arange(SAMPLES_PER_BATCH) * (BATCH_PERIOD_S / SAMPLES_PER_BATCH)
    infos = []
    late = 0
    start_at_s = time.time() + 0.5  # set up first, so the stream starts on time
    for k in range(n_batches):
        t_last = start_at_s + (k + 1) * BATCH_PERIOD_S  # the batch is sent when its last sample is taken
        wait = t_last - time.time()
        if wait > 0:
            time.sleep(wait)
        elif wait < -BATCH_PERIOD_S:
            late += 1
        t = t_last - offsets[::-1]
        for robot, topic in zip(robots, topics, strict=True):
            batch = dataclasses.replace(templates[k], robot_id=robot, seq=k, t=t)
            infos.append(client.publish(topic, encode_binary(batch), qos=1))
    for info in infos[-len(robots) :]:
        info.wait_for_publish(timeout=30)
    failed = sum(1 for i in infos if i.rc != mqtt.MQTT_ERR_SUCCESS)
    client.disconnect()
    client.loop_stop()
    out.put({"sent": len(infos), "failed": failed, "late_ticks": late})


def backlog_publisher(port: int, targets: list[tuple[str, str]], n_per_topic: int, out: Any) -> None:
    """As fast as the broker takes them: n_per_topic batches on each (topic, robot) (the sessions keep them)."""
    _pin(PUBLISHER_CORE)
    templates = template_batches(n_per_topic)
    client = _publisher_client(port, f"bench-backlog-{os.getpid()}")
    infos = []
    for topic, robot in targets:
        for k, b in enumerate(templates):
            infos.append(client.publish(topic, encode_binary(dataclasses.replace(b, robot_id=robot, seq=k)), qos=1))
    for info in infos:
        info.wait_for_publish(timeout=120)
    client.disconnect()
    client.loop_stop()
    out.put({"sent": len(infos)})


# --- service side -----------------------------------------------------------------------------------
def service_config(port: int, db: Path, robots: list[str]) -> ServiceConfig:
    return ServiceConfig(
        mqtt=MqttSettings(host="127.0.0.1", port=port),
        database_url=f"sqlite:///{db}",
        robots=tuple(RobotEntry(RobotAddress("bench", "cell", r), Path(EXAMPLE_DELTA)) for r in robots),
    )


def timed_acknowledgements(service: Any) -> list[tuple[float, ReceivedMessage]]:
    """Wrap every pipeline's acknowledge so the commit time of each message is recorded (decoded afterwards)."""
    log: list[tuple[float, ReceivedMessage]] = []
    for pipeline in service.pipelines:
        ack = pipeline.acknowledge

        def timed(message: ReceivedMessage, ack: Any = ack) -> None:
            log.append((time.time(), message))
            ack(message)

        pipeline.acknowledge = timed
    return log


def run_level(port: int, workdir: Path, n_robots: int, tag: str) -> dict[str, float]:
    robots = [f"{tag}-r{i}" for i in range(n_robots)]
    store = SqlStore(f"sqlite:///{workdir / f'{tag}.db'}")
    service = build_service(service_config(port, workdir / f"{tag}.db", robots), store)
    acks = timed_acknowledgements(service)
    service.start()
    deadline = time.monotonic() + 20
    while not all(s.connected.is_set() for s in service.subscriptions) and time.monotonic() < deadline:
        time.sleep(0.05)
    out: Any = mp.get_context("spawn").Queue()
    proc = mp.get_context("spawn").Process(target=realtime_publisher, args=(port, robots, LEVEL_DURATION_S, out))
    proc.start()
    sent = out.get(timeout=LEVEL_DURATION_S + 60)
    proc.join(10)
    time.sleep(1.0)  # what the service stores within a second after the last batch counts
    service.stop()
    store.close()
    delays = []
    for ack_at, message in acks:
        batch = decode_message(message.payload)
        delays.append((float(batch.t[-1]), ack_at - float(batch.t[-1])))
    delays.sort()
    d = np.array([x[1] for x in delays]) if delays else np.array([np.nan])
    third = max(1, len(d) // 3)
    expected = n_robots * int(round(LEVEL_DURATION_S / BATCH_PERIOD_S))
    return {
        "robots": n_robots,
        "expected": expected,
        "stored": len(delays),
        "publish_failed": sent["failed"],
        "publisher_late_ticks": sent["late_ticks"],
        "p50_s": float(np.median(d)),
        "p99_s": float(np.quantile(d, 0.99)),
        "growth_s": float(np.median(d[-third:]) - np.median(d[:third])),
    }


def drain_rate_service(
    port: int, workdir: Path, n_robots: int, n_per_robot: int, *, max_messages_per_step: int | None = None
) -> float:
    """Messages per second the service stores from a backlog already in the broker (optionally with another cap
    on the messages one pipeline step takes; None: the service's default)."""
    tag = f"drain{max_messages_per_step or 0}"
    robots = [f"{tag}-r{i}" for i in range(n_robots)]
    config = service_config(port, workdir / f"{tag}.db", robots)
    store = SqlStore(config.database_url)
    service = build_service(config, store)
    service.start()  # creates the sessions, then leave them so the broker queues the backlog
    deadline = time.monotonic() + 20
    while not all(s.connected.is_set() for s in service.subscriptions) and time.monotonic() < deadline:
        time.sleep(0.05)
    service.stop()
    store.close()
    layout = TopicLayout()
    _run_backlog(port, [(layout.samples_topic(RobotAddress("bench", "cell", r)), r) for r in robots], n_per_robot)
    store = SqlStore(config.database_url)
    service = build_service(config, store)
    if max_messages_per_step is not None:
        for pipeline in service.pipelines:
            pipeline.max_messages_per_step = max_messages_per_step
    total = n_robots * n_per_robot
    t0 = time.perf_counter()
    service.start()
    done = threading.Event()

    def watch() -> None:
        while not done.is_set():
            if sum(s.counters.acknowledged for s in service.subscriptions) >= total:
                done.set()
            time.sleep(0.01)

    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    done.wait(120)
    elapsed = time.perf_counter() - t0
    acknowledged = sum(s.counters.acknowledged for s in service.subscriptions)
    service.stop()
    store.close()
    return acknowledged / elapsed


def drain_rate_noop(port: int, n_messages: int) -> float:
    """Messages per second a do-nothing paho QoS 1 subscriber takes from a backlog."""
    topic = "bench/noop/x/samples/v1"
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = 600
    count = [0]
    done = threading.Event()

    def on_message(client: mqtt.Client, userdata: Any, msg: mqtt.MQTTMessage) -> None:
        count[0] += 1
        if count[0] >= n_messages:
            done.set()

    def connect() -> mqtt.Client:
        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bench-noop", protocol=mqtt.MQTTv5)
        c.on_message = on_message
        c.on_connect = lambda c, u, f, r, p: c.subscribe(topic, qos=1)
        c.connect("127.0.0.1", port, clean_start=False, properties=props)
        c.loop_start()
        return c

    c = connect()
    time.sleep(0.5)
    c.disconnect()
    c.loop_stop()
    _run_backlog(port, [(topic, "x")], n_messages)
    count[0] = 0
    t0 = time.perf_counter()
    c = connect()
    done.wait(120)
    elapsed = time.perf_counter() - t0
    c.disconnect()
    c.loop_stop()
    return count[0] / elapsed


def _run_backlog(port: int, targets: list[tuple[str, str]], n_per_topic: int) -> None:
    out: Any = mp.get_context("spawn").Queue()
    proc = mp.get_context("spawn").Process(target=backlog_publisher, args=(port, targets, n_per_topic, out))
    proc.start()
    out.get(timeout=300)
    proc.join(10)


def service_pipeline_default_cap() -> int:
    """The service's default cap on messages per pipeline step (read from the signature, not restated)."""
    import inspect

    from shadow.service import RobotPipeline

    return int(inspect.signature(RobotPipeline).parameters["max_messages_per_step"].default)


def main() -> int:
    _pin(SERVICE_CORE)
    started = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="shadow-bench-") as tmp:
        workdir = Path(tmp)
        broker, port = start_broker(workdir)
        try:
            print(f"mosquitto on 127.0.0.1:{port}; service on core {SERVICE_CORE}, publishers on core {PUBLISHER_CORE}")
            print(f"each level: {LEVEL_DURATION_S:.0f} s of 1 kHz streams, {SAMPLES_PER_BATCH} samples per message")
            print(" robots  msgs/s  stored/expected  p50 delay  p99 delay  lag growth  kept up")
            best = 0
            for n in ROBOT_LEVELS:
                if time.monotonic() - started > TIME_BUDGET_S - 60:
                    break
                r = run_level(port, workdir, n, f"l{n}")
                kept = r["stored"] >= KEPT_UP_FRACTION * r["expected"] and r["growth_s"] <= LAG_GROWTH_LIMIT_S
                print(
                    f" {n:6d}  {n / BATCH_PERIOD_S:6.0f}  {r['stored']:7d}/{r['expected']:<7d}  "
                    f"{r['p50_s'] * 1e3:7.1f} ms  {r['p99_s'] * 1e3:7.1f} ms  {r['growth_s'] * 1e3:8.1f} ms  "
                    f"{'yes' if kept else 'no'}"
                    + (f"  (publisher late ticks {r['publisher_late_ticks']:.0f})" if r["publisher_late_ticks"] else "")
                )
                if not kept:
                    break
                best = n
            n_drain = max(best, 1)
            per_robot = max(200, 6000 // n_drain)
            service_rate = drain_rate_service(port, workdir, n_drain, per_robot)
            default_cap = service_pipeline_default_cap()
            bigger_cap = 8 * default_cap
            tuned_rate = drain_rate_service(port, workdir, n_drain, per_robot, max_messages_per_step=bigger_cap)
            noop_rate = drain_rate_noop(port, n_drain * per_robot)
            print(f"robots kept up with at 1 kHz on one core: {best} ({best / BATCH_PERIOD_S:.0f} msgs/s)")
            print(f"drain rate, service ({n_drain} robots, {n_drain * per_robot} messages): {service_rate:8.0f} msgs/s")
            print(f"drain rate, service, up to {bigger_cap} messages per step (default {default_cap}):"
                  f" {tuned_rate:8.0f} msgs/s")  # fmt: skip
            print(f"drain rate, no-op paho QoS 1 subscriber (same messages):      {noop_rate:8.0f} msgs/s")
            ratio = service_rate / noop_rate
            print(
                f"service / no-op: {ratio:.2f} ({'reaches' if ratio >= 0.5 else 'does not reach'} half the no-op rate)"
            )
            print(f"total time {time.monotonic() - started:.0f} s")
        finally:
            broker.terminate()
            broker.wait(10)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
