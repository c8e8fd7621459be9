"""``shadow serve --config FILE``: ingest, monitors, store and the read-only API in one service.

Builds everything from the configuration once, here, and passes it down. The API binds to loopback
unless the configuration names another address together with bearer tokens.
"""

from __future__ import annotations

import argparse
import logging
import signal
import threading
from pathlib import Path
from types import FrameType
from typing import Any

from shadow.cli.commission import read_baseline_file
from shadow.config import ServiceConfig, load_config
from shadow.errors import ConfigurationError
from shadow.estimation.baseline import Baseline
from shadow.ingest.topics import TopicLayout
from shadow.ingest.wire import PlausibilityLimits
from shadow.monitoring import RobotMonitor, default_settings
from shadow.robots.description import load_description
from shadow.service import RobotPipeline, Service, ServiceStatus, subscription_for
from shadow.store.repository import SqlStore

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
    parser.set_defaults(handler=run)


def load_baseline(path: Path | None) -> Baseline | None:
    """A commissioning baseline file (``shadow commission`` output), or None to use the description's nominal."""
    return None if path is None else read_baseline_file(path)[0]


def build_service(config: ServiceConfig, store: SqlStore) -> Service:
    """Pipelines and subscriptions for every configured robot."""
    layout = TopicLayout(config.topic_prefix)
    pipelines = []
    subscriptions = []
    for entry in config.robots:
        description = load_description(entry.description_path)
        store.register_robot(
            entry.robot_id,
            family=description.family,
            n_actuators=description.n_actuators,
            description_source=str(entry.description_path),
        )
        settings = default_settings(description, sample_rate_hz=entry.sample_rate_hz)
        monitor = RobotMonitor(entry.robot_id, description, load_baseline(entry.baseline_path), settings)
        sub = subscription_for(entry.address, layout, config.mqtt)
        limits = PlausibilityLimits.for_parameters(description.parameters)
        pipelines.append(
            RobotPipeline(
                entry.address,
                monitor,
                store,
                inbox=sub.inbox,
                acknowledge=sub.acknowledge,
                layout=layout,
                n_actuators=description.n_actuators,
                limits=limits,
                keep_raw=config.raw_retention_s > 0,
            )
        )
        subscriptions.append(sub)
    return Service(store, pipelines, subscriptions, raw_retention_s=config.raw_retention_s)


def status_snapshot(service: Service) -> dict[str, Any]:
    """What the status endpoint and the metrics read (plain numbers)."""
    status: ServiceStatus = service.status
    return {
        "started_at_s": status.started_at_s,
        "robots": {rid: vars(s).copy() for rid, s in status.robots.items()},
        "broker_connected": {sub.robot_id: sub.connected.is_set() for sub in service.subscriptions},
        "inbox_depth": {sub.robot_id: sub.inbox.qsize() for sub in service.subscriptions},
    }


def start_api(config: ServiceConfig, store: SqlStore, service: Service) -> tuple[Any, threading.Thread]:
    """uvicorn in a thread, serving the read-only app."""
    import uvicorn

    from shadow.api.app import create_app
    from shadow.api.security import GuardSettings

    app = create_app(
        store,
        status_provider=lambda: status_snapshot(service),
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
    store = SqlStore(config.database_url)
    service = build_service(config, store)
    stop = threading.Event()

    def on_signal(signum: int, frame: FrameType | None) -> None:
        stop.set()

    previous = {s: signal.signal(s, on_signal) for s in (signal.SIGTERM, signal.SIGINT)}
    service.start()
    server = None
    if not args.no_api:
        server, _ = start_api(config, store, service)
        print(f"API on http://{config.api_host}:{config.api_port}/ (read-only)", flush=True)
    print(f"following {len(config.robots)} robot(s) via {config.mqtt.describe()}", flush=True)
    try:
        stop.wait(args.duration)
    finally:
        if server is not None:
            server.should_exit = True
        service.stop()
        store.close()
        for s, handler in previous.items():
            signal.signal(s, handler)
    return 0
