"""The MQTT side of ingest: one persistent QoS 1 session per robot, acknowledged by the pipeline.

Why one session per robot: the broker keeps a robot's messages while nobody reads them (a persistent
session, ``clean_start=False`` with a session expiry in MQTT 5, ``clean_session=False`` in 3.1.1), and
the session can move between machines with the robot, because its client id is derived from the robot
id alone (see :func:`client_id_for`). A second client connecting with the same id takes the session
over and the broker disconnects the first (MQTT 5.0 section 3.1.4, MQTT 3.1.1 section 3.1.4).

Why manual acknowledgement: paho acknowledges a QoS 1 message when ``on_message`` returns unless
``manual_ack=True``. Here the callback only puts the message on a bounded inbox; the pipeline
calls :meth:`RobotSubscription.acknowledge` once the batch it carried is safely handed on (stored,
or dead-lettered). A message that was received but not acknowledged when the process died is
delivered again by the broker on the next connection, so nothing accepted is lost. Duplicates that
this produces are dropped downstream by sequence number.

Acknowledgements go out in the order the messages arrived (MQTT 3.1.1 section 4.6 requires PUBACKs in
receive order), so the pipeline must acknowledge in that order: :meth:`acknowledge` checks it.

Back-pressure: the client asks for an in-flight window (MQTT 5 ``Receive Maximum``; mosquitto's
``max_inflight_messages`` for 3.1.1), but a broker may send more: mosquitto 2.0.11 was measured with
several hundred unacknowledged deliveries outstanding once PUBACKs flow. So the window is not relied on:
when the inbox is full, the network thread waits for room (TCP flow control then holds the broker back)
instead of dropping the message. A dropped, unacknowledged message would occupy an in-flight slot until
the next reconnect while later ones went on, so the robot's stream would show a gap and the redelivered
message would come too late. The time the thread waited is counted in ``inbox_full_waits``.

Acknowledgements belong to a connection: packet ids restart per connection and a broker resends a
session's unacknowledged messages with their old ids, so a message taken from the inbox after a
reconnect must not acknowledge (or be confused with) the resent copy. Each message carries the number
of the connection it came on, and :meth:`acknowledge` ignores messages of an earlier one. An
acknowledgement that cannot be sent (the connection dropped, or the session was stopped) is counted in
``acks_unsent`` and logged once per connection: the broker delivers those messages again, and the
sequence numbers drop what was already stored.

:class:`BrokerProbe` is one plain connection (no session, no subscription) that tells a pool worker
whether it can reach the broker at all, also while it follows no robot (:mod:`shadow.pool.member`).
"""

from __future__ import annotations

import hashlib
import logging
import queue
import re
import ssl
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from typing import Any, Literal

import paho.mqtt.client as mqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from shadow.errors import ConfigurationError, ShadowError

log = logging.getLogger(__name__)

INBOX_WAIT_STEP_S = 0.2  # how often a network thread waiting for inbox room checks for a stop
MAX_READABLE_CLIENT_ID = 64  # mosquitto accepts up to 65535 bytes; keep ids readable in broker logs


class BrokerConnectionError(ShadowError, RuntimeError):
    """The broker refused the connection or could not be reached."""


@dataclass(frozen=True, slots=True)
class MqttSettings:
    """How to reach the broker. Secrets are never logged (see :meth:`describe`)."""

    host: str = "127.0.0.1"
    port: int = 1883
    protocol: Literal["5", "3.1.1"] = "5"
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    tls_ca_file: str | None = None
    tls_cert_file: str | None = None
    tls_key_file: str | None = None
    keepalive_s: int = 30
    session_expiry_s: int = 7 * 24 * 3600  # the broker keeps an unread robot's messages this long (MQTT 5)
    reconnect_min_delay_s: float = 0.5
    reconnect_max_delay_s: float = 30.0
    client_id_prefix: str = "shadow"

    def __post_init__(self) -> None:
        if not 0 < self.port < 65536:
            raise ConfigurationError(f"mqtt.port: must be 1..65535, got {self.port}")
        if self.protocol not in ("5", "3.1.1"):
            raise ConfigurationError(f"mqtt.protocol: must be '5' or '3.1.1', got {self.protocol!r}")
        if self.keepalive_s < 5:
            raise ConfigurationError(f"mqtt.keepalive_s: must be >= 5 s, got {self.keepalive_s}")
        if not 0 < self.reconnect_min_delay_s <= self.reconnect_max_delay_s:
            raise ConfigurationError("mqtt.reconnect_min_delay_s must be > 0 and <= reconnect_max_delay_s")
        if (self.tls_cert_file is None) != (self.tls_key_file is None):
            raise ConfigurationError("mqtt.tls_cert_file and mqtt.tls_key_file go together")

    def describe(self) -> str:
        """A log-safe one-line description (no password)."""
        auth = f" as {self.username}" if self.username else ""
        scheme = "mqtts" if self.tls_ca_file else "mqtt"
        return f"{scheme}://{self.host}:{self.port} (MQTT {self.protocol}){auth}"


def client_id_for(robot_id: str, prefix: str = "shadow") -> str:
    """The MQTT client id of a robot's session: derived from the robot id only, so any worker can take it.

    >>> client_id_for("northfield/line3/picker-1")
    'shadow-northfield-line3-picker-1'
    """
    slug = re.sub(r"[^A-Za-z0-9_-]+", "-", robot_id).strip("-")
    cid = f"{prefix}-{slug}"
    if len(cid) > MAX_READABLE_CLIENT_ID or slug != robot_id.replace("/", "-"):
        # keep it unique when the slug had to change or shorten the id
        digest = hashlib.sha256(robot_id.encode()).hexdigest()[:12]
        cid = f"{cid[: MAX_READABLE_CLIENT_ID - 13]}-{digest}"
    return cid


def build_client(settings: MqttSettings, client_id: str, *, persistent: bool, manual_ack: bool) -> mqtt.Client:
    """A paho client for ``settings``: protocol, credentials, TLS and reconnect delays (not yet connected).

    ``persistent``: MQTT 3.1.1 ``clean_session=False`` (for MQTT 5 the session is asked for at connect
    time, ``clean_start=False`` with a session expiry).
    """
    s = settings
    if s.protocol == "5":
        client = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv5, manual_ack=manual_ack
        )
    else:
        client = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2,
            client_id=client_id,
            protocol=mqtt.MQTTv311,
            clean_session=not persistent,
            manual_ack=manual_ack,
        )
    if s.username is not None:
        client.username_pw_set(s.username, s.password)
    if s.tls_ca_file is not None:
        client.tls_set(
            ca_certs=s.tls_ca_file,
            certfile=s.tls_cert_file,
            keyfile=s.tls_key_file,
            cert_reqs=ssl.CERT_REQUIRED,
            tls_version=ssl.PROTOCOL_TLS_CLIENT,
        )
    client.reconnect_delay_set(
        min_delay=max(1, round(s.reconnect_min_delay_s)), max_delay=round(s.reconnect_max_delay_s)
    )
    return client


@dataclass(frozen=True, slots=True)
class ReceivedMessage:
    """One MQTT message as it came off the wire, before decoding."""

    topic: str
    payload: bytes
    mid: int
    qos: int
    duplicate: bool  # the broker's DUP flag: possibly delivered before
    received_at_s: float  # time.time() on arrival
    connection: int = 0  # number of the connection it came on (see RobotSubscription.acknowledge)


@dataclass
class SubscriptionCounters:
    """What the subscription has seen; read by the status endpoint."""

    received: int = 0
    acknowledged: int = 0
    overflowed: int = 0  # messages dropped unacknowledged because the inbox stayed full while stopping
    inbox_full_waits: int = 0  # times the network thread waited for room in the inbox
    connects: int = 0
    disconnects: int = 0
    acks_unsent: int = 0  # acknowledgements not sent: connection lost or session stopped (delivered again)
    last_connect_rc: str = ""


class RobotSubscription:
    """One robot's persistent QoS 1 session on the broker; messages land in a bounded inbox.

    The network thread (paho's loop) only enqueues; the pipeline thread drains :attr:`inbox`,
    handles each message, then calls :meth:`acknowledge` in arrival order.
    """

    def __init__(
        self,
        robot_id: str,
        topic: str,
        settings: MqttSettings,
        *,
        inbox_size: int = 1000,
        receive_maximum: int = 20,
    ) -> None:
        if inbox_size < 20:
            raise ConfigurationError(f"inbox_size: must be >= the broker's in-flight window (20), got {inbox_size}")
        if not 0 < receive_maximum <= min(inbox_size, 65535):
            raise ConfigurationError(f"receive_maximum: must be 1..min(inbox_size, 65535), got {receive_maximum}")
        self.receive_maximum = receive_maximum
        self.robot_id = robot_id
        self.topic = topic
        self.settings = settings
        self.client_id = client_id_for(robot_id, settings.client_id_prefix)
        self.inbox: queue.Queue[ReceivedMessage] = queue.Queue(maxsize=inbox_size)
        self.counters = SubscriptionCounters()
        self.connected = threading.Event()
        self.subscribed = threading.Event()  # the broker granted the subscription of the current connection
        self._pending_acks: deque[int] = deque()  # mids in arrival order, not yet acknowledged
        self._lock = threading.Lock()
        self._connection = 0  # incremented on every successful connect
        self._unsent_logged = -1  # the connection whose unsent acknowledgements were logged
        self._down_since = time.monotonic()  # not connected since then (None while connected)
        self._stopping = False
        self._client = self._build_client()

    def _build_client(self) -> mqtt.Client:
        client = build_client(self.settings, self.client_id, persistent=True, manual_ack=True)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        client.on_subscribe = self._on_subscribe
        return client

    # --- paho callbacks (network thread): thin, no maths, no database -------------------------
    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any, properties: Any) -> None:
        self.counters.last_connect_rc = str(reason)
        if reason.is_failure:
            log.warning("robot %s: broker refused connection: %s", self.robot_id, reason)
            return
        self.counters.connects += 1
        with self._lock:
            # unacknowledged messages of the old connection will be delivered again by the broker
            self._pending_acks.clear()
            self._connection += 1
        result, _ = client.subscribe(self.topic, qos=1)
        if result != mqtt.MQTT_ERR_SUCCESS:
            log.error("robot %s: subscribe to %s failed: %s", self.robot_id, self.topic, mqtt.error_string(result))
            return
        log.info("robot %s: connected to %s, session present=%s", self.robot_id, self.settings.describe(),
                 getattr(flags, "session_present", None))  # fmt: skip
        self._down_since = None
        self.connected.set()

    def _on_subscribe(self, client: mqtt.Client, userdata: Any, mid: int, reasons: Any, properties: Any) -> None:
        refused = [r for r in reasons if getattr(r, "is_failure", False)]
        if refused:
            log.error("robot %s: the broker refused the subscription to %s: %s", self.robot_id, self.topic, refused[0])
            return
        self.subscribed.set()

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any, properties: Any) -> None:
        self.connected.clear()
        self.subscribed.clear()
        if self._down_since is None:
            self._down_since = time.monotonic()
        self.counters.disconnects += 1
        if self._stopping:
            return
        log.warning("robot %s: disconnected from broker (%s); paho reconnects with back-off", self.robot_id, reason)

    def _on_message(self, client: mqtt.Client, userdata: Any, msg: mqtt.MQTTMessage) -> None:
        with self._lock:
            received = ReceivedMessage(
                msg.topic, bytes(msg.payload), msg.mid, msg.qos, bool(msg.dup), time.time(), self._connection
            )
            if msg.qos > 0:  # registered before it can be taken from the inbox, so its ack finds it
                self._pending_acks.append(msg.mid)
            self.counters.received += 1
        waited = False
        while True:
            try:
                self.inbox.put(received, timeout=INBOX_WAIT_STEP_S)
                return
            except queue.Full:
                if self._stopping:
                    # not acknowledged: the broker sends it again on the session's next connection
                    self.counters.overflowed += 1
                    return
                if not waited:
                    waited = True
                    self.counters.inbox_full_waits += 1

    # --- pipeline side ----------------------------------------------------------------------
    def start(self, *, wait_s: float | None = 10.0) -> None:
        """Connect (blocking until the first CONNACK when ``wait_s`` is set) and start paho's network thread."""
        s = self.settings
        props = None
        if s.protocol == "5":
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = s.session_expiry_s
            props.ReceiveMaximum = self.receive_maximum
            rc = self._client.connect_async(
                s.host, s.port, keepalive=s.keepalive_s, clean_start=False, properties=props
            )
        else:
            rc = self._client.connect_async(s.host, s.port, keepalive=s.keepalive_s)
        if rc not in (None, mqtt.MQTT_ERR_SUCCESS):
            raise BrokerConnectionError(f"robot {self.robot_id}: cannot connect to {s.describe()}: {rc}")
        self._client.loop_start()
        if wait_s is None:
            return
        deadline = time.monotonic() + wait_s
        if not self.connected.wait(wait_s):
            self.stop()
            raise BrokerConnectionError(
                f"robot {self.robot_id}: no connection to {s.describe()} within {wait_s} s "
                f"(last answer: {self.counters.last_connect_rc or 'none'})"
            )
        # a new session receives nothing published before the broker has the subscription
        if not self.subscribed.wait(max(0.0, deadline - time.monotonic())):
            self.stop()
            raise BrokerConnectionError(
                f"robot {self.robot_id}: connected to {s.describe()}, but the subscription to {self.topic} was not "
                f"granted within {wait_s} s (broker ACL?)"
            )

    def unreachable_for_s(self) -> float:
        """How long the session has been without a connection [s] (0 while connected; counted from creation
        before the first connection)."""
        since = self._down_since
        return 0.0 if since is None else time.monotonic() - since

    def acknowledge(self, message: ReceivedMessage) -> None:
        """Send the PUBACK for a handled message. Must be called in arrival order."""
        if message.qos == 0:
            return
        with self._lock:
            if self._stopping:
                self.counters.acks_unsent += 1  # stopped (handed over): the next owner gets it again
                return
            if message.connection != self._connection or not self._pending_acks:
                return  # the connection it came on is gone; the broker will send it again
            if self._pending_acks[0] != message.mid:
                if message.mid not in self._pending_acks:
                    return  # from an earlier connection
                raise ShadowError(
                    f"robot {self.robot_id}: acknowledgement out of order (mid {message.mid}, "
                    f"expected {self._pending_acks[0]})"
                )
            self._pending_acks.popleft()
            rc = self._client.ack(message.mid, message.qos)  # queued, not blocking; under the lock so stop() waits
        if rc != mqtt.MQTT_ERR_SUCCESS:
            self.counters.acks_unsent += 1
            if self._unsent_logged != message.connection:  # once per connection, not once per message
                self._unsent_logged = message.connection
                log.warning(
                    "robot %s: acknowledgements not sent (%s); the broker delivers those messages again "
                    "and the stored sequence numbers drop them",
                    self.robot_id,
                    mqtt.error_string(rc),
                )
            return
        self.counters.acknowledged += 1

    def stop(self) -> None:
        """Disconnect cleanly (the broker keeps the session and any unacknowledged messages)."""
        with self._lock:  # an acknowledgement under way goes out before the DISCONNECT
            self._stopping = True
        self._client.disconnect()
        self._client.loop_stop()
        self.connected.clear()


class BrokerProbe:
    """One plain connection to the broker (clean session, no subscription): can this process reach it?

    A pool worker asks it before claiming robots and to notice that it is cut off from the broker while
    its database connection still works (:mod:`shadow.pool.member`). The connection carries only
    keepalive pings, so ``keepalive_s`` bounds how long a silent network cut goes unnoticed (paho gives a
    connection up when a ping is not answered within one keepalive, so at most about 2 x ``keepalive_s``);
    a broker that closes or refuses the connection is noticed at once.
    """

    def __init__(
        self, settings: MqttSettings, client_id: str, *, keepalive_s: int | None = None, max_retry_s: float = 5.0
    ) -> None:
        if keepalive_s is not None and keepalive_s < 5:
            raise ConfigurationError(f"keepalive_s: must be >= 5 s, got {keepalive_s}")
        if not max_retry_s >= 1:
            raise ConfigurationError(f"max_retry_s: must be >= 1 s, got {max_retry_s}")
        self.settings = settings
        self.client_id = client_id
        self.keepalive_s = settings.keepalive_s if keepalive_s is None else keepalive_s
        self.connected = threading.Event()
        self.counters = SubscriptionCounters()
        self._down_since = time.monotonic()
        self._client = build_client(settings, client_id, persistent=False, manual_ack=False)
        # reconnect soon after the broker is back, however long it was away (one small CONNECT per try)
        self._client.reconnect_delay_set(min_delay=1, max_delay=max(1, round(max_retry_s)))
        self._client.on_connect = self._on_connect
        self._client.on_disconnect = self._on_disconnect

    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any, properties: Any) -> None:
        self.counters.last_connect_rc = str(reason)
        if reason.is_failure:
            log.warning("broker probe %s: broker refused connection: %s", self.client_id, reason)
            return
        self.counters.connects += 1
        self._down_since = None
        self.connected.set()

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any, reason: Any, properties: Any) -> None:
        self.connected.clear()
        if self._down_since is None:
            self._down_since = time.monotonic()
        self.counters.disconnects += 1

    def start(self, *, wait_s: float = 0.0) -> bool:
        """Connect in the background; waits up to ``wait_s`` for the first connection, returns whether it came."""
        s = self.settings
        rc = self._client.connect_async(s.host, s.port, keepalive=self.keepalive_s)
        if rc not in (None, mqtt.MQTT_ERR_SUCCESS):
            raise BrokerConnectionError(f"broker probe: cannot connect to {s.describe()}: {rc}")
        self._client.loop_start()
        return self.connected.wait(wait_s) if wait_s > 0 else self.connected.is_set()

    def unreachable_for_s(self) -> float:
        """How long the broker has been out of reach [s] (0 while connected; counted from creation before)."""
        since = self._down_since
        return 0.0 if since is None else time.monotonic() - since

    def stop(self) -> None:
        self._client.disconnect()
        self._client.loop_stop()
        self.connected.clear()
