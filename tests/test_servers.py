"""The server fixtures themselves: a real mosquitto passes a QoS 1 message, a real PostgreSQL answers SQL."""

from __future__ import annotations

import queue

import paho.mqtt.client as mqtt
import pytest
import sqlalchemy as sa

from tests.servers import Broker, PostgresServer


@pytest.mark.mosquitto
def test_mosquitto_fixture_delivers_a_qos1_message(mosquitto_broker: Broker) -> None:
    received: queue.Queue[bytes] = queue.Queue()
    sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="shadow-test-sub")
    sub.on_message = lambda client, userdata, msg: received.put(msg.payload)
    assert sub.connect(mosquitto_broker.host, mosquitto_broker.port) == mqtt.MQTT_ERR_SUCCESS
    sub.loop_start()
    try:
        result, _ = sub.subscribe("shadow-test/#", qos=1)
        assert result == mqtt.MQTT_ERR_SUCCESS
        pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="shadow-test-pub")
        pub.connect(mosquitto_broker.host, mosquitto_broker.port)
        pub.loop_start()
        # retry until the subscription is active on the broker side
        payload = None
        for _ in range(50):
            info = pub.publish("shadow-test/ping", b"ping", qos=1)
            info.wait_for_publish(timeout=2)
            assert info.rc == mqtt.MQTT_ERR_SUCCESS
            try:
                payload = received.get(timeout=0.1)
                break
            except queue.Empty:
                continue
        pub.loop_stop()
        pub.disconnect()
        assert payload == b"ping"
    finally:
        sub.loop_stop()
        sub.disconnect()


@pytest.mark.postgres
def test_postgres_fixture_answers_sql(postgres_server: PostgresServer) -> None:
    engine = sa.create_engine(postgres_server.url())
    with engine.connect() as conn:
        version = conn.execute(sa.text("select version()")).scalar_one()
        assert "PostgreSQL" in version
        assert conn.execute(sa.text("select 6 * 7")).scalar_one() == 42
    engine.dispose()
