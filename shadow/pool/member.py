"""One worker's part in the pool: heartbeat, renew, rebalance, and hand robots to the service and back.

Every ``heartbeat_s`` the member thread, after checking that it can reach the broker (below),

1. renews its row in ``workers`` and counts the live workers;
2. renews its leases; a robot whose lease is gone (taken over after this worker stalled past its expiry)
   is detached at once, so its MQTT session stops reconnecting and fighting the new owner for it;
3. gives up robots whose write was refused by the fence (the pipeline marked itself ``lease_lost``),
   and robots whose own session cannot connect (below);
4. releases its excess over the share ``ceil(robots / live workers)``, or claims free and expired
   robots up to it (:mod:`shadow.pool.balance`). A claimed robot gets a fresh pipeline, built after the
   claim committed so that it restores the newest checkpoint, and the robot's own persistent session
   (client id from the robot id): connecting takes the session over from a stalled owner on the broker.

Release order on rebalancing and shutdown: detach first (the session disconnects, the broker keeps the
unacknowledged messages), then release the lease, so the next owner finds the session free.

When the database cannot be reached the member keeps its robots until its last successful renewal is a
lease length old (by this process's monotonic clock), then detaches them all: by then another worker may
hold them. Writes are fenced anyway; this keeps the MQTT sessions from fighting.

When the *broker* cannot be reached (the worker's own network path to it is cut, the broker moved, its
address is wrong on this machine) the worker could go on renewing leases for robots it cannot read, and
their messages would wait on the broker while other workers could follow them. So a member with a
``broker`` probe (:class:`shadow.ingest.mqtt.BrokerProbe`, one plain connection) watches it:

* while the probe is not connected the member claims nothing (a robot it claimed could not be read);
* once the probe has been out of reach for ``broker_grace_s`` (default: one lease length) the member
  gives up every robot (detach, release: they are free at once) and removes its row from ``workers``,
  so the other workers' share grows and they claim the robots at their next heartbeat;
* when the probe is connected again the member joins again and claims its share, which the others
  make room for at their next rounds;
* a single robot whose session stays unconnected for ``broker_grace_s`` plus its session's longest
  reconnect delay while the probe is fine is given up too, and not claimed again by this worker for
  that long (so it can go to a worker that can read it).

A short outage (a broker restart) within the grace costs no hand-over: the sessions reconnect and the
broker sends them what it kept.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

from shadow.errors import ShadowError
from shadow.ingest.mqtt import RobotSubscription
from shadow.pool.balance import plan_round
from shadow.pool.leases import LeaseTable, WorkerNameTakenError
from shadow.service import RobotPipeline, Service
from shadow.store.repository import Fence, StoreUnavailableError

log = logging.getLogger(__name__)

Follow = Callable[[str, Fence], tuple[RobotPipeline, RobotSubscription | None]]


class BrokerLink(Protocol):
    """What the member needs of its broker probe (:class:`shadow.ingest.mqtt.BrokerProbe`)."""

    def start(self, *, wait_s: float = 0.0) -> bool: ...

    def stop(self) -> None: ...

    def unreachable_for_s(self) -> float: ...


@dataclass
class PoolCounters:
    """What the member did, for the status endpoint, the metrics and the logs (counts since the start)."""

    rounds: int = 0
    renewals: int = 0  # leases extended (one per robot per round)
    claimed: int = 0  # robots taken: free ones, released by others, or expired
    released: int = 0  # robots given up cleanly: rebalancing, shutdown, broker out of reach
    lost: int = 0  # leases found taken over at renewal, or refused by the fence
    unreadable: int = 0  # robots given up because their own session could not connect
    broker_cutoffs: int = 0  # times the member left the pool because the broker was out of reach
    database_failures: int = 0
    live_workers: int = 0


class PoolMember:
    """The member thread of one worker (see the module docstring)."""

    def __init__(
        self,
        leases: LeaseTable,
        service: Service,
        robot_ids: Sequence[str],
        follow: Follow,
        *,
        heartbeat_s: float,
        broker: BrokerLink | None = None,
        broker_grace_s: float | None = None,
    ) -> None:
        if not 0 < heartbeat_s * 2 <= leases.lease_s:
            raise ShadowError(f"pool.heartbeat_s: must be > 0 and at most half of lease_s, got {heartbeat_s}")
        grace = leases.lease_s if broker_grace_s is None else broker_grace_s
        if not grace > 0:
            raise ShadowError(f"broker_grace_s: must be > 0, got {grace}")
        self.leases = leases
        self.service = service
        self.robot_ids = sorted(robot_ids)
        self.follow = follow
        self.heartbeat_s = heartbeat_s
        self.broker = broker
        self.broker_grace_s = float(grace)
        self.held: dict[str, int] = {}  # robot -> fencing token of this worker's lease
        self.counters = PoolCounters()
        self.error: BaseException | None = None  # set when the member had to stop (name taken over)
        self.in_pool = False  # this worker's row is in ``workers`` (False while the broker is out of reach)
        self._host, self._pid = "", 0
        self._shunned: dict[str, float] = {}  # robot -> monotonic time until which it is not claimed again
        self._renewed_at = time.monotonic()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    @property
    def worker_id(self) -> str:
        return self.leases.worker_id

    def join(self, *, host: str, pid: int) -> None:
        """Register the worker and make sure every robot has a lease row."""
        self._host, self._pid = host, pid
        self.leases.ensure_robots(self.robot_ids)
        self.leases.join(host=host, pid=pid)
        self.in_pool = True
        self._renewed_at = time.monotonic()

    def start(self) -> None:
        if self.broker is not None:  # a connected probe before the first round, so it can claim at once
            self.broker.start(wait_s=min(self.heartbeat_s, 5.0))
        self._thread = threading.Thread(target=self._run, name="shadow-pool", daemon=True)
        self._thread.start()

    def stop(self, *, timeout_s: float = 10.0) -> None:
        """Leave the pool: detach every robot, release its lease, remove the worker row."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
        self._give_up(list(self.held), release=True, lost=False)
        try:
            self.leases.leave()
        except StoreUnavailableError as exc:
            log.warning("worker %s: could not remove its row (it expires on its own): %s", self.worker_id, exc)
        self.in_pool = False
        if self.broker is not None:
            self.broker.stop()

    def status(self) -> dict[str, Any]:
        """This worker's part in the pool, as plain numbers (for the status endpoint and the metrics)."""
        c = self.counters
        return {
            "worker_id": self.worker_id,
            "in_pool": self.in_pool,
            "broker_reachable": self.broker is None or self.broker.unreachable_for_s() == 0.0,
            "live_workers": c.live_workers if self.in_pool else 0,
            "robots_held": len(self.held),
            "lease_renewals": c.renewals,
            "robots_claimed": c.claimed,
            "robots_released": c.released,
            "leases_lost": c.lost,
            "robots_unreadable": c.unreadable,
            "broker_cutoffs": c.broker_cutoffs,
            "database_failures": c.database_failures,
            "fenced_writes_refused": self.service.status.fenced_writes_refused,
        }

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                self.tick()
            except WorkerNameTakenError as exc:
                log.error("worker %s: %s; following nothing", self.worker_id, exc)
                self._give_up(list(self.held), release=False)
                self.error = exc
                return
            except Exception:  # keep the worker in the pool; the trace is in the log
                log.exception("worker %s: pool round failed", self.worker_id)
            self._stop.wait(self.heartbeat_s)

    def tick(self) -> None:
        """One round: broker check, heartbeat, renew, drop lost robots, release or claim towards the share."""
        self.counters.rounds += 1
        started = time.monotonic()
        if self.broker is not None:
            away_s = self.broker.unreachable_for_s()
            if away_s >= self.broker_grace_s:
                if self.in_pool:
                    self._leave_for_broker(away_s)
                return
            if not self.in_pool:
                if away_s > 0:
                    return  # not back yet
                self.leases.join(host=self._host, pid=self._pid)
                self.in_pool = True
                self._renewed_at = started
                log.info("worker %s: broker reachable again; back in the pool", self.worker_id)
        try:
            n_live = self.leases.heartbeat()
            still = self.leases.renew(self.held)
        except StoreUnavailableError as exc:
            self.counters.database_failures += 1
            if self.held and time.monotonic() - self._renewed_at >= self.leases.lease_s:
                log.warning("worker %s: no renewal for a lease length (%s); detaching %d robot(s)",
                            self.worker_id, exc, len(self.held))  # fmt: skip
                self._give_up(list(self.held), release=False)
            return
        self._renewed_at = started
        self.counters.live_workers = n_live
        self.counters.renewals += len(still)
        taken_over = [r for r in self.held if still.get(r) != self.held[r]]
        for robot_id in taken_over:
            log.warning("worker %s: lease %d of robot %s was taken over; detaching it",
                        self.worker_id, self.held[robot_id], robot_id)  # fmt: skip
        self._give_up(taken_over, release=False)
        refused = [p.robot_id for p in self.service.pipelines if p.lease_lost and p.robot_id in self.held]
        self._give_up(refused, release=True)
        broker_up = self.broker is None or self.broker.unreachable_for_s() == 0.0
        if broker_up:
            self._give_up_unreadable()
        plan = plan_round(list(self.held), n_robots=len(self.robot_ids), n_live_workers=n_live)
        self._give_up(list(plan.release), release=True, lost=False)
        if plan.claim and broker_up:
            now = time.monotonic()
            candidates = [r for r in self.robot_ids if r not in self.held and self._shunned.get(r, 0.0) <= now]
            for robot_id, token in self.leases.claim(candidates, plan.claim).items():
                self._take(robot_id, token)

    def _leave_for_broker(self, away_s: float) -> None:
        """The broker has been out of reach for the grace: free every robot for the others, leave ``workers``."""
        log.warning("worker %s: broker out of reach for %.1f s; giving up %d robot(s) and leaving the pool "
                    "until it is back", self.worker_id, away_s, len(self.held))  # fmt: skip
        self.counters.broker_cutoffs += 1
        self._give_up(list(self.held), release=True, lost=False)
        try:
            self.leases.leave()
        except StoreUnavailableError as exc:
            log.warning("worker %s: could not remove its row (it expires on its own): %s", self.worker_id, exc)
        self.in_pool = False
        self.counters.live_workers = 0

    def _give_up_unreadable(self) -> None:
        """Robots whose own session has not connected for the grace plus its longest reconnect delay."""
        now = time.monotonic()
        unreadable = []
        for sub in self.service.subscriptions:
            if sub.robot_id not in self.held:
                continue
            limit_s = self.broker_grace_s + sub.settings.reconnect_max_delay_s
            if sub.unreachable_for_s() >= limit_s:
                unreadable.append(sub.robot_id)
                self._shunned[sub.robot_id] = now + limit_s
                log.warning("worker %s: robot %s: no connection of its session for %.1f s while the broker is "
                            "reachable; giving it up", self.worker_id, sub.robot_id, limit_s)  # fmt: skip
        self.counters.unreadable += len(unreadable)
        self._give_up(unreadable, release=True, lost=False)

    def _take(self, robot_id: str, token: int) -> None:
        fence = Fence(self.worker_id, token)
        try:
            pipeline, subscription = self.follow(robot_id, fence)
            self.service.attach(pipeline, subscription)
        except Exception:
            log.exception("worker %s: cannot follow robot %s; releasing it", self.worker_id, robot_id)
            self.leases.release(robot_id, token)
            return
        self.held[robot_id] = token
        self.counters.claimed += 1
        log.info("worker %s: following robot %s under lease %d", self.worker_id, robot_id, token)

    def _give_up(self, robot_ids: list[str], *, release: bool, lost: bool = True) -> None:
        """Detach the robots (their sessions disconnect first); then release their leases when asked."""
        if not robot_ids:
            return
        tokens = {robot_id: self.held.pop(robot_id) for robot_id in robot_ids}
        self.service.detach(*robot_ids)
        if lost:
            self.counters.lost += len(robot_ids)
        if not release:
            return
        for robot_id, token in tokens.items():
            try:
                if self.leases.release(robot_id, token):
                    self.counters.released += 1
                    log.info("worker %s: released robot %s (lease %d)", self.worker_id, robot_id, token)
            except StoreUnavailableError as exc:
                log.warning("robot %s: release failed (the lease expires on its own): %s", robot_id, exc)
