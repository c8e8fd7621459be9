"""Migration 0003 (series and health indices) and the read queries that use them: downsampled series (the last
row of each step per parameter, the last window of each step for residuals) and the newest health snapshot of
each scope, against plain-Python references, on
SQLite and PostgreSQL, and their SQLite query plans (indices used, no table scan)."""

from __future__ import annotations

import math
from collections.abc import Iterator
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import sqlalchemy as sa
from alembic import command

from shadow.store import repository, schema
from shadow.store.database import alembic_config, current_revision, migrate
from shadow.store.repository import SqlStore, StepResults, step_of
from tests.servers import PostgresServer

ROBOT = "northfield/line3/picker-1"
OTHER = "northfield/line3/picker-2"
T0 = 1_796_000_000.0


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def store(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[SqlStore]:
    if request.param == "sqlite":
        url = f"sqlite:///{tmp_path / 'series.db'}"
    else:
        server: PostgresServer = request.getfixturevalue("postgres_server")
        name = f"s_{abs(hash(request.node.nodeid)) % 10**9}"
        admin = sa.create_engine(server.url(), isolation_level="AUTOCOMMIT")
        with admin.connect() as conn:
            conn.execute(sa.text(f"DROP DATABASE IF EXISTS {name}"))
            conn.execute(sa.text(f"CREATE DATABASE {name}"))
        admin.dispose()
        url = server.url(name)
    s = SqlStore(url)
    for rid in (ROBOT, OTHER):
        s.register_robot(rid, family="delta", n_actuators=3)
    yield s
    s.close()


def reference_downsample(rows: list[dict[str, Any]], every_s: float, key: str) -> list[dict[str, Any]]:
    """The last row of each step per series, in plain Python (the API's former in-memory downsampling)."""
    kept: dict[tuple[int, Any], dict[str, Any]] = {}
    for r in sorted(rows, key=lambda r: r["time_s"]):
        kept[(step_of(r["time_s"], every_s), r[key])] = r
    return sorted(kept.values(), key=lambda r: (r["time_s"], r[key]))


def reference_last_outputs(rows: list[dict[str, Any]], every_s: float) -> list[dict[str, Any]]:
    """All rows of the newest time of each step, in plain Python."""
    newest: dict[int, float] = {}
    for r in rows:
        k = step_of(r["time_s"], every_s)
        newest[k] = max(newest.get(k, -math.inf), r["time_s"])
    kept = [r for r in rows if r["time_s"] == newest[step_of(r["time_s"], every_s)]]
    return sorted(kept, key=lambda r: (r["time_s"], r["actuator"]))


def irregular_rows(rng: np.random.Generator) -> StepResults:
    """Series with gaps, irregular times, a sparse parameter and one actuator missing at times."""
    r = StepResults(ROBOT)
    t = T0 + np.cumsum(rng.exponential(0.7, 3000))
    t = t[(t < T0 + 700) | (t > T0 + 1100)]  # a stretch without rows
    for k, ts in enumerate(t.tolist()):
        for name in ("coulomb_1", "tool_mass", "viscous_2"):
            r.estimates.append({"time_s": ts, "parameter": name, "value": k * 1.0, "std": 0.1, "identifiable": True})
        if k % 37 == 0:
            r.estimates.append(
                {"time_s": ts + 0.01, "parameter": "transfer_mass", "value": -k, "std": 0.01, "identifiable": True}
            )
        for a in (1, 2, 3):
            if a == 3 and k % 5 == 0:
                continue
            row = {"time_s": ts, "actuator": a, "window_s": 1.0, "n_samples": 1000, "rms": k + a / 10, "peak": 1.0}
            r.residual_aggregates.append(row)
    return r


@pytest.fixture
def filled(store: SqlStore) -> tuple[SqlStore, StepResults]:
    rows = irregular_rows(np.random.default_rng(20240601))
    store.write_step(rows)
    other = StepResults(OTHER, estimates=[{**e, "value": 9e9} for e in rows.estimates[:500]])
    store.write_step(other)  # a second robot must never show
    return store, rows


def keyed(rows: list[dict[str, Any]], key: str) -> list[tuple[float, Any, Any]]:
    return [(r["time_s"], r[key], r["value"] if "value" in r else r["rms"]) for r in rows]


@pytest.mark.parametrize("every_s", [0.05, 0.3, 1.0, 7.0, 60.0, 333.3])  # finer and coarser than the rows
@pytest.mark.parametrize(("start_dt", "end_dt"), [(0.0, 3000.0), (13.7, 650.0), (690.0, 1111.0)])
def test_downsampled_estimates_match_the_reference(
    filled: tuple[SqlStore, StepResults], every_s: float, start_dt: float, end_dt: float
) -> None:
    store, rows = filled
    start, end = T0 + start_dt, T0 + end_dt
    inside = [{"robot_id": ROBOT, **e} for e in rows.estimates if start <= e["time_s"] < end]
    expected = reference_downsample(inside, every_s, "parameter")
    got = store.estimates(ROBOT, start_s=start, end_s=end, every_s=every_s, limit=100_000)
    assert keyed(got, "parameter") == keyed(expected, "parameter")
    # pages of 97 put together are the whole list
    pages = [store.estimates(ROBOT, start_s=start, end_s=end, every_s=every_s, limit=97, offset=o)
             for o in range(0, len(expected) + 97, 97)]  # fmt: skip
    assert keyed([p for chunk in pages for p in chunk], "parameter") == keyed(expected, "parameter")
    some = ["transfer_mass", "viscous_2"]
    only = [e for e in inside if e["parameter"] in some]
    got = store.estimates(ROBOT, start_s=start, end_s=end, every_s=every_s, parameters=some, limit=100_000)
    assert keyed(got, "parameter") == keyed(reference_downsample(only, every_s, "parameter"), "parameter")


@pytest.mark.parametrize("every_s", [0.2, 1.0, 4.5, 100.0])
def test_downsampled_residuals_are_the_last_window_of_each_step(
    filled: tuple[SqlStore, StepResults], every_s: float
) -> None:
    store, rows = filled
    start, end = T0 + 50.0, T0 + 1500.0
    inside = [r for r in rows.residual_aggregates if start <= r["time_s"] < end]
    got = store.residual_aggregates(ROBOT, start_s=start, end_s=end, every_s=every_s, limit=100_000)
    expected = reference_last_outputs(inside, every_s)
    assert keyed(got, "actuator") == keyed(expected, "actuator")
    pages = [store.residual_aggregates(ROBOT, start_s=start, end_s=end, every_s=every_s, limit=41, offset=o)
             for o in range(0, len(expected) + 41, 41)]  # fmt: skip
    assert keyed([p for chunk in pages for p in chunk], "actuator") == keyed(expected, "actuator")


def test_a_step_keeps_its_last_window_whole(store: SqlStore) -> None:
    def row(t: float, a: int) -> dict[str, Any]:
        return {"time_s": T0 + t, "actuator": a, "window_s": 1.0, "n_samples": 1000, "rms": t, "peak": 1.0}

    # step [0, 10): windows at 1 (actuators 1-3) and 9 (1-2); step [10, 20): one window at 12 (1-3)
    store.write_step(StepResults(ROBOT, residual_aggregates=[*(row(1, a) for a in (1, 2, 3)), row(9, 1), row(9, 2),
                                                               *(row(12, a) for a in (1, 2, 3))]))  # fmt: skip
    for every_s in (10.0, 10.0 / 3):  # coarse and fine steps
        got = store.residual_aggregates(ROBOT, start_s=T0, end_s=T0 + 20, every_s=every_s)
        assert [(r["time_s"] - T0, r["actuator"]) for r in got if r["time_s"] < T0 + 10][-2:] == [(9, 1), (9, 2)]
    got = store.residual_aggregates(ROBOT, start_s=T0, end_s=T0 + 20, every_s=10.0)
    assert [(r["time_s"] - T0, r["actuator"]) for r in got] == [(9, 1), (9, 2), (12, 1), (12, 2), (12, 3)]


def test_raw_series_pages_in_sql(filled: tuple[SqlStore, StepResults]) -> None:
    store, rows = filled
    full = sorted(rows.estimates, key=lambda e: (e["time_s"], e["parameter"]))
    got = store.estimates(ROBOT, start_s=0.0, end_s=2e9, limit=50, offset=1000)
    assert keyed(got, "parameter") == keyed(full[1000:1050], "parameter")
    # steps finer than the clock's resolution: every row is the last of its step
    tiny = store.estimates(ROBOT, start_s=0.0, end_s=2e9, every_s=1e-300, limit=50, offset=1000)
    assert keyed(tiny, "parameter") == keyed(full[1000:1050], "parameter")


def test_step_of_agrees_with_the_bounds() -> None:
    rng = np.random.default_rng(20240601)
    for t, e in zip(T0 + rng.uniform(0, 1e6, 2000), 10.0 ** rng.uniform(-3, 5, 2000), strict=True):
        k = step_of(float(t), float(e))
        assert k * e <= t < (k + 1) * e
    assert step_of(10.0, 5.0) == 2 and step_of(9.999, 5.0) == 1 and step_of(-0.1, 1.0) == -1
    assert math.isclose(step_of(T0, 0.1) * 0.1, T0, abs_tol=0.1)


def test_latest_health_is_the_newest_of_each_scope(store: SqlStore) -> None:
    r = StepResults(ROBOT)
    newest: dict[str, float] = {}
    for k in range(200):
        for scope in ("robot", "actuator:1", "actuator:2", "actuator:3"):
            if scope == "actuator:3" and k > 120:
                continue  # a scope written less recently than the others
            t = T0 + k + (0.5 if scope == "actuator:2" else 0.0)
            r.health.append({"time_s": t, "scope": scope, "state": "steady", "reasons": [f"{k}"], "figures": {"k": k}})
            newest[scope] = t
    store.write_step(r)
    store.write_step(StepResults(OTHER, health=[{**h, "time_s": h["time_s"] + 1e4} for h in r.health[:5]]))
    got = store.latest_health(ROBOT)
    assert {(h["scope"], h["time_s"]) for h in got} == set(newest.items())
    assert [h["scope"] for h in got] == sorted(newest)
    assert next(h for h in got if h["scope"] == "actuator:3")["figures"] == {"k": 120}
    assert store.latest_health("northfield/line3/nobody") == []

    # the overview: each robot with its newest robot-scope row, the same as latest_health's; none before the first
    store.register_robot("northfield/line3/picker-3", family="delta", n_actuators=3)
    overview = store.robots_with_health()
    assert [r["robot_id"] for r, _ in overview] == sorted([ROBOT, OTHER, "northfield/line3/picker-3"])
    for robot, health in overview:
        expected = [h for h in store.latest_health(robot["robot_id"]) if h["scope"] == "robot"]
        assert health == (expected[0] if expected else None)
    assert dict((r["robot_id"], h) for r, h in overview)["northfield/line3/picker-3"] is None


def test_migration_0003_adds_the_indices_to_a_filled_store(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'old.db'}"
    engine = sa.create_engine(url)
    migrate(engine, "0002")
    with engine.begin() as conn:
        conn.execute(schema.robots.insert(), {"robot_id": ROBOT, "site": "northfield", "cell": "line3",
                                              "name": "picker-1", "family": "delta", "n_actuators": 3,
                                              "registered_at_s": T0})  # fmt: skip
        conn.execute(
            schema.estimates.insert(),
            [{"robot_id": ROBOT, "time_s": T0 + k, "parameter": "coulomb_1", "value": k, "std": 0.1,
              "identifiable": True} for k in range(100)],
        )  # fmt: skip
    names = {ix["name"] for ix in sa.inspect(engine).get_indexes("estimates")}
    assert "ix_estimates_series" not in names
    store = SqlStore(url)  # migrates to the head
    assert current_revision(store.engine) == "0003"
    inspector = sa.inspect(store.engine)
    series = {ix["name"]: ix["column_names"] for ix in inspector.get_indexes("estimates")}
    health = {ix["name"]: ix["column_names"] for ix in inspector.get_indexes("health_snapshots")}
    assert series["ix_estimates_series"] == ["robot_id", "parameter", "time_s"]
    assert health["ix_health_snapshots_scope"] == ["robot_id", "scope", "time_s"]
    assert len(store.estimates(ROBOT, start_s=0.0, end_s=2e9, every_s=10.0)) == 10
    store.close()
    config = alembic_config()  # and back down
    with engine.begin() as conn:
        config.attributes["connection"] = conn
        command.downgrade(config, "0002")
    assert "ix_estimates_series" not in {ix["name"] for ix in sa.inspect(engine).get_indexes("estimates")}
    engine.dispose()


def plans(store: SqlStore, call: Any) -> list[str]:
    """The SQLite query plan of every statement ``call`` runs on ``store``."""
    seen: list[tuple[str, Any]] = []

    def record(conn: Any, cursor: Any, statement: str, parameters: Any, context: Any, executemany: bool) -> None:
        seen.append((statement, parameters))

    sa.event.listen(store.engine, "before_cursor_execute", record)
    try:
        call()
    finally:
        sa.event.remove(store.engine, "before_cursor_execute", record)
    raw = store.engine.raw_connection()
    try:
        return [
            " | ".join(row[3] for row in raw.cursor().execute(f"EXPLAIN QUERY PLAN {s}", p).fetchall()) for s, p in seen
        ]
    finally:
        raw.close()


def history(store: SqlStore, hours: float) -> float:
    """``hours`` of one robot's rows at the service's pace (residuals each second, estimates every 2 s, health
    every 10 s); returns the end of the history."""
    n = int(hours * 3600)
    r = StepResults(ROBOT)
    for k in range(n):
        t = T0 + k
        r.residual_aggregates += [
            {"time_s": t, "actuator": a, "window_s": 1.0, "n_samples": 1000, "rms": 0.1, "peak": 0.3} for a in (1, 2, 3)
        ]
        if k % 2 == 1:
            r.estimates += [
                {"time_s": t + 0.999, "parameter": p, "value": 1.0, "std": 0.1, "identifiable": True}
                for p in ("tool_mass", "coulomb_1", "coulomb_2", "viscous_1")
            ]
        if k % 10 == 9:
            r.health += [
                {"time_s": t + 0.999, "scope": sc, "state": "steady", "reasons": [], "figures": {}}
                for sc in ("robot", "actuator:1", "actuator:2", "actuator:3")
            ]
    store.write_step(r)
    return T0 + n


def vm_steps(store: SqlStore, call: Any) -> int:
    """SQLite virtual-machine instructions (in hundreds) that ``call`` makes the store run: a measure of the
    work done that does not depend on the machine's speed."""
    count = [0]

    def tick() -> int:
        count[0] += 1
        return 0  # go on

    def on_checkout(dbapi_connection: Any, record: Any, proxy: Any) -> None:
        dbapi_connection.set_progress_handler(tick, 100)

    def on_checkin(dbapi_connection: Any, record: Any) -> None:
        dbapi_connection.set_progress_handler(None, 0)

    sa.event.listen(store.engine, "checkout", on_checkout)
    sa.event.listen(store.engine, "checkin", on_checkin)
    try:
        call()
    finally:
        sa.event.remove(store.engine, "checkout", on_checkout)
        sa.event.remove(store.engine, "checkin", on_checkin)
    return count[0]


def test_the_reads_cost_the_same_on_ten_times_the_history(tmp_path: Path) -> None:
    """The dashboard's requests for the newest hour (300 steps) and the newest health do about the same work on
    1 h and on 10 h of history: seeks, not reads of the robot's history (the former latest_health, which grouped
    all of it, did ten times the work on the larger one: 1,729 against 174 hundred instructions)."""
    work = {}
    for hours in (1.0, 10.0):
        store = SqlStore(f"sqlite:///{tmp_path / f'h{hours:g}.db'}")
        store.register_robot(ROBOT, family="delta", n_actuators=3)
        end = history(store, hours)
        start = end - 3600.0
        work[hours] = {
            "health": vm_steps(store, partial(store.latest_health, ROBOT)),
            "overview": vm_steps(store, store.robots_with_health),
            "estimates": vm_steps(store, partial(store.estimates, ROBOT, start_s=start, end_s=end, every_s=12.0)),
            "residuals": vm_steps(
                store, partial(store.residual_aggregates, ROBOT, start_s=start, end_s=end, every_s=12.0)
            ),
        }
        assert len(store.latest_health(ROBOT)) == 4
        assert (
            len(store.residual_aggregates(ROBOT, start_s=start, end_s=end, every_s=12.0)) == 301 * 3
        )  # T0 is not a multiple of 12 s
        store.close()
    for name, small in work[1.0].items():
        assert work[10.0][name] < 1.5 * small + 5, (name, work)


def test_sqlite_plans_use_the_series_indices(tmp_path: Path) -> None:
    store = SqlStore(f"sqlite:///{tmp_path / 'plans.db'}")
    store.register_robot(ROBOT, family="delta", n_actuators=3)
    end = history(store, 0.5)
    health = plans(store, lambda: store.latest_health(ROBOT))
    assert health and all("SCAN health_snapshots" not in p and "SCAN x" not in p for p in health), health
    assert any("ix_health_snapshots_scope" in p for p in health), health
    overview = " || ".join(plans(store, store.robots_with_health))
    assert "SCAN health_snapshots" not in overview and "SCAN y" not in overview, overview  # robots: scanned
    # per robot: the newest time by the scope index, then its row by the primary key
    assert "SEARCH y USING COVERING INDEX ix_health_snapshots_scope (robot_id=? AND scope=?)" in overview, overview
    assert "SEARCH health_snapshots USING INDEX" in overview, overview
    series = plans(store, lambda: store.estimates(ROBOT, start_s=end - 1800, end_s=end, every_s=60.0))
    joined = " || ".join(series)
    assert "SCAN estimates" not in joined and "SCAN x" not in joined, joined
    assert "ix_estimates_series (robot_id=? AND parameter=? AND time_s>? AND time_s<?)" in joined, joined
    residuals = " || ".join(
        plans(store, lambda: store.residual_aggregates(ROBOT, start_s=end - 1800, end_s=end, every_s=60.0))
    )
    assert "SCAN residual_aggregates" not in residuals and "SCAN x" not in residuals, residuals
    assert "residual_aggregates_1 (robot_id=? AND time_s=?)" in residuals, residuals  # rows looked up by time
    store.close()


def test_seek_budget_splits_a_long_request(filled: tuple[SqlStore, StepResults], monkeypatch: Any) -> None:
    store, rows = filled
    monkeypatch.setattr(repository, "SEEK_BUDGET", 8)  # many small statements give the same rows
    inside = [{"robot_id": ROBOT, **e} for e in rows.estimates]
    got = store.estimates(ROBOT, start_s=T0, end_s=T0 + 3000, every_s=25.0, limit=100_000)
    assert keyed(got, "parameter") == keyed(reference_downsample(inside, 25.0, "parameter"), "parameter")
