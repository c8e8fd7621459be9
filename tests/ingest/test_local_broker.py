"""The demo's local broker: both kinds start on loopback and carry a QoS 1 message through paho."""

from __future__ import annotations

import queue

import paho.mqtt.client as mqtt
import pytest

from shadow.ingest.broker import start_local_broker


def round_trip(host: str, port: int) -> bytes | None:
    got: queue.Queue[bytes] = queue.Queue()
    sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="shadow-broker-test-sub")
    sub.on_message = lambda c, u, msg: got.put(msg.payload)
    assert sub.connect(host, port) == mqtt.MQTT_ERR_SUCCESS
    sub.loop_start()
    pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="shadow-broker-test-pub")
    pub.connect(host, port)
    pub.loop_start()
    try:
        sub.subscribe("shadow-broker-test/#", qos=1)
        for _ in range(50):
            info = pub.publish("shadow-broker-test/x", b"hello", qos=1)
            info.wait_for_publish(timeout=2)
            assert info.rc == mqtt.MQTT_ERR_SUCCESS
            try:
                return got.get(timeout=0.1)
            except queue.Empty:
                continue
        return None
    finally:
        for client in (pub, sub):
            client.loop_stop()
            client.disconnect()


@pytest.mark.parametrize("kind", ["mosquitto", "embedded"])
@pytest.mark.mosquitto
def test_local_broker_carries_a_message(kind: str) -> None:
    broker = start_local_broker(prefer=kind)
    try:
        assert broker.kind == kind
        assert broker.host == "127.0.0.1"
        assert round_trip(broker.host, broker.port) == b"hello"
    finally:
        broker.stop()
    assert broker.process.poll() is not None
