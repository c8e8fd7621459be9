"""Prometheus text-format metrics, read from the store and the service counters at scrape time.

Names follow the Prometheus conventions (base units in the name, ``_total`` for counters, one unit per
metric): efforts of rotary actuators are ``newton_metres``, of linear ones ``newtons``, so a delta and a
hexapod never share a series with different units.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from typing import Any

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

from shadow.store.repository import SqlStore

RECENT_S = 600.0  # estimates and residuals newer than this are exported


def effort_unit(family: str) -> str:
    return "newton_metres" if family == "delta" else "newtons"


def viscous_unit(family: str) -> str:
    return "newton_metre_seconds_per_radian" if family == "delta" else "newton_seconds_per_metre"


class StoreCollector(Collector):
    """Collects on each scrape; nothing is cached between scrapes."""

    def __init__(self, store: SqlStore, status_provider: Callable[[], dict[str, Any]] | None = None) -> None:
        self.store = store
        self.status_provider = status_provider

    def collect(self) -> Iterator[Metric]:
        now = time.time()
        robots = self.store.robots()
        health = GaugeMetricFamily(
            "shadow_health_state",
            "1 for the current health state of a robot or actuator",
            labels=["robot_id", "scope", "state"],
        )
        mass = GaugeMetricFamily("shadow_payload_mass_kilograms", "estimated payload mass", labels=["robot_id", "part"])
        friction: dict[str, GaugeMetricFamily] = {}
        residual: dict[str, GaugeMetricFamily] = {}
        for r in robots:
            rid = r["robot_id"]
            unit = effort_unit(r["family"])
            for h in self.store.latest_health(rid):
                health.add_metric([rid, h["scope"], h["state"]], 1.0)
            latest: dict[str, dict[str, Any]] = {}
            for e in self.store.estimates(rid, start_s=now - RECENT_S, end_s=now + 1.0, limit=100_000):
                latest[e["parameter"]] = e
            for name, e in latest.items():
                if name.endswith("mass") or name == "payload_m":
                    mass.add_metric([rid, name.removesuffix("_mass")], e["value"])
                elif name.startswith(("coulomb_", "viscous_", "offset_", "stribeck_")):
                    kind, actuator = name.rsplit("_", 1)
                    metric = f"shadow_friction_{kind}_{viscous_unit(r['family']) if kind == 'viscous' else unit}"
                    friction.setdefault(
                        metric, GaugeMetricFamily(metric, f"estimated {kind} friction", labels=["robot_id", "actuator"])
                    ).add_metric([rid, actuator], e["value"])
            rows = self.store.residual_aggregates(rid, start_s=now - RECENT_S, end_s=now + 1.0, limit=100_000)
            newest: dict[int, dict[str, Any]] = {row["actuator"]: row for row in rows}
            metric = f"shadow_residual_rms_{unit}"
            fam = residual.setdefault(
                metric,
                GaugeMetricFamily(metric, "RMS of the effort residual, last window", labels=["robot_id", "actuator"]),
            )
            for actuator, row in sorted(newest.items()):
                fam.add_metric([rid, str(actuator)], row["rms"])
        yield health
        yield mass
        yield from friction.values()
        yield from residual.values()

        events = CounterMetricFamily("shadow_events", "events recorded", labels=["robot_id", "kind"])
        counts: dict[tuple[str, str], int] = {}
        for e in self.store.events(limit=1_000_000):
            counts[(e["robot_id"], e["kind"])] = counts.get((e["robot_id"], e["kind"]), 0) + 1
        for (rid, kind), n in sorted(counts.items()):
            events.add_metric([rid, kind], n)
        yield events
        dead = CounterMetricFamily("shadow_dead_letters", "rejected messages", labels=["reason_code"])
        for code, n in sorted(self.store.dead_letter_counts().items()):
            dead.add_metric([code], n)
        yield dead

        status = self.status_provider() if self.status_provider is not None else {}
        messages = CounterMetricFamily(
            "shadow_messages_processed", "messages decoded and processed", labels=["robot_id"]
        )
        samples = CounterMetricFamily("shadow_samples_processed", "samples processed", labels=["robot_id"])
        lag = GaugeMetricFamily(
            "shadow_ingest_lag_seconds", "now minus the newest sample processed", labels=["robot_id"]
        )
        for rid, c in sorted(status.get("robots", {}).items()):
            messages.add_metric([rid], c.get("messages_processed", 0))
            samples.add_metric([rid], c.get("samples_processed", 0))
            if c.get("last_sample_time_s") is not None:
                lag.add_metric([rid], now - c["last_sample_time_s"])
        yield messages
        yield samples
        yield lag
        if status.get("pool") is not None:
            yield from pool_metrics(status["pool"])


POOL_COUNTERS = (  # (status key, metric name without _total, help)
    ("lease_renewals", "shadow_pool_lease_renewals", "leases extended, one per robot per heartbeat"),
    ("robots_claimed", "shadow_pool_robots_claimed", "robots handed over to this worker"),
    ("robots_released", "shadow_pool_robots_released", "robots this worker gave up cleanly"),
    ("leases_lost", "shadow_pool_leases_lost", "leases taken over by another worker or refused by the fence"),
    ("robots_unreadable", "shadow_pool_robots_unreadable", "robots given up because their session could not connect"),
    ("broker_cutoffs", "shadow_pool_broker_cutoffs", "times this worker left the pool, the broker out of reach"),
    ("database_failures", "shadow_pool_database_failures", "heartbeats that could not reach the database"),
    ("fenced_writes_refused", "shadow_pool_fenced_writes_refused", "writes refused: the robot's lease had moved on"),
)
POOL_GAUGES = (
    ("robots_held", "shadow_pool_robots_held", "robots whose lease this worker holds"),
    ("live_workers", "shadow_pool_live_workers", "live workers at the last heartbeat, this one included"),
    ("in_pool", "shadow_pool_member", "1 while this worker is in the pool"),
    ("broker_reachable", "shadow_pool_broker_reachable", "1 while this worker's own broker connection is up"),
)


def pool_metrics(pool: dict[str, Any]) -> Iterator[Metric]:
    """One worker's pool counters, labelled with its worker id."""
    labels = [str(pool["worker_id"])]
    for key, name, text in POOL_COUNTERS:
        counter = CounterMetricFamily(name, text, labels=["worker_id"])  # exposed as name_total
        counter.add_metric(labels, float(pool[key]))
        yield counter
    for key, name, text in POOL_GAUGES:
        gauge = GaugeMetricFamily(name, text, labels=["worker_id"])
        gauge.add_metric(labels, float(pool[key]))
        yield gauge


def metrics_renderer(
    store: SqlStore, status_provider: Callable[[], dict[str, Any]] | None = None
) -> Callable[[], bytes]:
    """A function that renders the current metrics in the Prometheus text format."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(StoreCollector(store, status_provider))
    return lambda: generate_latest(registry)
