"""``shadow serve --config FILE``: ingest, monitors, store and the read-only API in one service.

Builds everything from the configuration once, here, and passes it down. The API binds to loopback
unless the configuration names another address together with bearer tokens.

With a PostgreSQL store the service is one worker of a pool (``--worker NAME`` or ``[pool] worker``,
default the host name): it follows only the robots whose leases it holds, and shares the configured
robots with the other workers on the same database (deploy/scale-out.md). With SQLite it follows every
configured robot, alone.
"""

from __future__ import annotations

import argparse
import logging
import os
import signal
import socket
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from types import FrameType
from typing import Any

from shadow.cli.commission import read_baseline_file
from shadow.config import RobotEntry, ServiceConfig, check_worker_name, load_config
from shadow.errors import ConfigurationError
from shadow.estimation.baseline import Baseline
from shadow.ingest.mqtt import BrokerProbe, RobotSubscription
from shadow.ingest.topics import TopicLayout
from shadow.ingest.wire import PlausibilityLimits
from shadow.monitoring import RobotMonitor, default_settings
from shadow.pool.leases import LeaseTable
from shadow.pool.member import PoolMember
from shadow.robots.description import RobotDescription, load_description
from shadow.service import RobotPipeline, Service, ServiceStatus, subscription_for
from shadow.store.repository import Fence, SqlStore

log = logging.getLogger(__name__)


def register(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = commands.add_parser(
        "serve",
        help="follow configured robots over MQTT; serve their health",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--config", required=True, type=Path, help="service configuration (TOML)")
    parser.add_argument("--duration", type=float, default=None, metavar="S", help="stop after S seconds")
    parser.add_argument("--no-api", action="store_true", help="do not start the HTTP API")
    parser.add_argument(
        "--worker", metavar="NAME", default=None, help="this worker's name in the pool (PostgreSQL store only)"
    )
    parser.set_defaults(handler=run)


def load_baseline(path: Path | None) -> Baseline | None:
    """A commissioning baseline file (``shadow commission`` output), or None to use the description's nominal."""
    return None if path is None else read_baseline_file(path)[0]


@dataclass(frozen=True)
class Followers:
    """Builds the pipeline and session of any configured robot (descriptions read once, at start)."""

    config: ServiceConfig
    store: SqlStore
    descriptions: dict[str, RobotDescription]

    @classmethod
    def register(cls, config: ServiceConfig, store: SqlStore) -> Followers:
        """Read every description and register every configured robot in the store."""
        descriptions = {}
        for entry in config.robots:
            description = load_description(entry.description_path)
            store.register_robot(
                entry.robot_id,
                family=description.family,
                n_actuators=description.n_actuators,
                description_source=str(entry.description_path),
            )
            descriptions[entry.robot_id] = description
        return cls(config, store, descriptions)

    def entry(self, robot_id: str) -> RobotEntry:
        for entry in self.config.robots:
            if entry.robot_id == robot_id:
                return entry
        raise ConfigurationError(f"robot {robot_id} is not configured")

    def follow(self, robot_id: str, fence: Fence | None = None) -> tuple[RobotPipeline, RobotSubscription]:
        """A fresh monitor, restored from the robot's checkpoint, and the robot's persistent session."""
        entry = self.entry(robot_id)
        description = self.descriptions[robot_id]
        layout = TopicLayout(self.config.topic_prefix)
        settings = default_settings(description, sample_rate_hz=entry.sample_rate_hz)
        monitor = RobotMonitor(entry.robot_id, description, load_baseline(entry.baseline_path), settings)
        sub = subscription_for(entry.address, layout, self.config.mqtt)
        pipeline = RobotPipeline(
            entry.address,
            monitor,
            self.store,
            inbox=sub.inbox,
            acknowledge=sub.acknowledge,
            layout=layout,
            n_actuators=description.n_actuators,
            limits=PlausibilityLimits.for_parameters(description.parameters),
            keep_raw=self.config.raw_retention_s > 0,
            fence=fence,
        )
        return pipeline, sub


def build_service(config: ServiceConfig, store: SqlStore) -> Service:
    """Pipelines and subscriptions for every configured robot (a single worker)."""
    followers = Followers.register(config, store)
    built = [followers.follow(entry.robot_id) for entry in config.robots]
    return Service(store, [p for p, _ in built], [s for _, s in built], raw_retention_s=config.raw_retention_s)


def build_pool_worker(config: ServiceConfig, store: SqlStore, worker: str) -> tuple[Service, PoolMember]:
    """An empty service and the pool member that fills it with the robots whose leases it wins."""
    followers = Followers.register(config, store)
    service = Service(store, [], [], raw_retention_s=config.raw_retention_s)
    leases = LeaseTable(store.engine, worker, lease_s=config.lease_s)
    member = PoolMember(
        leases,
        service,
        [e.robot_id for e in config.robots],
        followers.follow,
        heartbeat_s=config.heartbeat_s,
        broker=broker_probe(config, worker),
    )
    return service, member


def broker_probe(config: ServiceConfig, worker: str) -> BrokerProbe:
    """The worker's own connection to the broker, telling it whether it can read any robot at all.

    Its client id ``<client_id_prefix>.worker.<name>`` is never a robot's (after the prefix those have no dot). Its
    keepalive is half a lease (at least 5 s, at most ``mqtt.keepalive_s``), so even a silent network cut
    is noticed within about a lease length, and it retries at least every 5 s.
    """
    keepalive_s = max(5, min(config.mqtt.keepalive_s, round(config.lease_s / 2)))
    return BrokerProbe(config.mqtt, f"{config.mqtt.client_id_prefix}.worker.{worker}", keepalive_s=keepalive_s)


def pool_session_settings(config: ServiceConfig) -> dict[str, str]:
    """PostgreSQL settings of a pool worker's connections.

    ``idle_in_transaction_session_timeout`` of half a lease: a worker stopped in the middle of a write
    transaction (SIGSTOP, a long pause) holds its robot's lease row locked; the server ends that
    transaction, so the robot can be claimed by another worker soon after its lease expires.
    """
    return {"idle_in_transaction_session_timeout": str(max(100, int(config.lease_s * 500)))}


def status_snapshot(service: Service, member: PoolMember | None = None) -> dict[str, Any]:
    """What the status endpoint and the metrics read (plain numbers); ``pool`` only for a pool worker."""
    status: ServiceStatus = service.status
    snapshot = {
        "started_at_s": status.started_at_s,
        "robots": {rid: vars(s).copy() for rid, s in status.robots.items()},
        "broker_connected": {sub.robot_id: sub.connected.is_set() for sub in service.subscriptions},
        "inbox_depth": {sub.robot_id: sub.inbox.qsize() for sub in service.subscriptions},
    }
    if member is not None:
        snapshot["pool"] = member.status()
    return snapshot


def start_api(
    config: ServiceConfig, store: SqlStore, service: Service, member: PoolMember | None = None
) -> tuple[Any, threading.Thread]:
    """uvicorn in a thread, serving the read-only app."""
    import uvicorn

    from shadow.api.app import create_app
    from shadow.api.security import GuardSettings

    app = create_app(
        store,
        status_provider=lambda: status_snapshot(service, member),
        guard=GuardSettings(token_digests=config.api_token_digests, rate_per_s=config.api_rate_per_s),
    )
    server = uvicorn.Server(
        uvicorn.Config(app, host=config.api_host, port=config.api_port, log_level="warning", access_log=False)
    )
    thread = threading.Thread(target=server.run, name="shadow-api", daemon=True)
    thread.start()
    return server, thread


def run(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    if not config.robots:
        raise ConfigurationError(f"{config.source}: no [[robots]] configured")
    member: PoolMember | None = None
    if config.pooled:
        worker = check_worker_name(args.worker or config.worker or socket.gethostname(), "--worker")
        store = SqlStore(config.database_url, session_settings=pool_session_settings(config))
        service, member = build_pool_worker(config, store, worker)
        member.join(host=socket.gethostname(), pid=os.getpid())
    else:
        if args.worker is not None:
            raise ConfigurationError("--worker: a worker pool needs a PostgreSQL store (database.url)")
        store = SqlStore(config.database_url)
        service = build_service(config, store)
    stop = threading.Event()

    def on_signal(signum: int, frame: FrameType | None) -> None:
        stop.set()

    previous = {s: signal.signal(s, on_signal) for s in (signal.SIGTERM, signal.SIGINT)}
    service.start()
    if member is not None:
        member.start()
    server = None
    if not args.no_api:
        server, _ = start_api(config, store, service, member)
        print(f"API on http://{config.api_host}:{config.api_port}/ (read-only)", flush=True)
    if member is None:
        print(f"following {len(config.robots)} robot(s) via {config.mqtt.describe()}", flush=True)
    else:
        print(f"worker {member.worker_id}: sharing {len(config.robots)} robot(s) with the pool on "
              f"{store.engine.url.render_as_string()} via {config.mqtt.describe()}", flush=True)  # fmt: skip
    try:
        if member is None:
            stop.wait(args.duration)
        else:
            wait_member(member, stop, args.duration)
    finally:
        if server is not None:
            server.should_exit = True
        if member is not None:
            member.stop()
            print(f"worker {member.worker_id}: left the pool; {vars(member.counters)}", flush=True)
        service.stop()
        store.close()
        for s, handler in previous.items():
            signal.signal(s, handler)
    if member is not None and member.error is not None:
        raise ConfigurationError(str(member.error))
    return 0


def wait_member(member: PoolMember, stop: threading.Event, duration_s: float | None) -> None:
    """Wait for a stop signal or the duration, returning early if the member had to stop."""
    deadline = None if duration_s is None else time.monotonic() + duration_s
    while not stop.is_set() and member.error is None:
        left = None if deadline is None else deadline - time.monotonic()
        if left is not None and left <= 0:
            return
        stop.wait(0.5 if left is None else min(0.5, left))
