"""The service configuration file (TOML), read once in ``main`` and passed down.

Layout (every key documented in docs/service-config.md)::

    [mqtt]                       # the broker shadow listens to
    host = "127.0.0.1"
    port = 1883
    protocol = "5"               # or "3.1.1"
    username = "shadow"          # optional
    password_file = "secrets/mqtt-password"   # optional; the password is never written in this file
    tls_ca_file = "..."          # optional: turns TLS on
    topic_prefix = "shadow"

    [database]
    url = "sqlite:///var/shadow.db"   # or postgresql://user@host/db
    raw_retention_s = 86400           # keep raw sample batches this long; 0: do not keep them

    [api]
    host = "127.0.0.1"           # off loopback, bearer tokens are required
    port = 8470
    token_digests = ["sha256:..."]   # shadow.api.security.token_digest(token); tokens themselves are never stored

    [pool]                       # several workers on one PostgreSQL (deploy/scale-out.md); ignored with SQLite
    worker = "cell3-a"           # this worker's name, unique in the pool; --worker NAME wins; default: host name
    lease_s = 10                 # a dead worker's robots are taken over this long after its last renewal
    heartbeat_s = 2              # renew and rebalance this often; at most lease_s / 2

    [[robots]]
    site = "northfield"
    cell = "line3"
    robot = "picker-1"
    description = "robots/picker.toml"      # robot description file (docs/robot-description.md)
    baseline = "baselines/picker-1.json"     # optional: commissioning output; absent: nominal from the description
    sample_rate_hz = 1000                    # optional: the stream's nominal rate (default 1000)

Relative paths are relative to the configuration file.
"""

from __future__ import annotations

import ipaddress
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from shadow.api.security import check_digests
from shadow.errors import ConfigurationError, RejectedMessageError
from shadow.ingest.mqtt import MqttSettings
from shadow.ingest.topics import DEFAULT_PREFIX, RobotAddress, validate_segment

DEFAULT_API_PORT = 8470
DEFAULT_DATABASE_URL = "sqlite:///shadow.db"
DEFAULT_LEASE_S = 10.0
DEFAULT_HEARTBEAT_S = 2.0
_WORKER_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,99}")


@dataclass(frozen=True, slots=True)
class RobotEntry:
    """One robot the service follows."""

    address: RobotAddress
    description_path: Path
    baseline_path: Path | None = None
    sample_rate_hz: float = 1000.0  # nominal rate of the controller's stream

    @property
    def robot_id(self) -> str:
        return str(self.address)


@dataclass(frozen=True, slots=True)
class ServiceConfig:
    """Everything ``shadow serve`` needs."""

    mqtt: MqttSettings = field(default_factory=MqttSettings)
    topic_prefix: str = DEFAULT_PREFIX
    database_url: str = DEFAULT_DATABASE_URL
    raw_retention_s: float = 3600.0
    api_host: str = "127.0.0.1"
    api_port: int = DEFAULT_API_PORT
    api_token_digests: tuple[str, ...] = ()  # "sha256:<hex>" of each bearer token (shadow.api.security.token_digest)
    api_allow_unauthenticated_remote: bool = False  # binding off loopback without tokens needs this set on purpose
    api_rate_per_s: float = 50.0
    robots: tuple[RobotEntry, ...] = ()
    worker: str | None = None  # name in the worker pool (PostgreSQL only); None: the host name
    lease_s: float = DEFAULT_LEASE_S
    heartbeat_s: float = DEFAULT_HEARTBEAT_S
    source: str = "<defaults>"

    @property
    def pooled(self) -> bool:
        """True when the store is PostgreSQL: the service then joins the worker pool."""
        return self.database_url.startswith(("postgresql", "postgres://"))


_SECTIONS = {"mqtt", "database", "api", "pool", "robots"}
_MQTT_KEYS = {
    "host", "port", "protocol", "username", "password_file", "tls_ca_file", "tls_cert_file", "tls_key_file",
    "keepalive_s", "session_expiry_s", "reconnect_min_delay_s", "reconnect_max_delay_s", "client_id_prefix",
    "topic_prefix",
}  # fmt: skip
_DATABASE_KEYS = {"url", "raw_retention_s"}
_API_KEYS = {"host", "port", "token_digests", "allow_unauthenticated_remote", "rate_per_s"}
_POOL_KEYS = {"worker", "lease_s", "heartbeat_s"}
_ROBOT_KEYS = {"site", "cell", "robot", "description", "baseline", "sample_rate_hz"}


def _unknown(where: str, table: dict[str, Any], known: set[str]) -> None:
    extra = sorted(set(table) - known)
    if extra:
        raise ConfigurationError(f"{where}: unknown key(s) {extra}; known: {sorted(known)}")


def _path(base: Path, value: Any, where: str) -> Path:
    if not isinstance(value, str) or not value:
        raise ConfigurationError(f"{where}: expected a file path, got {value!r}")
    p = Path(value)
    return p if p.is_absolute() else base / p


def parse_config(text: str, *, base_dir: Path, source: str = "<string>") -> ServiceConfig:
    """Parse and check a configuration; errors name the key and the file."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigurationError(f"{source}: not valid TOML: {exc}") from exc
    try:
        return _build(doc, base_dir, source)
    except ConfigurationError as exc:
        raise ConfigurationError(f"{source}: {exc}") from None


def _build(doc: dict[str, Any], base: Path, source: str) -> ServiceConfig:
    _unknown("top level", doc, _SECTIONS)
    mqtt_table = dict(doc.get("mqtt", {}))
    _unknown("mqtt", mqtt_table, _MQTT_KEYS)
    prefix = mqtt_table.pop("topic_prefix", DEFAULT_PREFIX)
    password_file = mqtt_table.pop("password_file", None)
    password = None
    if password_file is not None:
        path = _path(base, password_file, "mqtt.password_file")
        try:
            password = path.read_text().strip()
        except OSError as exc:
            raise ConfigurationError(f"mqtt.password_file: cannot read {path}: {exc.strerror}") from exc
    for key in ("tls_ca_file", "tls_cert_file", "tls_key_file"):
        if key in mqtt_table:
            mqtt_table[key] = str(_path(base, mqtt_table[key], f"mqtt.{key}"))
    if "protocol" in mqtt_table:
        mqtt_table["protocol"] = str(mqtt_table["protocol"])
    try:
        mqtt = MqttSettings(password=password, **mqtt_table)
    except TypeError as exc:
        raise ConfigurationError(f"mqtt: {exc}") from exc

    db = doc.get("database", {})
    _unknown("database", db, _DATABASE_KEYS)
    url = db.get("url", DEFAULT_DATABASE_URL)
    if not isinstance(url, str):
        raise ConfigurationError(f"database.url: expected a string, got {url!r}")
    if url.startswith("sqlite:///") and not url.startswith("sqlite:////") and url != "sqlite:///:memory:":
        url = f"sqlite:///{base / url.removeprefix('sqlite:///')}"  # relative to the configuration file
    retention = float(db.get("raw_retention_s", 3600.0))
    if retention < 0:
        raise ConfigurationError(f"database.raw_retention_s: must be >= 0, got {retention}")

    api = doc.get("api", {})
    _unknown("api", api, _API_KEYS)
    api_port = int(api.get("port", DEFAULT_API_PORT))
    if not 0 <= api_port < 65536:
        raise ConfigurationError(f"api.port: must be 0..65535, got {api_port}")
    digests = api.get("token_digests", [])
    if not isinstance(digests, list) or not all(isinstance(d, str) for d in digests):
        raise ConfigurationError("api.token_digests: expected a list of 'sha256:<hex>' strings")
    digests = list(check_digests(digests))
    api_host = str(api.get("host", "127.0.0.1"))
    allow_open = bool(api.get("allow_unauthenticated_remote", False))
    if not is_loopback(api_host) and not digests and not allow_open:
        raise ConfigurationError(
            f"api.host: {api_host} is not a loopback address, so bearer tokens are required (api.token_digests); "
            "set api.allow_unauthenticated_remote = true only if another layer protects the port"
        )

    pool = doc.get("pool", {})
    _unknown("pool", pool, _POOL_KEYS)
    worker = pool.get("worker")
    if worker is not None:
        worker = check_worker_name(worker, "pool.worker")
    lease_s, heartbeat_s = pool.get("lease_s", DEFAULT_LEASE_S), pool.get("heartbeat_s", DEFAULT_HEARTBEAT_S)
    check_pool_timing(lease_s, heartbeat_s)

    robots = []
    seen: set[str] = set()
    for i, entry in enumerate(doc.get("robots", [])):
        where = f"robots[{i}]"
        _unknown(where, entry, _ROBOT_KEYS)
        for key in ("site", "cell", "robot", "description"):
            if key not in entry:
                raise ConfigurationError(f"{where}.{key}: missing")
        try:
            address = RobotAddress(
                validate_segment("site", entry["site"]),
                validate_segment("cell", entry["cell"]),
                validate_segment("robot", entry["robot"]),
            )
        except RejectedMessageError as exc:
            raise ConfigurationError(f"{where}: {exc}") from exc
        if str(address) in seen:
            raise ConfigurationError(f"{where}: robot {address} is listed twice")
        seen.add(str(address))
        baseline = entry.get("baseline")
        rate = entry.get("sample_rate_hz", 1000.0)
        if not isinstance(rate, int | float) or not rate > 0:
            raise ConfigurationError(f"{where}.sample_rate_hz: must be a number > 0, got {rate!r}")
        robots.append(
            RobotEntry(
                address,
                _path(base, entry["description"], f"{where}.description"),
                None if baseline is None else _path(base, baseline, f"{where}.baseline"),
                float(rate),
            )
        )
    return ServiceConfig(
        mqtt=mqtt,
        topic_prefix=str(prefix),
        database_url=url,
        raw_retention_s=retention,
        api_host=api_host,
        api_port=api_port,
        api_token_digests=tuple(digests),
        api_allow_unauthenticated_remote=allow_open,
        api_rate_per_s=float(api.get("rate_per_s", 50.0)),
        robots=tuple(robots),
        worker=worker,
        lease_s=float(lease_s),
        heartbeat_s=float(heartbeat_s),
        source=source,
    )


def check_worker_name(name: Any, where: str = "worker") -> str:
    """A worker name: 1-100 letters, digits, '.', '_' or '-', starting with a letter or digit."""
    if not isinstance(name, str) or not _WORKER_NAME.fullmatch(name):
        raise ConfigurationError(
            f"{where}: {name!r} is not a worker name (1-100 of A-Z a-z 0-9 . _ -, starting with a letter or digit)"
        )
    return name


def check_pool_timing(lease_s: Any, heartbeat_s: Any) -> None:
    """``lease_s`` > 0 and 0 < ``heartbeat_s`` <= ``lease_s`` / 2, so one late heartbeat does not lose a lease."""
    for key, value in (("pool.lease_s", lease_s), ("pool.heartbeat_s", heartbeat_s)):
        if isinstance(value, bool) or not isinstance(value, int | float) or not value > 0:
            raise ConfigurationError(f"{key}: must be a number > 0, got {value!r}")
    if heartbeat_s * 2 > lease_s:
        raise ConfigurationError(f"pool.heartbeat_s: must be at most lease_s / 2 = {lease_s / 2}, got {heartbeat_s}")


def is_loopback(host: str) -> bool:
    """True for 127.0.0.0/8, ::1 and localhost."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def load_config(path: str | Path) -> ServiceConfig:
    """Read a configuration file."""
    p = Path(path)
    try:
        text = p.read_text()
    except OSError as exc:
        raise ConfigurationError(f"{p}: cannot read the configuration: {exc.strerror}") from exc
    return parse_config(text, base_dir=p.resolve().parent, source=str(p))
