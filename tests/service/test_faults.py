"""The service under faults: the broker killed and restarted, the database gone for a while, floods of bad input.

The truth in every test is the publisher's own record of what it sent (sequence numbers and sample times
of synthetic batches) and the MQTT 5.0 delivery rules for QoS 1 with a persistent session (OASIS MQTT 5.0,
sections 4.3.2 and 4.4: a message the broker acknowledged is delivered at least once to a subscriber whose
session holds it, and an unacknowledged delivery is sent again on reconnection). What the service must add:
every delivered batch in the store exactly once, and what never arrived recorded as an unmonitored interval.
"""

from __future__ import annotations

import json
import os
import queue
import threading
import time
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import pytest
import sqlalchemy as sa

from shadow.cli.serve import build_service
from shadow.ingest.mqtt import MqttSettings, ReceivedMessage, RobotSubscription
from shadow.ingest.topics import RobotAddress, TopicLayout
from shadow.ingest.wire import SampleBatch, encode_binary, encode_json
from shadow.service import RobotPipeline
from shadow.store import schema
from shadow.store.repository import SqlStore, StoreUnavailableError
from simulators.publish import BatchPublisher, PublishError
from tests.servers import Broker, PostgresServer, RestartableBroker
from tests.service.common import config_for, raw_seqs, start, unique_robot, wait_until
from tests.synthetic import delta_stream

pytestmark = pytest.mark.mosquitto

DB_OUTAGE_S = float(os.environ.get("SHADOW_DB_OUTAGE_S", "10"))  # 30 s in the long run, 10 s by default
HELD_BOUND = 100  # messages the pipeline may hold while the store is down (RobotPipeline.max_held_messages)


class RawPublisher:
    """A plain paho QoS 1 publisher for hand-made payloads; paho keeps the order and a window of 20 in flight."""

    def __init__(self, host: str, port: int, client_id: str) -> None:
        self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id)
        rc = self.client.connect(host, port)
        assert rc == mqtt.MQTT_ERR_SUCCESS
        self.client.loop_start()

    def publish_all(self, topic: str, payloads: list[bytes], *, timeout_s: float = 60.0) -> None:
        infos = [self.client.publish(topic, p, qos=1) for p in payloads]
        assert all(i.rc == mqtt.MQTT_ERR_SUCCESS for i in infos)
        for info in infos:
            info.wait_for_publish(timeout=timeout_s)
            assert info.is_published()

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def json_doc(batch: SampleBatch) -> dict[str, Any]:
    return json.loads(encode_json(batch))


def bad_payloads(template: SampleBatch, robot: str) -> list[tuple[bytes, str]]:
    """One malformed message per kind, with the reason code the wire format gives it (docs/wire-format.md)."""
    good = encode_binary(template)
    doc = json_doc(template)
    effort0 = str(doc["effort"][0][0]).encode()
    return [
        (b"{not json", "bad_json"),
        (b"", "empty"),
        (bytes(range(256)) * 2, "bad_json"),  # not UTF-8, not the binary magic
        (good[: len(good) // 2], "truncated"),
        (json.dumps({**doc, "version": 2}).encode(), "bad_version"),
        (json.dumps({**doc, "units": {**doc["units"], "position": "furlong"}}).encode(), "bad_unit"),
        (encode_json(template).replace(b"[" + effort0, b"[NaN", 1), "non_finite"),
        (json.dumps({**doc, "seq": -3}).encode(), "bad_seq"),
        (
            json.dumps(
                {**doc, "position": [r + [0.0] for r in doc["position"]], "effort": [r + [0.0] for r in doc["effort"]]}
            ).encode(),
            "bad_shape",
        ),
        # 50 rad is far outside the arm's travel of the example delta
        (json.dumps({**doc, "position": [[50.0, 0.0, 0.0]] * len(doc["position"])}).encode(), "implausible"),
    ]


def test_flood_of_malformed_messages_among_good_ones(mosquitto_broker: Broker, tmp_path: Path) -> None:
    robot = unique_robot("f")
    config = config_for(mosquitto_broker.host, mosquitto_broker.port, f"sqlite:///{tmp_path / 'f.db'}", robot)
    entry = config.robots[0]
    topic = TopicLayout().samples_topic(entry.address)
    rng = np.random.default_rng(31)
    good = delta_stream(rng, duration_s=5.0).batches(robot, 10)  # 500 good messages
    kinds = bad_payloads(good[0], robot)
    bad = [kinds[k % len(kinds)] for k in range(2000)]
    is_bad = np.zeros(len(good) + len(bad), dtype=bool)
    is_bad[rng.choice(is_bad.size, size=len(bad), replace=False)] = True  # interleaved at random; good stay in order
    good_iter, bad_iter = iter(good), iter(bad)
    payloads = [next(bad_iter)[0] if b else encode_binary(next(good_iter)) for b in is_bad]
    store = SqlStore(config.database_url)
    service = start(config, store)
    status = service.status.robots[entry.robot_id]
    publisher = RawPublisher(mosquitto_broker.host, mosquitto_broker.port, f"shadow-test-flood-{robot}")
    try:
        publisher.publish_all(topic, payloads)
        assert wait_until(lambda: status.messages_processed + status.dead_letters >= len(payloads), 90), (
            vars(status),
            vars(service.subscriptions[0].counters),
        )
        assert wait_until(lambda: service.subscriptions[0].counters.acknowledged >= len(payloads), 10)
    finally:
        publisher.close()
        service.stop()
    assert raw_seqs(store, entry.robot_id) == list(range(len(good)))
    assert status.dead_letters == len(bad) and status.messages_processed == len(good)
    assert store.dead_letter_counts() == dict(Counter(code for _, code in bad))
    with store.engine.connect() as conn:
        sizes = conn.execute(sa.select(sa.func.sum(schema.dead_letters.c.payload_size))).scalar_one()
        robots = conn.execute(sa.select(schema.dead_letters.c.robot_id).distinct()).scalars().all()
    assert sizes == sum(len(p) for p, _ in bad)
    assert robots == [entry.robot_id]
    store.close()


def test_message_naming_another_robot_is_a_dead_letter(mosquitto_broker: Broker, tmp_path: Path) -> None:
    robot = unique_robot("w")
    config = config_for(mosquitto_broker.host, mosquitto_broker.port, f"sqlite:///{tmp_path / 'w.db'}", robot)
    entry = config.robots[0]
    topic = TopicLayout().samples_topic(entry.address)
    stream = delta_stream(np.random.default_rng(32), duration_s=1.0)
    impostor = stream.batches("other-robot", 10)[3]  # a real batch, but it names another robot
    genuine = stream.batches(robot, 10)
    store = SqlStore(config.database_url)
    service = start(config, store)
    status = service.status.robots[entry.robot_id]
    publisher = RawPublisher(mosquitto_broker.host, mosquitto_broker.port, f"shadow-test-wrong-{robot}")
    try:
        publisher.publish_all(topic, [encode_binary(b) for b in genuine[:3]] + [encode_binary(impostor)])
        publisher.publish_all(topic, [encode_binary(b) for b in genuine[3:]])
        assert wait_until(lambda: status.messages_processed + status.dead_letters >= len(genuine) + 1, 30)
    finally:
        publisher.close()
        service.stop()
    letters = store.dead_letters(limit=10)
    assert [(d["reason_code"], d["robot_id"]) for d in letters] == [("robot_mismatch", entry.robot_id)]
    assert "other-robot" in letters[0]["reason"]
    assert raw_seqs(store, entry.robot_id) == list(range(len(genuine)))
    store.close()


def covered_by_gaps(store: SqlStore, robot_id: str, batches: list[SampleBatch], seqs: set[int]) -> set[int]:
    """The seqs whose samples lie inside a recorded sequence_gap interval."""
    gaps = [g for g in store.unmonitored_intervals(robot_id, start_s=0, end_s=2e9) if g["cause"] == "sequence_gap"]
    return {
        s
        for s in seqs
        if any(g["start_s"] < batches[s].t[0] and batches[s].t[-1] < g["end_s"] for g in gaps)  # strictly between
    }


def test_broker_killed_and_restarted_mid_stream(restartable_broker: RestartableBroker, tmp_path: Path) -> None:
    robot = unique_robot("k")
    broker = restartable_broker
    config = config_for(broker.host, broker.port, f"sqlite:///{tmp_path / 'k.db'}", robot)
    entry = config.robots[0]
    batches = delta_stream(np.random.default_rng(33), duration_s=10.0).batches(robot, 10)  # 1000 messages
    store = SqlStore(config.database_url)
    service = start(config, store)
    sub = service.subscriptions[0]
    status = service.status.robots[entry.robot_id]
    pub = BatchPublisher(entry.address, config.mqtt, client_id=f"shadow-test-kill-{robot}")
    pub.connect()
    refused: list[int] = []
    try:
        for b in batches[:300]:
            pub.publish(b)
        pub.flush()  # 0..299 acknowledged by the broker ...
        time.sleep(0.2)  # ... and saved (autosave after every change; the PUBACK may leave before the save)
        for b in batches[300:500]:  # in flight when the broker dies
            pub.publish(b)
        broker.kill()
        killed_at = time.monotonic()
        assert wait_until(lambda: not sub.connected.is_set(), 10)
        for b in batches[500:600]:  # the robot keeps producing while the broker is down
            try:
                pub.publish(b, timeout_s=0.05)
            except PublishError:  # paho keeps the message anyway and sends it after its reconnect
                refused.append(b.seq)
        time.sleep(max(0.0, 2.0 - (time.monotonic() - killed_at)))
        broker.restart()
        restarted_at = time.monotonic()
        assert wait_until(sub.connected.is_set, 60)
        reconnect_s = time.monotonic() - restarted_at
        outage_s = time.monotonic() - killed_at
        assert wait_until(pub._client.is_connected, 60)
        for b in batches[600:]:
            pub.publish(b)
        everything = set(range(len(batches)))

        def settled() -> bool:
            stored = set(raw_seqs(store, entry.robot_id))
            return stored | covered_by_gaps(store, entry.robot_id, batches, everything - stored) == everything

        assert wait_until(settled, 60), vars(status)
    finally:
        pub.close()
        service.stop()
    stored_list = raw_seqs(store, entry.robot_id)
    stored = set(stored_list)
    assert len(stored_list) == len(stored)  # nothing doubled
    assert set(range(300)) <= stored  # nothing the broker had accepted and saved is lost
    assert set(range(600, len(batches))) <= stored  # the stream resumed
    lost = sorted(everything - stored)  # each inside a recorded sequence_gap (settled() above)
    assert sub.counters.connects == 2 and sub.counters.overflowed == 0
    print(  # noqa: T201 - figures for the run log (pytest -s)
        f"\nbroker down {outage_s:.2f} s; the service reconnected {reconnect_s:.2f} s after the restart; "
        f"publish() refused {len(refused)} of 100 during the outage; lost and recorded as gaps {len(lost)} "
        f"({lost[:1]}..{lost[-1:]}); duplicates dropped {status.duplicates_dropped}"
    )
    store.close()


def test_acknowledging_a_message_of_a_lost_connection_is_harmless(restartable_broker: RestartableBroker) -> None:
    broker = restartable_broker
    address = RobotAddress("kestrel", "line4", unique_robot("a"))
    topic = TopicLayout().samples_topic(address)
    sub = RobotSubscription(str(address), topic, MqttSettings(host=broker.host, port=broker.port))
    sub.start()
    publisher = RawPublisher(broker.host, broker.port, f"shadow-test-ack-{address.robot}")
    try:
        publisher.publish_all(topic, [b"m%d" % k for k in range(40)])
        assert wait_until(lambda: sub.inbox.qsize() >= 10, 10)
        time.sleep(0.3)  # let the broker save the session with its deliveries in flight
        old = drain(sub.inbox)
        broker.kill()
        broker.restart()
        assert wait_until(lambda: sub.counters.connects == 2 and sub.inbox.qsize() >= len(old), 30)
        again = drain(sub.inbox)
        # MQTT 5.0 section 4.4: unacknowledged deliveries are resent with their original packet identifiers
        assert {m.mid for m in old} <= {m.mid for m in again}
        for m in old[1:]:  # taken before the reconnect, handled after it: not acknowledgements of the new copies
            sub.acknowledge(m)
        assert sub.counters.acknowledged == 0
        for m in again:
            sub.acknowledge(m)
        assert sub.counters.acknowledged == len(again)
        assert wait_until(lambda: sub.inbox.qsize() > 0, 10)  # the window opened again: the rest comes
    finally:
        publisher.close()
        sub.stop()


def drain(inbox: queue.Queue[ReceivedMessage]) -> list[ReceivedMessage]:
    out = []
    while True:
        try:
            out.append(inbox.get_nowait())
        except queue.Empty:
            return out


class UnreachableStore:
    """A store whose database is gone: every write fails as SqlStore reports it."""

    def __init__(self) -> None:
        self.attempts = 0

    def checkpoint(self, robot_id: str) -> None:
        return None

    def write_step(self, results: Any) -> None:
        self.attempts += 1
        raise StoreUnavailableError("database unreachable: connection refused")


class StatelessMonitor:
    def save_state(self) -> dict[str, np.ndarray]:
        return {}


def test_pipeline_holds_no_more_than_its_bound_while_the_store_is_down() -> None:
    address = RobotAddress("kestrel", "line4", "h1")
    inbox: queue.Queue[ReceivedMessage] = queue.Queue()
    for k in range(300):  # more than the broker's window: a broker may send that many unacknowledged
        inbox.put(ReceivedMessage(TopicLayout().samples_topic(address), b"{not json", k + 1, 1, False, 0.0, 1))
    acknowledged: list[ReceivedMessage] = []
    store = UnreachableStore()
    pipeline = RobotPipeline(
        address,
        StatelessMonitor(),  # type: ignore[arg-type]
        store,  # type: ignore[arg-type]
        inbox=inbox,
        acknowledge=acknowledged.append,
        layout=TopicLayout(),
        n_actuators=3,
        max_messages_per_step=50,
        max_held_messages=120,
    )
    taken = [pipeline.step() for _ in range(10)]
    assert taken == [50, 50, 20, 0, 0, 0, 0, 0, 0, 0]
    assert inbox.qsize() == 300 - 120 and not acknowledged
    assert pipeline.status.store_failures == 10 == store.attempts  # it keeps trying


@pytest.mark.postgres
@pytest.mark.slow
def test_database_outage_holds_acknowledgements_and_catches_up(
    mosquitto_broker: Broker, postgres_server: PostgresServer
) -> None:
    robot = unique_robot("d")
    name = f"faults_{robot}"
    admin = sa.create_engine(postgres_server.url(), isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(sa.text(f"DROP DATABASE IF EXISTS {name}"))
        conn.execute(sa.text(f"CREATE DATABASE {name}"))
    admin.dispose()
    config = config_for(mosquitto_broker.host, mosquitto_broker.port, postgres_server.url(name), robot)
    entry = config.robots[0]
    duration_s = DB_OUTAGE_S + 8.0
    batches = delta_stream(np.random.default_rng(34), duration_s=duration_s).batches(robot, 10)
    store = SqlStore(config.database_url)
    service = build_service(config, store)
    pipeline = service.pipelines[0]
    pipeline.max_held_messages = HELD_BOUND  # small, so the bound is reached within the outage
    service.start()
    sub = service.subscriptions[0]
    assert wait_until(sub.connected.is_set, 10)
    status = service.status.robots[entry.robot_id]
    publishing_failed: list[BaseException] = []

    def publish_in_real_time() -> None:  # 10 ms of samples every 10 ms, like the controller
        try:
            with BatchPublisher(entry.address, config.mqtt, client_id=f"shadow-test-db-{robot}") as pub:
                t0 = time.monotonic()
                for k, b in enumerate(batches):
                    time.sleep(max(0.0, t0 + 0.01 * k - time.monotonic()))
                    pub.publish(b)
        except BaseException as exc:  # reported by the test below
            publishing_failed.append(exc)

    publisher = threading.Thread(target=publish_in_real_time, daemon=True)
    publisher.start()
    worst_unacknowledged = 0
    worst_held = 0
    try:
        assert wait_until(lambda: status.messages_processed >= 200, 30), vars(status)
        postgres_server.stop(mode="fast")
        try:
            down_until = time.monotonic() + DB_OUTAGE_S
            while time.monotonic() < down_until:
                # the broker's window bounds what the service holds: received, not acknowledged
                worst_unacknowledged = max(worst_unacknowledged, sub.counters.received - sub.counters.acknowledged)
                worst_held = max(worst_held, len(pipeline._unacknowledged))
                time.sleep(0.05)
            failures_during_outage = status.store_failures
            held = status.unwritten_steps
        finally:
            postgres_server.start()
        publisher.join(duration_s + 30)
        assert not publishing_failed, publishing_failed
        assert wait_until(lambda: len(raw_seqs(store, entry.robot_id)) >= len(batches), 60), vars(status)
        assert wait_until(lambda: sub.counters.acknowledged >= len(batches), 10)
    finally:
        service.stop()
    figures = (failures_during_outage, held, worst_held, worst_unacknowledged, vars(status), vars(sub.counters))
    assert failures_during_outage > 0 and held > 0, figures
    assert 0 < worst_held <= HELD_BOUND, figures
    assert worst_unacknowledged <= HELD_BOUND + sub.inbox.maxsize + 1, figures  # + 1: the one being put
    assert sub.counters.overflowed == 0, figures
    assert raw_seqs(store, entry.robot_id) == list(range(len(batches)))  # exactly once, in order
    cp = store.checkpoint(entry.robot_id)
    assert cp is not None and cp.last_seq == len(batches) - 1
    times = [e["time_s"] for e in store.estimates(entry.robot_id, start_s=0, end_s=2e9, parameters=["coulomb_1"])]
    assert len(times) == len(set(times)) and len(times) >= duration_s - 2, (len(times), duration_s)  # 1 per s
    assert not store.unmonitored_intervals(entry.robot_id, start_s=0, end_s=2e9)
    print(  # noqa: T201 - figures for the run log (pytest -s)
        f"\ndatabase down {DB_OUTAGE_S:.0f} s: {failures_during_outage} failed writes, {held} steps held, "
        f"at most {worst_held} messages held by the pipeline, {worst_unacknowledged} unacknowledged "
        f"(inbox waits {sub.counters.inbox_full_waits})"
    )
    store.close()
