"""One worker's part in the pool: heartbeat, renew, rebalance, and hand robots to the service and back.

Every ``heartbeat_s`` the member thread

1. renews its row in ``workers`` and counts the live workers;
2. renews its leases; a robot whose lease is gone (taken over after this worker stalled past its expiry)
   is detached at once, so its MQTT session stops reconnecting and fighting the new owner for it;
3. gives up robots whose write was refused by the fence (the pipeline marked itself ``lease_lost``);
4. releases its excess over the share ``ceil(robots / live workers)``, or claims free and expired
   robots up to it (:mod:`shadow.pool.balance`). A claimed robot gets a fresh pipeline, built after the
   claim committed so that it restores the newest checkpoint, and the robot's own persistent session
   (client id from the robot id): connecting takes the session over from a stalled owner on the broker.

Release order on rebalancing and shutdown: detach first (the session disconnects, the broker keeps the
unacknowledged messages), then release the lease, so the next owner finds the session free.

When the database cannot be reached the member keeps its robots until its last successful renewal is a
lease length old (by this process's monotonic clock), then detaches them all: by then another worker may
hold them. Writes are fenced anyway; this keeps the MQTT sessions from fighting.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from shadow.errors import ShadowError
from shadow.ingest.mqtt import RobotSubscription
from shadow.pool.balance import plan_round
from shadow.pool.leases import LeaseTable, WorkerNameTakenError
from shadow.service import RobotPipeline, Service
from shadow.store.repository import Fence, StoreUnavailableError

log = logging.getLogger(__name__)

Follow = Callable[[str, Fence], tuple[RobotPipeline, RobotSubscription | None]]


@dataclass
class PoolCounters:
    """What the member did, for the status endpoint and the logs."""

    rounds: int = 0
    claimed: int = 0
    released: int = 0
    lost: int = 0  # leases found taken over at renewal, or refused by the fence
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
    ) -> None:
        if not 0 < heartbeat_s * 2 <= leases.lease_s:
            raise ShadowError(f"pool.heartbeat_s: must be > 0 and at most half of lease_s, got {heartbeat_s}")
        self.leases = leases
        self.service = service
        self.robot_ids = sorted(robot_ids)
        self.follow = follow
        self.heartbeat_s = heartbeat_s
        self.held: dict[str, int] = {}  # robot -> fencing token of this worker's lease
        self.counters = PoolCounters()
        self.error: BaseException | None = None  # set when the member had to stop (name taken over)
        self._renewed_at = time.monotonic()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    @property
    def worker_id(self) -> str:
        return self.leases.worker_id

    def join(self, *, host: str, pid: int) -> None:
        """Register the worker and make sure every robot has a lease row."""
        self.leases.ensure_robots(self.robot_ids)
        self.leases.join(host=host, pid=pid)
        self._renewed_at = time.monotonic()

    def start(self) -> None:
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
        """One round: heartbeat, renew, drop lost robots, release or claim towards the share."""
        self.counters.rounds += 1
        started = time.monotonic()
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
        taken_over = [r for r in self.held if still.get(r) != self.held[r]]
        for robot_id in taken_over:
            log.warning("worker %s: lease %d of robot %s was taken over; detaching it",
                        self.worker_id, self.held[robot_id], robot_id)  # fmt: skip
        self._give_up(taken_over, release=False)
        refused = [p.robot_id for p in self.service.pipelines if p.lease_lost and p.robot_id in self.held]
        self._give_up(refused, release=True)
        plan = plan_round(list(self.held), n_robots=len(self.robot_ids), n_live_workers=n_live)
        self._give_up(list(plan.release), release=True, lost=False)
        if plan.claim:
            candidates = [r for r in self.robot_ids if r not in self.held]
            for robot_id, token in self.leases.claim(candidates, plan.claim).items():
                self._take(robot_id, token)

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
            except StoreUnavailableError as exc:
                log.warning("robot %s: release failed (the lease expires on its own): %s", robot_id, exc)
