"""The shipped broker configuration, run for real: mosquitto 2.0 with deploy/mosquitto/mosquitto.conf.

The broker runs the deployment file itself with only ports and paths swapped (:func:`derive_broker_config`):
a free loopback port for each listener, a temporary password file made with ``mosquitto_passwd``, the
shipped ``acl.example`` (written by ``make-acl`` through ``TopicLayout.mosquitto_acl``), a throw-away CA and
server certificate made with ``openssl`` and a temporary persistence directory. The checks are those of the
MQTT standard and mosquitto's documentation: the CONNACK, PUBACK and SUBACK reason code 0x87 (not authorized)
is MQTT 5.0 section 2.4 (Reason Codes); PUBACK carries no reason code in
MQTT 3.1.1 (section 3.4), so there a refused publish can only be seen by its absence at the subscriber.
"""

from __future__ import annotations

import os
import pwd
import queue
import shutil
import ssl
import subprocess
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest

from shadow.ingest.mqtt import MqttSettings, RobotSubscription
from shadow.ingest.topics import RobotAddress, TopicKind, TopicLayout
from tests.servers import find_executable, free_loopback_port, wait_for_port

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
CONF = DEPLOY / "mosquitto" / "mosquitto.conf"
ACL = DEPLOY / "mosquitto" / "acl.example"

LAYOUT = TopicLayout()
PICKER = RobotAddress("northfield", "line3", "picker-1")  # the two robots of deploy/shadow.example.toml
HEXA = RobotAddress("northfield", "line4", "hexa-2")
SERVICE_USER = "shadow"
PASSWORDS = {SERVICE_USER: "service-secret-1", "ctl-picker-1": "picker-secret-2", "ctl-hexa-2": "hexa-secret-3"}

NOT_AUTHORIZED = 0x87  # MQTT 5.0 section 2.4, Reason Codes
WAIT_S = 5.0

pytestmark = pytest.mark.mosquitto

# Keys whose value the test replaces (ports and file locations); every other line runs as shipped.
PATH_KEYS = ("password_file", "acl_file", "persistence_location", "certfile", "keyfile", "cafile")


def derive_broker_config(deploy_text: str, *, ports: dict[str, int], paths: dict[str, str], user: str) -> str:
    """The deployment configuration with its listener ports and file paths replaced.

    ``ports`` maps each shipped listener port ("1883", "8883") to a free loopback port; every listener
    is bound to 127.0.0.1. ``user`` is the account mosquitto keeps when started as root.
    """
    out = []
    for raw in deploy_text.splitlines():
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        key, _, value = line.partition(" ")
        if key == "listener":
            out.append(f"listener {ports[value.split()[0]]} 127.0.0.1")
        elif key in PATH_KEYS:
            out.append(f"{key} {paths[key]}")
        elif key == "user":
            continue
        else:
            out.append(line)
    out.append(f"user {user}")
    return "\n".join(out) + "\n"


def make_certificates(directory: Path) -> dict[str, Path]:
    """A throw-away CA and a server certificate for 127.0.0.1 signed by it (openssl, EC P-256)."""
    openssl = shutil.which("openssl")
    if openssl is None:
        pytest.fail("openssl is not installed; run: apt-get install -y openssl")
    ca_key, ca_crt = directory / "ca.key", directory / "ca.crt"
    key, csr, crt = directory / "server.key", directory / "server.csr", directory / "server.crt"
    ext = directory / "server.ext"
    ext.write_text(
        "basicConstraints=critical,CA:FALSE\nkeyUsage=critical,digitalSignature\nextendedKeyUsage=serverAuth\n"
        "subjectAltName=IP:127.0.0.1\nsubjectKeyIdentifier=hash\nauthorityKeyIdentifier=keyid,issuer\n"
    )
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    steps = [
        [openssl, "req", "-x509", *ec, "-keyout", ca_key, "-out", ca_crt, "-days", "2", "-subj", "/CN=shadow test CA",
         "-addext", "basicConstraints=critical,CA:TRUE", "-addext", "keyUsage=critical,keyCertSign,cRLSign"],
        [openssl, "req", *ec, "-keyout", key, "-out", csr, "-subj", "/CN=127.0.0.1"],
        [openssl, "x509", "-req", "-in", csr, "-CA", ca_crt, "-CAkey", ca_key, "-CAcreateserial", "-out", crt,
         "-days", "2", "-extfile", ext],
    ]  # fmt: skip
    for argv in steps:
        subprocess.run([str(a) for a in argv], check=True, capture_output=True)
    return {"cafile": ca_crt, "certfile": crt, "keyfile": key}


def make_password_file(path: Path, passwords: dict[str, str]) -> None:
    """``mosquitto_passwd -b``: one salted hash per user."""
    exe = shutil.which("mosquitto_passwd")
    if exe is None:
        pytest.fail("mosquitto_passwd is not installed; run: apt-get install -y mosquitto")
    path.touch(mode=0o600)
    for user, password in passwords.items():
        subprocess.run([exe, "-b", str(path), user, password], check=True, capture_output=True)


@dataclass
class DeployedBroker:
    """mosquitto running the deployment configuration on loopback."""

    plain_port: int
    tls_port: int
    ca_file: Path
    workdir: Path
    config_path: Path
    process: subprocess.Popen[bytes]

    def stop(self) -> None:
        self.process.terminate()  # SIGTERM: mosquitto saves its persistence database on the way out
        try:
            self.process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait()

    def log(self) -> str:
        return (self.workdir / "mosquitto.log").read_text(errors="replace")


def start_deployed_broker(workdir: Path, *, certs: dict[str, Path] | None = None) -> DeployedBroker:
    """Prepare ``workdir`` (first call) and start mosquitto on the derived configuration."""
    exe = find_executable("mosquitto", [Path("/usr/sbin")])
    state = workdir / "state"
    state.mkdir(exist_ok=True)
    passwd = workdir / "passwd"
    if not passwd.exists():
        make_password_file(passwd, PASSWORDS)
    certs = certs or make_certificates(workdir)
    ports = {"1883": free_loopback_port(), "8883": free_loopback_port()}
    paths = {"password_file": str(passwd), "acl_file": str(ACL), "persistence_location": f"{state}/"}
    paths |= {k: str(v) for k, v in certs.items()}
    config = workdir / "mosquitto.conf"
    config.write_text(
        derive_broker_config(CONF.read_text(), ports=ports, paths=paths, user=pwd.getpwuid(os.getuid()).pw_name)
    )
    log = open(workdir / "mosquitto.log", "ab")  # noqa: SIM115 - closed with the process
    process = subprocess.Popen([exe, "-c", str(config)], stdout=log, stderr=subprocess.STDOUT)
    log.close()
    for port in ports.values():
        wait_for_port(port, timeout_s=10, process=process)
    return DeployedBroker(ports["1883"], ports["8883"], certs["cafile"], workdir, config, process)


@pytest.fixture(scope="module")
def broker(tmp_path_factory: pytest.TempPathFactory) -> Iterator[DeployedBroker]:
    b = start_deployed_broker(tmp_path_factory.mktemp("deployed-mosquitto"))
    try:
        yield b
    finally:
        b.stop()


class Client:
    """A paho client with its callbacks turned into queues, for checking what the broker answers."""

    def __init__(self, client_id: str, *, protocol: int = mqtt.MQTTv5) -> None:
        self.protocol = protocol
        self.paho = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=protocol)
        self.connack: queue.Queue[Any] = queue.Queue()
        self.messages: queue.Queue[mqtt.MQTTMessage] = queue.Queue()
        self.pubacks: dict[int, Any] = {}
        self.subacks: dict[int, list[Any]] = {}
        self._acked = threading.Condition()
        self.dropped = threading.Event()  # set by connack_without_thread when the broker closes the connection
        self.paho.on_connect = lambda c, u, flags, rc, props: self.connack.put(rc)
        self.paho.on_message = lambda c, u, msg: self.messages.put(msg)
        self.paho.on_publish = self._on_publish
        self.paho.on_subscribe = self._on_subscribe

    def _on_publish(self, client: Any, userdata: Any, mid: int, rc: Any, props: Any) -> None:
        with self._acked:
            self.pubacks[mid] = rc
            self._acked.notify_all()

    def _on_subscribe(self, client: Any, userdata: Any, mid: int, rcs: list[Any], props: Any) -> None:
        with self._acked:
            self.subacks[mid] = rcs
            self._acked.notify_all()

    def connect(self, port: int, user: str | None, *, ca_file: Path | None = None) -> Any:
        """Connect and return the CONNACK reason code (paho ReasonCode)."""
        if user is not None:
            self.paho.username_pw_set(user, PASSWORDS.get(user, "wrong-password"))
        if ca_file is not None:
            self.paho.tls_set(ca_certs=str(ca_file), cert_reqs=ssl.CERT_REQUIRED, tls_version=ssl.PROTOCOL_TLS_CLIENT)
        self.paho.reconnect_delay_set(min_delay=60, max_delay=60)  # a refused client must not retry during the test
        self.paho.connect("127.0.0.1", port, keepalive=30)
        self.paho.loop_start()
        return self.connack.get(timeout=WAIT_S)

    def connack_without_thread(self, port: int, *, timeout_s: float = WAIT_S) -> Any:
        """Connect, run the network loop in this thread until a CONNACK or a disconnect; None if no CONNACK."""
        self.paho.on_disconnect = lambda c, u, flags, rc, props: self.dropped.set()
        self.paho.connect("127.0.0.1", port)
        deadline = time.monotonic() + timeout_s
        while self.connack.empty() and not self.dropped.is_set() and time.monotonic() < deadline:
            self.paho.loop(timeout=0.05)
        return None if self.connack.empty() else self.connack.get()

    def publish(self, topic: str, payload: bytes) -> Any:
        """Publish with QoS 1 and return the PUBACK's reason code."""
        info = self.paho.publish(topic, payload, qos=1)
        assert info.rc == mqtt.MQTT_ERR_SUCCESS, mqtt.error_string(info.rc)
        with self._acked:
            assert self._acked.wait_for(lambda: info.mid in self.pubacks, timeout=WAIT_S), "no PUBACK"
            return self.pubacks[info.mid]

    def subscribe(self, topic: str) -> Any:
        """Subscribe with QoS 1 and return the SUBACK's reason code for the filter."""
        result, mid = self.paho.subscribe(topic, qos=1)
        assert result == mqtt.MQTT_ERR_SUCCESS
        with self._acked:
            assert self._acked.wait_for(lambda: mid in self.subacks, timeout=WAIT_S), "no SUBACK"
            return self.subacks[mid][0]

    def received(self, *, until_payload: bytes) -> list[tuple[str, bytes]]:
        """Every message up to and including the one carrying ``until_payload`` (which must come)."""
        got = []
        while True:
            msg = self.messages.get(timeout=WAIT_S)
            got.append((msg.topic, bytes(msg.payload)))
            if msg.payload == until_payload:
                return got

    def close(self) -> None:
        self.paho.disconnect()
        self.paho.loop_stop()


@pytest.fixture
def clients() -> Iterator[list[Client]]:
    made: list[Client] = []
    yield made
    for c in made:
        c.close()


def connected(clients: list[Client], port: int, user: str, **kwargs: Any) -> Client:
    c = Client(f"test-{user}-{len(clients)}-{time.monotonic_ns()}", protocol=kwargs.pop("protocol", mqtt.MQTTv5))
    clients.append(c)
    rc = c.connect(port, user, **kwargs)
    assert not rc.is_failure, f"{user}: {rc}"
    return c


def service_reader(clients: list[Client], port: int) -> Client:
    """The service user reading every robot's samples, as shadow subscribes."""
    reader = connected(clients, port, SERVICE_USER)
    assert reader.subscribe(LAYOUT.subscription()).value == 1  # granted QoS 1
    return reader


# --- authentication -------------------------------------------------------------------------------


@pytest.mark.parametrize("protocol", [mqtt.MQTTv5, mqtt.MQTTv311])
@pytest.mark.parametrize(
    ("user", "password"),
    [(None, None), ("ctl-picker-1", "not-the-password"), ("ctl-picker-1", None), ("nobody", "any")],
)
def test_broker_refuses_anonymous_and_bad_passwords(
    broker: DeployedBroker, clients: list[Client], user: str | None, password: str | None, protocol: int
) -> None:
    c = Client(f"test-refused-{len(clients)}", protocol=protocol)
    clients.append(c)
    if user is not None:
        c.paho.username_pw_set(user, password)
    rc = c.connack_without_thread(broker.plain_port)
    assert rc is not None and rc.is_failure
    # mosquitto 2.0.11 answers "not authorized" (0x87) to all four, even to a wrong password where MQTT 5
    # also offers 0x86; paho reports MQTT 3.1.1's return code 5 (section 3.2.2.3) as the same reason code
    assert rc.value == NOT_AUTHORIZED, rc


# --- access control -------------------------------------------------------------------------------


def test_controller_publishes_its_own_samples_to_the_service(broker: DeployedBroker, clients: list[Client]) -> None:
    reader = service_reader(clients, broker.plain_port)
    picker = connected(clients, broker.plain_port, "ctl-picker-1")
    assert picker.publish(LAYOUT.samples_topic(PICKER), b"batch-1").value == 0  # success
    assert reader.received(until_payload=b"batch-1") == [(LAYOUT.samples_topic(PICKER), b"batch-1")]


def test_controller_status_is_retained_for_the_service(broker: DeployedBroker, clients: list[Client]) -> None:
    hexa = connected(clients, broker.plain_port, "ctl-hexa-2")
    info = hexa.paho.publish(LAYOUT.status_topic(HEXA), b"online", qos=1, retain=True)
    info.wait_for_publish(timeout=WAIT_S)
    try:
        reader = connected(clients, broker.plain_port, SERVICE_USER)  # subscribes after the publish
        assert reader.subscribe(LAYOUT.subscription(TopicKind.STATUS)).value == 1
        msg = reader.messages.get(timeout=WAIT_S)
        assert (msg.topic, msg.payload, msg.retain) == (LAYOUT.status_topic(HEXA), b"online", True)
    finally:
        hexa.paho.publish(LAYOUT.status_topic(HEXA), b"", qos=1, retain=True).wait_for_publish(timeout=WAIT_S)


def test_controller_cannot_publish_for_another_robot(broker: DeployedBroker, clients: list[Client]) -> None:
    reader = service_reader(clients, broker.plain_port)
    picker = connected(clients, broker.plain_port, "ctl-picker-1")
    for topic in (*LAYOUT.publisher_topics(HEXA), "shadow/v1/northfield/line3/picker-1/other", "elsewhere"):
        assert picker.publish(topic, b"forged").value == NOT_AUTHORIZED, topic
    # the same connection is still allowed its own topic; everything before it was dropped by the broker
    assert picker.publish(LAYOUT.samples_topic(PICKER), b"marker").value == 0
    assert reader.received(until_payload=b"marker") == [(LAYOUT.samples_topic(PICKER), b"marker")]


def test_mqtt311_controller_forging_is_dropped_silently(broker: DeployedBroker, clients: list[Client]) -> None:
    reader = service_reader(clients, broker.plain_port)
    picker = connected(clients, broker.plain_port, "ctl-picker-1", protocol=mqtt.MQTTv311)
    picker.publish(LAYOUT.samples_topic(HEXA), b"forged-311")  # acknowledged: MQTT 3.1.1 PUBACK has no reason code
    picker.publish(LAYOUT.samples_topic(PICKER), b"marker-311")
    assert reader.received(until_payload=b"marker-311") == [(LAYOUT.samples_topic(PICKER), b"marker-311")]


def test_controller_cannot_read_any_topic(broker: DeployedBroker, clients: list[Client]) -> None:
    reader = service_reader(clients, broker.plain_port)
    picker = connected(clients, broker.plain_port, "ctl-picker-1")
    for topic in (LAYOUT.samples_topic(HEXA), LAYOUT.samples_topic(PICKER), LAYOUT.subscription(), "#"):
        # mosquitto 2.0.11 (measured) grants the SUBACK and applies the ACL's read rule to each message it
        # would deliver; a broker answering 0x87 here would be as safe. What matters is checked below.
        assert picker.subscribe(topic).value in (1, NOT_AUTHORIZED), topic
    hexa = connected(clients, broker.plain_port, "ctl-hexa-2")
    assert hexa.publish(LAYOUT.samples_topic(HEXA), b"hexa-batch").value == 0
    assert picker.publish(LAYOUT.samples_topic(PICKER), b"picker-batch").value == 0
    got = reader.received(until_payload=b"picker-batch")
    assert sorted(got) == sorted(
        [(LAYOUT.samples_topic(HEXA), b"hexa-batch"), (LAYOUT.samples_topic(PICKER), b"picker-batch")]
    )
    with pytest.raises(queue.Empty):  # the service had both; nothing reached the controller, not even its own
        picker.messages.get(timeout=0.5)


def test_service_user_cannot_publish(broker: DeployedBroker, clients: list[Client]) -> None:
    service = connected(clients, broker.plain_port, SERVICE_USER)
    for topic in (LAYOUT.samples_topic(PICKER), LAYOUT.status_topic(HEXA)):
        assert service.publish(topic, b"from-service").value == NOT_AUTHORIZED, topic


def test_shadow_robot_subscription_reads_through_the_acl(broker: DeployedBroker, clients: list[Client]) -> None:
    settings = MqttSettings(port=broker.plain_port, username=SERVICE_USER, password=PASSWORDS[SERVICE_USER])
    sub = RobotSubscription(str(PICKER), LAYOUT.samples_topic(PICKER), settings)
    sub.start(wait_s=WAIT_S)
    try:
        picker = connected(clients, broker.plain_port, "ctl-picker-1")
        assert picker.publish(LAYOUT.samples_topic(PICKER), b"through-shadow").value == 0
        message = sub.inbox.get(timeout=WAIT_S)
        assert (message.topic, message.payload, message.qos) == (LAYOUT.samples_topic(PICKER), b"through-shadow", 1)
        sub.acknowledge(message)
    finally:
        sub.stop()


# --- TLS ------------------------------------------------------------------------------------------


def test_tls_listener_carries_samples(broker: DeployedBroker, clients: list[Client]) -> None:
    reader = connected(clients, broker.tls_port, SERVICE_USER, ca_file=broker.ca_file)
    assert reader.subscribe(LAYOUT.subscription()).value == 1
    picker = connected(clients, broker.tls_port, "ctl-picker-1", ca_file=broker.ca_file)
    assert picker.publish(LAYOUT.samples_topic(PICKER), b"over-tls").value == 0
    assert reader.received(until_payload=b"over-tls") == [(LAYOUT.samples_topic(PICKER), b"over-tls")]


def test_tls_listener_is_verified_against_the_ca(broker: DeployedBroker, tmp_path: Path) -> None:
    other_ca = make_certificates(tmp_path)["cafile"]  # a CA that did not sign the broker's certificate
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="test-untrusted", protocol=mqtt.MQTTv5)
    c.tls_set(ca_certs=str(other_ca), cert_reqs=ssl.CERT_REQUIRED, tls_version=ssl.PROTOCOL_TLS_CLIENT)
    with pytest.raises(ssl.SSLCertVerificationError, match="certificate verify failed"):
        c.connect("127.0.0.1", broker.tls_port)


def test_tls_listener_refuses_plain_mqtt(broker: DeployedBroker, clients: list[Client]) -> None:
    c = Client("test-plain-on-tls")
    clients.append(c)
    c.paho.username_pw_set("ctl-picker-1", PASSWORDS["ctl-picker-1"])
    # the broker reads the CONNECT as a broken TLS ClientHello and closes the connection without a CONNACK
    assert c.connack_without_thread(broker.tls_port, timeout_s=WAIT_S) is None
    assert c.dropped.is_set()


# --- persistence ----------------------------------------------------------------------------------


def test_queued_messages_survive_a_broker_restart(tmp_path: Path) -> None:
    """shadow's own persistent session of a robot, and the QoS 1 messages queued in it, outlive the broker.

    Measured on mosquitto 2.0.11: an MQTT 5 session first opened with clean start = 1 is not restored from
    mosquitto.db after a restart, one opened with clean start = 0 is; RobotSubscription always uses 0.
    """
    first = start_deployed_broker(tmp_path)
    certs = {"cafile": first.ca_file, "certfile": tmp_path / "server.crt", "keyfile": tmp_path / "server.key"}
    topic = LAYOUT.samples_topic(PICKER)
    credentials = {"username": SERVICE_USER, "password": PASSWORDS[SERVICE_USER]}
    try:
        sub = RobotSubscription(str(PICKER), topic, MqttSettings(port=first.plain_port, **credentials))
        sub.start(wait_s=WAIT_S)
        sub.stop()  # the broker keeps the session (session_expiry_s) while shadow is away
        picker = Client("test-picker-persist")
        assert not picker.connect(first.plain_port, "ctl-picker-1").is_failure
        for i in range(3):
            assert picker.publish(topic, f"queued-{i}".encode()).value == 0
        picker.close()
    finally:
        first.stop()
    assert first.process.returncode == 0, first.log()
    second = start_deployed_broker(tmp_path, certs=certs)
    try:
        sub = RobotSubscription(str(PICKER), topic, MqttSettings(port=second.plain_port, **credentials))
        sub.start(wait_s=WAIT_S)
        try:
            got = [sub.inbox.get(timeout=WAIT_S) for _ in range(3)]
            for message in got:
                sub.acknowledge(message)
        finally:
            sub.stop()
        assert [m.payload for m in got] == [b"queued-0", b"queued-1", b"queued-2"]
    finally:
        second.stop()
