"""The service end to end: a real mosquitto, the MQTT ingest, the monitor and a SQLite store.

Nothing accepted is lost and nothing is doubled: every published batch ends in the store once, across
malformed messages, duplicates and a restart of the service while the robot keeps publishing.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import paho.mqtt.client as mqtt
import pytest

from shadow.ingest.topics import TopicLayout
from shadow.service import pack_checkpoint, unpack_checkpoint
from shadow.store.repository import SqlStore
from simulators.publish import BatchPublisher
from tests.servers import Broker
from tests.service.common import config_for, raw_seqs, start, wait_until
from tests.synthetic import delta_stream

pytestmark = pytest.mark.mosquitto


def publish_raw(broker: Broker, topic: str, payloads: list[bytes]) -> None:
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="shadow-test-raw")
    client.connect(broker.host, broker.port)
    client.loop_start()
    for p in payloads:
        info = client.publish(topic, p, qos=1)
        info.wait_for_publish(timeout=5)
        assert info.rc == mqtt.MQTT_ERR_SUCCESS
    client.loop_stop()
    client.disconnect()


def test_stream_with_bad_and_duplicate_messages_lands_once(mosquitto_broker: Broker, tmp_path: Path) -> None:
    robot = f"p{int(time.time() * 1000) % 100000}"
    config = config_for(
        mosquitto_broker.host, mosquitto_broker.port, f"sqlite:///{tmp_path / 's.db'}", robot, cell="line2"
    )
    store = SqlStore(config.database_url)
    service = start(config, store)
    entry = config.robots[0]
    stream = delta_stream(np.random.default_rng(11), duration_s=8.0, impact_at_s=5.0)
    batches = stream.batches(robot, 10)
    topic = TopicLayout().samples_topic(entry.address)
    try:
        with BatchPublisher(entry.address, config.mqtt) as pub:
            for b in batches[:300]:
                pub.publish(b)
        publish_raw(
            mosquitto_broker,
            topic,
            [
                b"{not json",
                b'{"version": 1}',
                b"\x00" * 40,
                b'{"version":1,"robot":"%s","seq":9999,"effort_kind":"effort","units":{"time":"s","position":"deg",'
                b'"effort":"N.m"},"time":[1.0],"position":[[0,0,0]],"effort":[[0,0,0]]}' % robot.encode(),
            ],
        )
        with BatchPublisher(entry.address, config.mqtt) as pub:
            for b in batches[295:]:  # five duplicates, then the rest
                pub.publish(b)
        status = service.status.robots[entry.robot_id]
        assert wait_until(lambda: status.samples_processed >= 8000, 90), vars(status)
    finally:
        service.stop()
    assert raw_seqs(store, entry.robot_id) == list(range(len(batches)))
    assert status.duplicates_dropped == 5
    letters = store.dead_letters(limit=10)
    assert len(letters) == 4
    assert {d["reason_code"] for d in letters} >= {"bad_json", "bad_unit"}
    events = store.events(robot_id=entry.robot_id, kind="collision")
    assert len(events) == 1 and abs(events[0]["start_s"] - (stream.t[0] + 5.0)) < 0.02
    cp = store.checkpoint(entry.robot_id)
    assert cp is not None and cp.last_seq == len(batches) - 1
    assert store.estimates(entry.robot_id, start_s=0, end_s=2e9)
    store.close()


def test_restart_resumes_from_the_checkpoint_without_loss_or_doubling(mosquitto_broker: Broker, tmp_path: Path) -> None:
    robot = f"r{int(time.time() * 1000) % 100000}"
    config = config_for(
        mosquitto_broker.host, mosquitto_broker.port, f"sqlite:///{tmp_path / 'r.db'}", robot, cell="line2"
    )
    entry = config.robots[0]
    stream = delta_stream(np.random.default_rng(12), duration_s=10.0, impact_at_s=7.0)
    batches = stream.batches(robot, 10)
    store = SqlStore(config.database_url)
    service = start(config, store)
    with BatchPublisher(entry.address, config.mqtt) as pub:
        for b in batches[:400]:
            pub.publish(b)
        status = service.status.robots[entry.robot_id]
        assert wait_until(lambda: status.samples_processed >= 4000, 60)
        service.stop()  # the service goes away; the robot keeps publishing into its persistent session
        for b in batches[400:]:
            pub.publish(b)
    again = start(config, store)
    status = again.status.robots[entry.robot_id]
    try:
        assert wait_until(lambda: status.samples_processed >= 6000, 60), vars(status)
    finally:
        again.stop()
    assert raw_seqs(store, entry.robot_id) == list(range(len(batches)))
    events = store.events(robot_id=entry.robot_id)
    assert [round(e["start_s"] - stream.t[0], 1) for e in events] == [7.0]
    times = [e["time_s"] for e in store.estimates(entry.robot_id, start_s=0, end_s=2e9, parameters=["coulomb_1"])]
    assert len(times) == len(set(times)) and len(times) >= 9
    store.close()


def test_checkpoint_packing_round_trips() -> None:
    from shadow.ingest.wire import TrackerState

    arrays = {"a": np.arange(5.0), "b/c": np.eye(2)}
    state = TrackerState(robot_id="p4", next_seq=8, last_t_s=12.5)
    got, seq = unpack_checkpoint(pack_checkpoint(arrays, state))
    assert seq.next_seq == 8 and seq.last_t_s == 12.5
    np.testing.assert_array_equal(got["b/c"], np.eye(2))
