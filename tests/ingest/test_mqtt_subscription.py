"""One robot's persistent QoS 1 session against a real mosquitto: nothing accepted is lost.

Properties checked are those of the MQTT specification (OASIS MQTT 3.1.1 and 5.0, sections 3.1.2.4 /
3.1.2.4 "Clean Session"/"Clean Start", 4.3.2 QoS 1 delivery, 3.1.4 session take-over): a persistent
session keeps QoS 1 messages while its client is away, and an unacknowledged message is delivered again.
"""

from __future__ import annotations

import queue
import socket
import time
import uuid

import paho.mqtt.client as mqtt
import pytest

from shadow.errors import ConfigurationError
from shadow.ingest.mqtt import MqttSettings, ReceivedMessage, RobotSubscription, client_id_for
from tests.servers import Broker

pytestmark = pytest.mark.mosquitto


def publisher(broker: Broker) -> mqtt.Client:
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"pub-{uuid.uuid4().hex[:8]}")
    assert client.connect(broker.host, broker.port) == mqtt.MQTT_ERR_SUCCESS
    client.loop_start()
    return client


def publish_all(client: mqtt.Client, topic: str, payloads: list[bytes]) -> None:
    for p in payloads:
        info = client.publish(topic, p, qos=1)
        assert info.rc == mqtt.MQTT_ERR_SUCCESS
        info.wait_for_publish(timeout=5)


def drain(sub: RobotSubscription, n: int, *, timeout_s: float = 10.0, ack: bool = True) -> list[ReceivedMessage]:
    got: list[ReceivedMessage] = []
    deadline = time.monotonic() + timeout_s
    while len(got) < n and time.monotonic() < deadline:
        try:
            m = sub.inbox.get(timeout=0.1)
        except queue.Empty:
            continue
        got.append(m)
        if ack:
            sub.acknowledge(m)
    return got


def settings_for(broker: Broker, protocol: str) -> MqttSettings:
    return MqttSettings(host=broker.host, port=broker.port, protocol=protocol)  # type: ignore[arg-type]


def crash(sub: RobotSubscription) -> None:
    """Lose the connection without a DISCONNECT packet, as a killed process would."""
    sub._client.loop_stop()
    sock = sub._client.socket()
    if sock is not None:
        sock.shutdown(socket.SHUT_RDWR)
        sock.close()


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_broker_keeps_messages_while_the_robot_session_is_away(mosquitto_broker: Broker, protocol: str) -> None:
    robot = f"site/cell/r-{uuid.uuid4().hex[:6]}"
    topic = f"test/{robot}/samples"
    sub = RobotSubscription(robot, topic, settings_for(mosquitto_broker, protocol))
    sub.start()
    sub.stop()  # the session stays on the broker
    pub = publisher(mosquitto_broker)
    payloads = [f"m{i}".encode() for i in range(30)]
    publish_all(pub, topic, payloads)
    pub.loop_stop()
    pub.disconnect()

    again = RobotSubscription(robot, topic, settings_for(mosquitto_broker, protocol))
    again.start()
    try:
        got = drain(again, len(payloads))
    finally:
        again.stop()
    assert [m.payload for m in got] == payloads
    assert again.counters.acknowledged == len(payloads)


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_unacknowledged_messages_are_delivered_again_after_a_crash(mosquitto_broker: Broker, protocol: str) -> None:
    robot = f"site/cell/r-{uuid.uuid4().hex[:6]}"
    topic = f"test/{robot}/samples"
    sub = RobotSubscription(robot, topic, settings_for(mosquitto_broker, protocol))
    sub.start()
    pub = publisher(mosquitto_broker)
    payloads = [f"m{i}".encode() for i in range(10)]
    publish_all(pub, topic, payloads)
    first = drain(sub, len(payloads), ack=False)
    handled = first[:4]
    for m in handled:  # the pipeline handled four of them, then the process died
        sub.acknowledge(m)
    time.sleep(0.2)  # let the PUBACKs leave
    crash(sub)

    again = RobotSubscription(robot, topic, settings_for(mosquitto_broker, protocol))
    again.start()
    try:
        redelivered = drain(again, len(payloads) - len(handled))
    finally:
        again.stop()
        pub.loop_stop()
        pub.disconnect()
    assert [m.payload for m in first] == payloads
    assert [m.payload for m in redelivered] == payloads[len(handled) :]
    assert all(m.duplicate for m in redelivered)


def test_a_second_owner_takes_the_session_over(mosquitto_broker: Broker) -> None:
    robot = f"site/cell/r-{uuid.uuid4().hex[:6]}"
    topic = f"test/{robot}/samples"
    old = RobotSubscription(robot, topic, settings_for(mosquitto_broker, "5"))
    old.start()
    new = RobotSubscription(robot, topic, settings_for(mosquitto_broker, "5"))
    new.start()
    try:
        deadline = time.monotonic() + 5
        while old.counters.disconnects == 0 and time.monotonic() < deadline:
            time.sleep(0.05)
        assert old.counters.disconnects >= 1  # the broker disconnected the stale owner
        pub = publisher(mosquitto_broker)
        publish_all(pub, topic, [b"x"])
        pub.loop_stop()
        pub.disconnect()
        assert [m.payload for m in drain(new, 1)] == [b"x"]
    finally:
        old._client.loop_stop()  # stop the old one from reconnecting and stealing the session back
        new.stop()


def test_acknowledging_out_of_order_is_refused(mosquitto_broker: Broker) -> None:
    robot = f"site/cell/r-{uuid.uuid4().hex[:6]}"
    topic = f"test/{robot}/samples"
    sub = RobotSubscription(robot, topic, settings_for(mosquitto_broker, "5"))
    sub.start()
    pub = publisher(mosquitto_broker)
    try:
        publish_all(pub, topic, [b"a", b"b"])
        a, b = drain(sub, 2, ack=False)
        with pytest.raises(Exception, match="acknowledgement out of order"):
            sub.acknowledge(b)
        sub.acknowledge(a)
        sub.acknowledge(b)
        assert sub.counters.acknowledged == 2
    finally:
        pub.loop_stop()
        pub.disconnect()
        sub.stop()


def test_unreachable_broker_gives_a_clear_error() -> None:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]  # bound but not listening: connections are refused
        sub = RobotSubscription("a/b/c", "test/a/b/c", MqttSettings(port=port))
        with pytest.raises(Exception, match=r"no connection to mqtt://127.0.0.1:\d+ \(MQTT 5\) within 1.5 s"):
            sub.start(wait_s=1.5)


def test_settings_are_validated() -> None:
    with pytest.raises(ConfigurationError, match="mqtt.port"):
        MqttSettings(port=0)
    with pytest.raises(ConfigurationError, match="tls_key_file go together"):
        MqttSettings(tls_cert_file="c.pem")
    assert "secret" not in repr(MqttSettings(username="u", password="secret"))
    assert "secret" not in MqttSettings(username="u", password="secret").describe()


def test_client_ids_depend_on_the_robot_only() -> None:
    assert client_id_for("a/b/c") == client_id_for("a/b/c")
    assert client_id_for("a/b/c") != client_id_for("a/b/d")
    long_id = "x" * 200
    assert len(client_id_for(long_id)) <= 64
    assert client_id_for("a b/c") != client_id_for("a-b/c")  # slugging never merges two robots
