"""Send simulated batches where a controller would: an MQTT broker, or a recording file.

:class:`BatchPublisher` publishes each :class:`~shadow.ingest.wire.SampleBatch` on its robot's samples
topic with QoS 1, like a controller or an edge gateway. It caps the messages not yet acknowledged by the
broker (FIELD-NOTES: past 65,535 unacknowledged messages paho's packet ids collide and ``publish()``
fails), checks every ``rc``, and marks the robot online/offline on its retained status topic with a last
will, so a dead simulator shows as offline.

:class:`RecordingWriter` writes the same messages one per line (the JSON encoding, which has no line
breaks), the form ``shadow analyze`` reads back.
"""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path
from types import TracebackType
from typing import Any, TextIO

import paho.mqtt.client as mqtt

from shadow.errors import ShadowError
from shadow.ingest.mqtt import MqttSettings
from shadow.ingest.topics import RobotAddress, TopicLayout
from shadow.ingest.wire import SampleBatch, encode_binary, encode_json


class PublishError(ShadowError, RuntimeError):
    """The broker did not take a message."""


class BatchPublisher:
    """One robot's publisher (QoS 1, bounded in-flight)."""

    def __init__(
        self,
        address: RobotAddress,
        settings: MqttSettings,
        *,
        layout: TopicLayout | None = None,
        encoding: str = "binary",
        max_unacknowledged: int = 1000,
        client_id: str | None = None,
    ) -> None:
        if encoding not in ("binary", "json"):
            raise ShadowError(f"encoding: must be 'binary' or 'json', got {encoding!r}")
        self.address = address
        self.layout = layout or TopicLayout()
        self.topic = self.layout.samples_topic(address)
        self.status_topic = self.layout.status_topic(address)
        self.encoding = encoding
        self.max_unacknowledged = max_unacknowledged
        self.settings = settings
        self.published = 0
        self._unacked = 0
        self._cond = threading.Condition()
        self._connected = threading.Event()
        cid = client_id or f"shadow-sim-{address.site}-{address.cell}-{address.robot}"
        protocol = mqtt.MQTTv5 if settings.protocol == "5" else mqtt.MQTTv311
        self._client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=cid, protocol=protocol)
        if settings.username is not None:
            self._client.username_pw_set(settings.username, settings.password)
        if settings.tls_ca_file is not None:
            self._client.tls_set(ca_certs=settings.tls_ca_file, certfile=settings.tls_cert_file,
                                 keyfile=settings.tls_key_file)  # fmt: skip
        self._client.will_set(self.status_topic, json.dumps({"state": "offline"}), qos=1, retain=True)
        self._client.on_connect = self._on_connect
        self._client.on_publish = self._on_publish

    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any, properties: Any) -> None:
        if not reason.is_failure:
            client.publish(self.status_topic, json.dumps({"state": "online"}), qos=1, retain=True)
            self._connected.set()

    def _on_publish(self, client: mqtt.Client, userdata: Any, mid: int, reason: Any, properties: Any) -> None:
        with self._cond:
            self._unacked -= 1
            self._cond.notify_all()

    def __enter__(self) -> BatchPublisher:
        self.connect()
        return self

    def __exit__(self, et: type[BaseException] | None, e: BaseException | None, tb: TracebackType | None) -> None:
        self.close()

    def connect(self, *, timeout_s: float = 10.0) -> None:
        self._client.connect(self.settings.host, self.settings.port, keepalive=self.settings.keepalive_s)
        self._client.loop_start()
        if not self._connected.wait(timeout_s):
            self._client.loop_stop()
            raise PublishError(f"no connection to {self.settings.describe()} within {timeout_s} s")

    def publish(self, batch: SampleBatch, *, timeout_s: float = 30.0) -> None:
        """Publish one batch; blocks while too many are unacknowledged."""
        payload = encode_binary(batch) if self.encoding == "binary" else encode_json(batch)
        deadline = time.monotonic() + timeout_s
        with self._cond:
            while self._unacked >= self.max_unacknowledged:
                left = deadline - time.monotonic()
                if left <= 0 or not self._cond.wait(left):
                    raise PublishError(f"{self.topic}: broker acknowledged nothing for {timeout_s} s")
            self._unacked += 1
        info = self._client.publish(self.topic, payload, qos=1)
        # NO_CONN: paho keeps a QoS 1 message while disconnected and sends it on reconnection (on_publish follows)
        if info.rc not in (mqtt.MQTT_ERR_SUCCESS, mqtt.MQTT_ERR_NO_CONN):
            with self._cond:
                self._unacked -= 1
            raise PublishError(f"{self.topic}: publish failed: {mqtt.error_string(info.rc)}")
        self.published += 1

    def flush(self, *, timeout_s: float = 30.0) -> None:
        """Wait until the broker acknowledged everything published."""
        deadline = time.monotonic() + timeout_s
        with self._cond:
            while self._unacked > 0:
                left = deadline - time.monotonic()
                if left <= 0 or not self._cond.wait(left):
                    raise PublishError(f"{self.topic}: {self._unacked} messages unacknowledged after {timeout_s} s")

    def close(self) -> None:
        try:
            self.flush(timeout_s=5.0)
        finally:
            info = self._client.publish(self.status_topic, json.dumps({"state": "offline"}), qos=1, retain=True)
            info.wait_for_publish(timeout=2.0)
            self._client.disconnect()
            self._client.loop_stop()


class RecordingWriter:
    """Writes batches as a recording: one JSON-encoded message per line."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._file: TextIO = self.path.open("w", encoding="utf-8")
        self.written = 0

    def write(self, batch: SampleBatch) -> None:
        self._file.write(encode_json(batch).decode("utf-8"))
        self._file.write("\n")
        self.written += 1

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> RecordingWriter:
        return self

    def __exit__(self, et: type[BaseException] | None, e: BaseException | None, tb: TracebackType | None) -> None:
        self.close()
