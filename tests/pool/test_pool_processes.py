"""Workers as real processes (``shadow serve --worker``) on one mosquitto and one PostgreSQL.

Twelve simulated 1 kHz robots (50-sample batches, so 20 messages per robot per second) and a lease of
2.5 s. What is checked comes from the database, not from the workers' own account:

* the lease history: consecutive grants of a robot never overlap (each robot has at most one owner at
  every instant) and the gaps between them are bounded (it is never left without one for long);
* a trigger's log of every checkpoint write with its fencing token and the database's clock: no write
  under a token after a newer token of that robot was granted, and no robot's checkpoint going back;
* the raw batches: every published sequence number stored exactly once; one collision event per robot.

One worker reaches the broker through a proxy that the broker cut-off test closes (tests/pool/proxy.py).
"""

from __future__ import annotations

import logging
import signal
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from shadow.ingest.wire import SampleBatch
from tests.pool.common import fresh_database
from tests.pool.harness import PoolPlant, Publishing, ownership_gaps, regressions, stale_writes, wait_until
from tests.pool.proxy import CuttableProxy
from tests.servers import Broker, PostgresServer
from tests.synthetic import EPOCH_S, delta_stream

log = logging.getLogger(__name__)

pytestmark = [pytest.mark.postgres, pytest.mark.mosquitto, pytest.mark.slow]

SAMPLES_PER_BATCH = 50
PERIOD_S = SAMPLES_PER_BATCH / 1000.0
IMPACT_AT_S = 5.0
MAX_STREAM_S = 90.0  # the publisher stops earlier, when the scenario is over


@pytest.fixture
def plant(
    request: pytest.FixtureRequest, mosquitto_broker: Broker, postgres_server: PostgresServer, tmp_path: Path
) -> Iterator[PoolPlant]:
    n_robots = request.param
    p = PoolPlant(
        tmp_path,
        mosquitto_broker.host,
        mosquitto_broker.port,
        fresh_database(postgres_server, "pool"),
        n_robots,
        f"pool{uuid.uuid4().hex[:6]}",
    )
    p.install_write_log()
    p.create_sessions()
    try:
        yield p
    finally:
        p.close()
        for w in p.workers.values():  # on failure, the workers' logs are in the report
            log.info("----- %s (exit %s) -----\n%s", w.name, w.process.returncode, w.log()[-4000:])


def stream() -> list[SampleBatch]:
    s = delta_stream(np.random.default_rng(20261202), duration_s=MAX_STREAM_S, impact_at_s=IMPACT_AT_S)
    return s.batches("r", SAMPLES_PER_BATCH)


def publish_until_stored(plant: PoolPlant, publishing: Publishing, *, more_s: float) -> int:
    """Let the stream run ``more_s`` longer (and past the impact), stop it, wait until everything is stored."""
    at_least_s = max(IMPACT_AT_S + 2.0, publishing.sent * PERIOD_S + more_s)
    assert wait_until(lambda: publishing.sent * PERIOD_S >= at_least_s, at_least_s + 30), publishing.sent
    publishing.stop.set()
    assert publishing.thread is not None
    publishing.thread.join(30)
    n = publishing.sent
    assert wait_until(lambda: sum(plant.stored_counts().values()) >= n * plant.n_robots, 90), plant.stored_counts()
    return n


def check_results(plant: PoolPlant, n_batches: int) -> None:
    """Exactly once, fenced, never two owners; one collision per robot at the impact."""
    for rid in plant.robot_ids:
        assert plant.raw_seqs(rid) == list(range(n_batches)), rid
        cp = plant.store.checkpoint(rid)
        assert cp is not None and cp.last_seq == n_batches - 1
        events = plant.store.events(robot_id=rid)
        assert [(e["kind"], round(e["start_s"] - EPOCH_S, 1)) for e in events] == [("collision", IMPACT_AT_S)], rid
    history = plant.history()
    assert sorted(history) == plant.robot_ids
    gaps = ownership_gaps(history)
    assert all(gap >= 0 for _, gap, _ in gaps), [g for g in gaps if g[1] < 0]  # never two owners at once
    assert all(g["ended_at_s"] is not None for grants in history.values() for g in grants)  # all released at exit
    writes = plant.writes()
    assert writes and not stale_writes(history, writes), stale_writes(history, writes)[:5]
    assert not regressions(writes)


def grants_open_at(history: dict[str, list[dict[str, Any]]], robots: set[str], t_s: float) -> dict[str, dict[str, Any]]:
    """robot -> its grant that was running at ``t_s``."""
    return {
        r: next(
            g for g in history[r] if g["acquired_at_s"] <= t_s and (g["ended_at_s"] is None or g["ended_at_s"] > t_s)
        )
        for r in robots
    }


def assert_settles(plant: PoolPlant, owners: set[str], timeout_s: float = 30.0) -> None:
    assert wait_until(lambda: plant.settled(owners), timeout_s), (owners, plant.shares())


@pytest.mark.parametrize("plant", [12], indirect=True)
def test_three_workers_share_twelve_robots_a_fourth_joins_and_one_dies(plant: PoolPlant) -> None:
    batches = stream()
    for name in ("w1", "w2", "w3"):
        plant.start_worker(name)
    assert_settles(plant, {"w1", "w2", "w3"}, 60.0)
    with plant.publishing(batches, PERIOD_S) as publishing:
        plant.start_worker("w4")  # joins mid-stream: each of the three gives up one robot, w4 takes three
        assert_settles(plant, {"w1", "w2", "w3", "w4"}, 60.0)
        assert plant.shares() == {"w1": 3, "w2": 3, "w3": 3, "w4": 3}
        victim = "w2"
        victims_robots = {rid for rid, owner in plant.live_owners().items() if owner == victim}
        killed_at = plant.now_s()
        plant.signal(victim, signal.SIGKILL)
        assert_settles(plant, {"w1", "w3", "w4"})
        assert publishing.running()
        n_batches = publish_until_stored(plant, publishing, more_s=2.0)
    plant.stop_all()
    check_results(plant, n_batches)
    history = plant.history()
    retaken = {}
    for rid in victims_robots:
        dead = [g for g in history[rid] if g["owner"] == victim][-1]
        after = [g for g in history[rid] if g["fencing_token"] == dead["fencing_token"] + 1][0]
        assert dead["end_cause"] == "expired" and after["owner"] != victim
        retaken[rid] = after["acquired_at_s"] - killed_at
    # owned again within the lease (plus the claimer's round and a margin for a loaded machine)
    assert all(0 < dt <= plant.lease_s + 4 * plant.heartbeat_s + 1.0 for dt in retaken.values()), retaken
    handovers = [gap for _, gap, cause in ownership_gaps(history) if cause == "released"]
    assert handovers and max(handovers) <= plant.lease_s, handovers  # w4 joining left no robot unowned for long
    log.info("failover after SIGKILL [s]: %s; handover gaps [s]: max %.2f of %d",
             sorted(round(v, 2) for v in retaken.values()), max(handovers), len(handovers))  # fmt: skip
    for name in ("w1", "w3", "w4"):  # never cut off: every acknowledgement of theirs went out, also at hand-overs
        text = plant.workers[name].log()
        assert "acknowledgements not sent" not in text and "PUBACK" not in text, name


@pytest.mark.parametrize("plant", [8], indirect=True)
def test_a_worker_stopped_past_its_lease_writes_nothing_after_losing_it(plant: PoolPlant) -> None:
    batches = stream()
    for name in ("w1", "w2"):
        plant.start_worker(name)
    assert_settles(plant, {"w1", "w2"}, 60.0)
    with plant.publishing(batches, PERIOD_S) as publishing:
        assert wait_until(lambda: publishing.sent * PERIOD_S >= 3.0, 30)
        stalled = {rid for rid, owner in plant.live_owners().items() if owner == "w1"}
        plant.signal("w1", signal.SIGSTOP)
        assert wait_until(lambda: plant.shares() == {"w2": 8}, 30), plant.shares()  # taken over while stopped
        time.sleep(1.0)  # the robots move on under w2 while w1 still believes it holds them
        plant.signal("w1", signal.SIGCONT)
        assert_settles(plant, {"w1", "w2"})  # w1 lets go of what it lost, then gets its share back
        assert publishing.running()
        n_batches = publish_until_stored(plant, publishing, more_s=2.0)
    plant.stop_all()
    check_results(plant, n_batches)  # includes: no write of w1 under a token w2 had superseded
    counters = plant.workers["w1"].final_counters()
    assert counters is not None and counters["lost"] >= len(stalled), counters
    fenced = plant.workers["w1"].log().count("write refused")
    log.info("w1 lost %d lease(s); %d write(s) of w1 refused by the fence after SIGCONT", counters["lost"], fenced)


@pytest.mark.parametrize("plant", [8], indirect=True)
def test_a_worker_cut_off_from_the_broker_frees_its_robots_and_takes_them_again(plant: PoolPlant) -> None:
    batches = stream()
    proxy = CuttableProxy(plant.broker_port).start()
    try:
        plant.start_worker("w1", broker_port=proxy.port)  # w1's only path to the broker
        plant.start_worker("w2")
        assert_settles(plant, {"w1", "w2"}, 60.0)
        with plant.publishing(batches, PERIOD_S) as publishing:
            assert wait_until(lambda: publishing.sent * PERIOD_S >= 2.0, 30)
            cut_off = {rid for rid, owner in plant.live_owners().items() if owner == "w1"}
            cut_at = plant.now_s()
            proxy.cut()  # w1 still reaches PostgreSQL, and would go on renewing its leases
            assert wait_until(lambda: plant.shares() == {"w2": 8}, 30), plant.shares()
            open_at_cut = grants_open_at(plant.history(), cut_off, cut_at)
            assert all(g["owner"] == "w1" and g["end_cause"] == "released" for g in open_at_cut.values())  # not expired
            assert wait_until(lambda: set(plant.first_writes_after(cut_at)) >= cut_off, 30)
            first_results = plant.first_writes_after(cut_at)
            proxy.restore()
            assert_settles(plant, {"w1", "w2"}, 60.0)  # w1 joins again and gets its share back
            assert publishing.running()
            n_batches = publish_until_stored(plant, publishing, more_s=2.0)
        plant.stop_all()
    finally:
        proxy.close()
    check_results(plant, n_batches)
    release_s = sorted(g["ended_at_s"] - cut_at for g in open_at_cut.values())
    result_s = sorted(first_results[r] - cut_at for r in cut_off)
    # the grace is one lease; then a round of w1 (release) and a round of w2 (claim), with a margin
    assert max(result_s) <= 2 * plant.lease_s + 4 * plant.heartbeat_s + 2.0, result_s
    counters = plant.workers["w1"].final_counters()
    assert counters is not None and counters["broker_cutoffs"] == 1 and counters["lost"] == 0, counters
    log.info("broker cut-off, lease %.1f s: released %.2f-%.2f s after the cut, first result of w2 %.2f-%.2f s",
             plant.lease_s, min(release_s), max(release_s), min(result_s), max(result_s))  # fmt: skip
