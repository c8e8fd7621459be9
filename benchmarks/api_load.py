"""The read-only API under load, on a store of 30 simulated days of one cell of ten delta pickers.

Run: ``python -m benchmarks.api_load [--days 30] [--robots 10] [--database PATH] [--seconds S] [--concurrency C]``

**The store.** A SQLite file with the store's own schema (migrated by :class:`~shadow.store.repository.SqlStore`)
holding what the service would have written for ``--robots`` delta pickers of one cell over ``--days`` of round-
the-clock work (shadow/monitoring.py, shadow/service.py): per output period of 1 s and robot, three per-second
residual aggregates (RMS, peak, NIS per actuator), eleven estimates (tool and work-piece mass, Coulomb, viscous and
offset friction per actuator) plus the carried mass of a transfer, and four health snapshots (robot and actuators,
with the service's reasons and figures); collisions with their evidence window of raw samples (1 s either side at
1 kHz, wire-format binary), payload faults, wear-level events of one robot whose axis 2 wears over the horizon,
sequence gaps and conditioning restarts, and one 20 min service outage of the whole cell (no rows then).

At the service's own rate that is 18 rows per robot-second, 467 M rows and about 64 GB for 10 robots over 30 days
(117 B per estimate or residual row, 210 B per health snapshot, measured on this schema), more than this
machine's shared disk should take. So the per-second residual aggregates keep the service's period (78 M rows for
the default cell), and estimates and health snapshots are stored every ``--estimate-period`` and
``--health-period`` seconds (default 10: one output in ten); ``1`` gives the service's rate. The query costs that
depend on the number of rows in a range are those of the residuals; the others are seeks.

Rows are generated in chunks of one robot-day and written with ``executemany`` of the raw sqlite3 driver, one
transaction per chunk, into exactly the store's tables and columns (``--write-path bulk``, the default), or
through the store's own write path :meth:`SqlStore.write_step` (``--write-path store``). Both are timed on one
robot-hour before the build, with the service's pattern of one ``write_step`` per output period beside them.
A file given with ``--database`` that holds the same build (recorded in its table ``api_load_build``) is
reused; one this benchmark did not make is refused.

**The load.** The real application (:func:`shadow.api.app.create_app`, read-only guard included, its rate limit
lifted) is served by uvicorn on 127.0.0.1 in a second process, pinned to core 0; this process drives it from
core 1 with ``--concurrency`` threads, each on its own keep-alive connection, each sending the next request when
the previous answered (a closed loop: at most C requests in flight). Every endpoint is loaded for ``--seconds``
after one warm-up request per thread, with the requests the dashboard sends (shadow/api/static/dashboard.js:
series at ``every = range / 300`` and ``limit=10000``), rotating over the robots. Printed per endpoint: requests
per second, p50 and p99 latency, and both as ratios to the liveness route ``/health/live`` measured in the same
run (before and after the others), since only ratios are comparable on a shared machine.
"""

from __future__ import annotations

import argparse
import contextlib
import http.client
import json
import multiprocessing as mp
import os
import socket
import sqlite3
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from urllib.parse import urlencode

import numpy as np
import sqlalchemy as sa
from scipy.signal import lfilter

from shadow.api.schemas import iso
from shadow.errors import ShadowError
from shadow.ingest.wire import PositionUnit, SampleBatch, encode_binary
from shadow.robots.parameters import MeasuredQuantity
from shadow.store import schema
from shadow.store.database import current_revision
from shadow.store.repository import SqlStore, StepResults

SITE = "kestrel-harwick"
CELL = "line-2"
START_S = datetime(2026, 10, 1, tzinfo=UTC).timestamp()  # first second of the simulated horizon
DAY_S = 86400
OUTPUT_PERIOD_S = 1  # the service's output period (shadow.monitoring.default_settings)
SAMPLE_RATE_HZ = 1000
N_ACTUATORS = 3
WEAR_ROBOT = 6  # index of the robot whose axis 2 wears (picker-07; the last one of a smaller cell)
WEAR_AXIS = 2  # 1-based
WEAR_RISE = 0.45  # its friction indicator rises from 1.00 to 1.45 over the horizon
WEAR_LEVELS = (("elevated", 1.15), ("service due", 1.30))  # shadow.detection.wear.WearLevels defaults
OUTAGE_AT = 0.4  # the service outage starts at this fraction of the horizon
OUTAGE_S = 1200
PICK_RATE_HZ = 1.5  # 90 picks a minute
RATED_TORQUE_NM = 72.0  # example delta's rated joint torque (shadow/examples/delta_packaging.toml)
BUILD_TABLE = "api_load_build"
BUILD_FORMAT = 1
SERVER_CORE, CLIENT_CORE = 0, 1
TABLES = {
    "estimates": schema.estimates,
    "residual_aggregates": schema.residual_aggregates,
    "health": schema.health_snapshots,
    "events": schema.events,
    "unmonitored": schema.unmonitored_intervals,
}
STEP_LISTS = {  # chunk table -> StepResults list
    "estimates": "estimates",
    "residual_aggregates": "residual_aggregates",
    "health": "health",
    "events": "events",
    "unmonitored": "unmonitored",
}


class BenchmarkError(ShadowError, RuntimeError):
    """The benchmark cannot run as asked (named in the message)."""


# --------------------------------------------------------------------------------------------- the store
@dataclass(frozen=True, slots=True)
class BuildSpec:
    """What a benchmark store holds. Rates of rare rows are per robot and day."""

    days: float = 30.0
    robots: int = 10
    estimate_period_s: int = 10
    health_period_s: int = 10
    collisions_per_day: float = 1.5
    payload_faults_per_day: float = 8.0
    sequence_gaps_per_day: float = 3.0
    restarts_per_day: float = 4.0
    seed: int = 20261001

    def __post_init__(self) -> None:
        if not self.days > 0 or self.robots < 1:
            raise BenchmarkError(f"days {self.days} and robots {self.robots}: need days > 0 and robots >= 1")
        for name in ("estimate_period_s", "health_period_s"):
            if getattr(self, name) < OUTPUT_PERIOD_S:
                raise BenchmarkError(f"{name}: must be a whole number of output periods >= 1 s")

    @property
    def span_s(self) -> int:
        return max(60, round(self.days * DAY_S))

    @property
    def end_s(self) -> float:
        return START_S + self.span_s

    @property
    def outage(self) -> tuple[int, int]:
        """Seconds since START_S of the cell's service outage [start, end)."""
        a = int(OUTAGE_AT * self.span_s)
        return a, a + min(OUTAGE_S, max(1, self.span_s // 20))

    @property
    def wear_robot(self) -> int:
        return min(WEAR_ROBOT, self.robots - 1)

    def robot_ids(self) -> list[str]:
        return [f"{SITE}/{CELL}/picker-{i + 1:02d}" for i in range(self.robots)]


@dataclass(slots=True)
class Chunk:
    """One robot's rows of one stretch, per table, as tuples in the table's column order (robot_id first)."""

    robot_id: str
    rows: dict[str, list[tuple[Any, ...]]]

    def count(self) -> int:
        return sum(len(r) for r in self.rows.values())


def insert_columns(table: sa.Table) -> list[str]:
    """The columns a writer fills: all but the autoincrement keys."""
    return [c.name for c in table.c if not (c.primary_key and c.autoincrement is True)]


PARAMETERS = ["tool_mass", "work_piece_mass"] + [
    f"{kind}_{a}" for a in range(1, N_ACTUATORS + 1) for kind in ("coulomb", "viscous", "offset")
]
TRANSFER = "transfer_mass"


@dataclass(slots=True)
class _RobotState:
    """What carries from one chunk of a robot to the next: estimate walks, sequence of events."""

    index: int
    walk_zi: np.ndarray  # lfilter state of each parameter's Ornstein-Uhlenbeck walk
    mean: np.ndarray  # (P,) nominal values
    walk_std: np.ndarray  # (P,)
    std_floor: np.ndarray  # (P,)
    residual_rms_nm: np.ndarray  # (n,) healthy residual RMS per actuator
    collisions: list[tuple[float, float]] = field(default_factory=list)  # (end time, relative peak), recent


def _robot_state(spec: BuildSpec, index: int) -> _RobotState:
    rng = np.random.default_rng([spec.seed, index, 0])
    coulomb = 0.80 * rng.uniform(0.9, 1.1, N_ACTUATORS)
    viscous = 0.15 * rng.uniform(0.9, 1.1, N_ACTUATORS)
    offset = rng.normal(0.0, 0.02, N_ACTUATORS)
    friction = np.column_stack([coulomb, viscous, offset]).ravel()
    mean = np.concatenate([[0.35, 0.25], friction])
    walk = np.concatenate([[0.0005, 0.001], np.tile([0.004, 0.001, 0.002], N_ACTUATORS)])
    floor = np.concatenate([[0.002, 0.003], np.tile([0.02, 0.004, 0.01], N_ACTUATORS)])
    return _RobotState(
        index=index,
        walk_zi=np.zeros((len(PARAMETERS), 1)),
        mean=mean,
        walk_std=walk,
        std_floor=floor,
        residual_rms_nm=np.array([0.35, 0.40, 0.50]) * rng.uniform(0.9, 1.1),
    )


def _wear_ratio(spec: BuildSpec, robot: int, t_s: np.ndarray) -> np.ndarray:
    """Friction indicator of the worn axis (1 elsewhere) at times since START_S [-]."""
    if robot != spec.wear_robot:
        return np.ones_like(t_s)
    return 1.0 + WEAR_RISE * np.clip(t_s / spec.span_s, 0.0, 1.0)


def generate_chunks(spec: BuildSpec) -> Iterator[Chunk]:
    """Every robot's rows, one chunk per robot and day (the last day may be shorter), in time order."""
    out0, out1 = spec.outage
    for index, rid in enumerate(spec.robot_ids()):
        state = _robot_state(spec, index)
        for day, a in enumerate(range(0, spec.span_s, DAY_S)):
            b = min(a + DAY_S, spec.span_s)
            rng = np.random.default_rng([spec.seed, index, day + 1])
            s = np.arange(a, b)  # output periods (whole seconds since START_S)
            kept = s[(s < out0) | (s >= out1)]
            rows: dict[str, list[tuple[Any, ...]]] = {}
            rows["residual_aggregates"] = _residual_rows(rid, state, kept, rng)
            rows["estimates"] = _estimate_rows(spec, rid, state, kept, rng)
            events = _event_rows(spec, rid, state, kept, rng)
            rows["health"] = _health_rows(spec, rid, state, kept, events, rng)
            rows["events"] = events
            rows["unmonitored"] = _unmonitored_rows(spec, rid, a, b, rng)
            yield Chunk(rid, rows)


def _residual_rows(rid: str, state: _RobotState, s: np.ndarray, rng: np.random.Generator) -> list[tuple[Any, ...]]:
    n = N_ACTUATORS
    k = s.shape[0]
    rms = state.residual_rms_nm * np.exp(0.1 * rng.standard_normal((k, n)))  # [N m]
    peak = rms * rng.uniform(2.6, 3.4, (k, n))  # [N m]
    nis = np.abs(1.0 + 0.08 * rng.standard_normal(k))  # per degree of freedom [-]
    t = np.repeat(START_S + s.astype(float), n).tolist()
    actuator = np.tile(np.arange(1, n + 1), k).tolist()
    window = (OUTPUT_PERIOD_S - 1.0 / SAMPLE_RATE_HZ,) * (k * n)
    count = (SAMPLE_RATE_HZ * OUTPUT_PERIOD_S,) * (k * n)
    rid_col = (rid,) * (k * n)
    return list(
        zip(
            rid_col,
            t,
            actuator,
            window,
            count,
            rms.ravel().tolist(),
            peak.ravel().tolist(),
            np.repeat(nis, n).tolist(),
            strict=True,
        )
    )


def _period_outputs(s: np.ndarray, period_s: int) -> np.ndarray:
    """The outputs kept at this period: the last of every ``period_s`` outputs."""
    return s[s % period_s == period_s - 1]


def _estimate_rows(
    spec: BuildSpec, rid: str, state: _RobotState, s: np.ndarray, rng: np.random.Generator
) -> list[tuple[Any, ...]]:
    s = _period_outputs(s, spec.estimate_period_s)
    k, p = s.shape[0], len(PARAMETERS)
    theta = 1.0 / 360.0  # mean reversion per stored output (about an hour at the default period)
    noise = state.walk_std[:, None] * rng.standard_normal((p, k))
    walk, state.walk_zi = lfilter([1.0], [1.0, -(1.0 - theta)], noise, axis=1, zi=state.walk_zi)  # x_k = a x_k-1 + w
    t_rel = s.astype(float) + OUTPUT_PERIOD_S - 1.0 / SAMPLE_RATE_HZ  # last sample of the output period
    values = state.mean[:, None] + walk
    coulomb_worn = PARAMETERS.index(f"coulomb_{WEAR_AXIS}")
    values[coulomb_worn] *= _wear_ratio(spec, state.index, t_rel)
    settle = 1.0 + 4.0 * np.exp(-t_rel / 1800.0)  # the filter's std falls from its prior in the first hour
    std = state.std_floor[:, None] * settle[None, :] * np.exp(0.05 * rng.standard_normal((p, k)))
    identifiable = rng.random((p, k)) > 0.01
    t = (START_S + t_rel).tolist()
    rows: list[tuple[Any, ...]] = []
    transfer_t = (START_S + s.astype(float) + 0.42).tolist()  # one judged transfer per stored period
    transfer_m = (values[1] + 0.004 * rng.standard_normal(k)).tolist()
    names = sorted(range(p), key=lambda i: PARAMETERS[i])  # primary-key order within a time
    columns = [(PARAMETERS[i], values[i].tolist(), std[i].tolist(), identifiable[i].tolist()) for i in names]
    for j in range(k):  # loop over stored outputs: the transfer, then the filter's estimates, in key order
        rows.append((rid, transfer_t[j], TRANSFER, transfer_m[j], 0.004, True))
        for name, v, sd, ok in columns:
            rows.append((rid, t[j], name, v[j], sd[j], ok[j]))
    return rows


def _poisson_times(rate_per_day: float, s: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Event times [s since START_S] at a Poisson rate, inside the kept output periods ``s``."""
    if s.shape[0] == 0:
        return np.zeros(0)
    n = rng.poisson(rate_per_day * s.shape[0] / DAY_S)
    return np.sort(s[rng.integers(0, s.shape[0], n)] + rng.uniform(0.05, 0.9, n))


def _event_rows(
    spec: BuildSpec, rid: str, state: _RobotState, s: np.ndarray, rng: np.random.Generator
) -> list[tuple[Any, ...]]:
    rows: list[tuple[Any, ...]] = []
    name = rid.rsplit("/", 1)[1]
    for t in _poisson_times(spec.collisions_per_day, s, rng):
        row, relative_peak = _collision(rid, name, float(t), rng)
        rows.append(row)
        state.collisions.append((float(row[3]), relative_peak))
    for t in _poisson_times(spec.payload_faults_per_day, s, rng):
        rows.append(_payload_fault(rid, float(t), rng))
    if state.index == spec.wear_robot and s.shape[0]:
        for (level, threshold), before in zip(WEAR_LEVELS, (None, WEAR_LEVELS[0][0]), strict=True):
            t = (threshold - 1.0) / WEAR_RISE * spec.span_s  # when the indicator crosses the level
            if s[0] <= t < s[-1] + 1:
                summary = (
                    f"actuator {WEAR_AXIS}: friction rose to '{level}' (indicator {threshold:.2f} of its baseline)"
                )
                figures = {
                    "actuator": WEAR_AXIS,
                    "wear_indicator_ratio": threshold,
                    "level_before": before,
                    "level_after": level,
                }
                severity = "high" if level == WEAR_LEVELS[-1][0] else "medium"
                wear = (
                    rid,
                    "wear",
                    START_S + t,
                    START_S + t,
                    severity,
                    summary,
                    figures,
                    None,
                    None,
                    None,
                    _seq(START_S + t),
                )
                rows.append(wear)
    return sorted(rows, key=lambda r: r[2])


def _seq(t_abs: float) -> int:
    return int((t_abs - START_S) * 100) + 1  # 10 ms batches


def _collision(rid: str, name: str, t: float, rng: np.random.Generator) -> tuple[tuple[Any, ...], float]:
    """A collision as the service writes it (shadow.monitoring RobotMonitor._event_row), evidence included;
    and its largest peak as a fraction of the rated effort."""
    start = START_S + t
    duration = float(rng.uniform(0.02, 0.08))
    end = start + duration
    ev = np.arange(start - 1.0, end + 1.0, 1.0 / SAMPLE_RATE_HZ)  # evidence window, 1 kHz samples
    phase = 2 * np.pi * PICK_RATE_HZ * ev[:, None] + np.array([0.0, 2.1, 4.2])
    q = 0.35 + 0.30 * np.sin(phase)  # [rad]
    rel = rng.uniform(0.1, 0.8, N_ACTUATORS)
    bump = np.exp(-(((ev - start - duration / 2) / (duration / 3)) ** 2))[:, None] * rel * RATED_TORQUE_NM
    effort = 8.0 * np.cos(phase) + bump + 0.3 * rng.standard_normal(q.shape)  # [N m]
    grip = np.sin(2 * np.pi * PICK_RATE_HZ * ev) > 0
    blob = encode_binary(
        SampleBatch(
            robot_id=name,
            seq=_seq(end + 1.0),
            position_unit=PositionUnit.RAD,
            effort_kind=MeasuredQuantity.EFFORT,
            t=ev,
            q=q,
            effort=effort,
            gripping=grip,
        )
    )
    worst = int(np.argmax(rel))
    figures = {
        "peak_residual_per_actuator": (rel * RATED_TORQUE_NM).tolist(),
        "relative_peak_per_actuator": rel.tolist(),
        "platform_force_n": rng.normal(0.0, 60.0, 3).tolist(),
        "pose_actuator_positions": q[len(ev) // 2].tolist(),
        "peak_time_s": start + duration / 2,
        "threshold_per_actuator": [7.2, 7.2, 7.2],
    }
    summary = (
        f"external effort on the platform, peak {100 * rel[worst]:.0f} % of rated on actuator {worst + 1}, "
        f"{1000 * duration:.0f} ms"
    )
    severity = "high" if rel[worst] >= 0.5 else "medium"
    row = (rid, "collision", start, end, severity, summary, figures, start - 1.0, end + 1.0, blob, _seq(end + 1.0))
    return row, float(rel[worst])


def _payload_fault(rid: str, t: float, rng: np.random.Generator) -> tuple[Any, ...]:
    """A payload fault as the service writes it (RobotMonitor._judge_transfer)."""
    start = START_S + t
    end = start + float(rng.uniform(0.3, 0.6))
    expected, tolerance = 0.25, 0.02
    fault = str(rng.choice(["missed_pick", "double_pick", "wrong_work_piece"], p=[0.6, 0.25, 0.15]))
    m = {"missed_pick": 0.01, "double_pick": 0.50, "wrong_work_piece": 0.31}[fault] + float(rng.normal(0.0, 0.005))
    words = {
        "missed_pick": "the tool closed but carried nothing",
        "double_pick": "the tool carried about two work pieces",
        "wrong_work_piece": "the carried mass is outside the work piece's tolerance",
    }[fault]
    summary = f"{fault.replace('_', ' ')}: {words} ({m:.3f} kg, expected {expected:.3f} +- {tolerance:.3f} kg)"
    figures = {
        "fault": fault,
        "carried_mass_kg": m,
        "carried_mass_std_kg": 0.004,
        "expected_mass_kg": expected,
        "tolerance_kg": tolerance,
        "samples_count": int((end - start) * SAMPLE_RATE_HZ),
        "observer_alarms_explained_count": 0,
    }
    return (rid, "payload_fault", start, end, "medium", summary, figures, start, end, None, _seq(end))


def _graded(value: float, watch: float, act: float) -> str:
    return "act" if value >= act else "watch" if value >= watch else "steady"


def _health_rows(
    spec: BuildSpec,
    rid: str,
    state: _RobotState,
    s: np.ndarray,
    events: list[tuple[Any, ...]],
    rng: np.random.Generator,
) -> list[tuple[Any, ...]]:
    """Health snapshots as shadow.detection.health words them (watch from 1.15, act from 1.30 wear)."""
    s = _period_outputs(s, spec.health_period_s)
    k, n = s.shape[0], N_ACTUATORS
    t_rel = s.astype(float) + OUTPUT_PERIOD_S - 1.0 / SAMPLE_RATE_HZ
    ratio = np.exp(0.1 * rng.standard_normal((k, n)))  # residual RMS / baseline RMS
    wear = 1.0 + 0.01 * rng.standard_normal((k, n))
    wear[:, WEAR_AXIS - 1] += _wear_ratio(spec, state.index, t_rel) - 1.0
    deviation = 0.01 * rng.standard_normal(k)  # payload deviation fraction
    t_abs = START_S + t_rel
    rows: list[tuple[Any, ...]] = []
    recent = sorted(state.collisions)
    ends = np.array([c[0] for c in recent])
    for j in range(k):  # loop over stored outputs
        states, reasons = [], []
        scope_rows = []
        for i in range(n):  # loop over actuators
            w = float(wear[j, i])
            st = _graded(w, 1.15, 1.30)
            why = []
            if st != "steady":
                limit = 1.30 if st == "act" else 1.15
                why.append(
                    f"actuator {i + 1}: friction is {100 * (w - 1):.0f} % above its baseline after temperature "
                    f"compensation ({st} from {100 * (limit - 1):.0f} %)"
                )
            figures = {"residual_rms_ratio": float(ratio[j, i]), "wear_indicator_ratio": w, "data_age_s": 0.0}
            scope_rows.append((rid, float(t_abs[j]), f"actuator:{i + 1}", st, why, figures))
            states.append(st)
            reasons.extend(why)
        lo, hi = np.searchsorted(ends, [t_abs[j] - 3600.0, t_abs[j]], side="right")
        figures_r: dict[str, float] = {"data_age_s": 0.0, "collisions_count": float(hi - lo)}
        if hi > lo:
            peak = max(recent[c][1] for c in range(lo, hi))
            figures_r["collision_peak_rated_fraction"] = peak
            st = "act" if peak >= 0.5 or hi - lo >= 3 else "watch"
            states.append(st)
            reasons.append(
                f"robot: {hi - lo} collision(s) recently, the largest at {100 * peak:.0f} % of rated effort "
                f"({st}: act from 50 % or 3 collisions)"
            )
        figures_r["payload_deviation_fraction"] = float(deviation[j])
        figures_r["actuators_act_count"] = float(states[:n].count("act"))
        figures_r["actuators_watch_count"] = float(states[:n].count("watch"))
        worst = "act" if "act" in states else "watch" if "watch" in states else "steady"
        rows.append((rid, float(t_abs[j]), "robot", worst, reasons, figures_r))
        rows.extend(scope_rows)
    if len(recent) > 16:
        state.collisions = recent[-16:]
    return rows


def _unmonitored_rows(spec: BuildSpec, rid: str, a: int, b: int, rng: np.random.Generator) -> list[tuple[Any, ...]]:
    rows: list[tuple[Any, ...]] = []
    out0, out1 = spec.outage
    if a <= out0 < b:
        detail = "no service: messages of the outage were not kept by the broker"
        rows.append((rid, START_S + out0, START_S + out1, "service_down", detail))
    s = np.arange(a, b)
    for t in _poisson_times(spec.sequence_gaps_per_day, s, rng):
        gap = float(rng.uniform(0.02, 0.5))
        first, last = _seq(START_S + t) + 1, _seq(START_S + t + gap) - 1
        rows.append((rid, START_S + t, START_S + t + gap, "sequence_gap", f"messages {first}..{last} never arrived"))
    for t in _poisson_times(spec.restarts_per_day, s, rng):
        step = float(rng.uniform(0.051, 0.2))
        rows.append((rid, START_S + t - step, START_S + t, "conditioning_restart", f"gap: step of {step:.3f} s"))
    return sorted(rows, key=lambda r: r[1])


class BulkWriter:
    """executemany of the raw sqlite3 driver into the store's tables, one transaction per chunk."""

    def __init__(self, store: SqlStore) -> None:
        self._conn = store.engine.raw_connection()  # with the store's pragmas (WAL, foreign keys)
        self._sql: dict[str, str] = {}
        self._json: dict[str, list[int]] = {}
        for key, table in TABLES.items():
            cols = insert_columns(table)
            self._sql[key] = f"INSERT INTO {table.name} ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})"
            self._json[key] = [i for i, c in enumerate(cols) if isinstance(table.c[c].type, sa.JSON)]

    def write(self, chunk: Chunk) -> None:
        cursor = self._conn.cursor()
        try:
            for key, rows in chunk.rows.items():
                if not rows:
                    continue
                if self._json[key]:  # the text SQLAlchemy's JSON type writes: json.dumps
                    idx = self._json[key]
                    rows = [tuple(json.dumps(v) if i in idx else v for i, v in enumerate(r)) for r in rows]
                cursor.executemany(self._sql[key], rows)
            self._conn.commit()
        except BaseException:
            self._conn.rollback()
            raise
        finally:
            cursor.close()

    def close(self) -> None:
        self._conn.close()


def step_results(chunk: Chunk) -> StepResults:
    """The chunk as the store's write path takes it (rows as dicts without the robot id)."""
    results = StepResults(chunk.robot_id)
    for key, rows in chunk.rows.items():
        cols = insert_columns(TABLES[key])[1:]
        getattr(results, STEP_LISTS[key]).extend(dict(zip(cols, r[1:], strict=True)) for r in rows)
    return results


class StoreWriter:
    """The store's own write path: one :meth:`SqlStore.write_step` per chunk."""

    def __init__(self, store: SqlStore) -> None:
        self._store = store

    def write(self, chunk: Chunk) -> None:
        self._store.write_step(step_results(chunk))

    def close(self) -> None:
        pass


@dataclass(slots=True)
class BuildReport:
    rows: dict[str, int]
    seconds: float
    file_bytes: int
    reused: bool
    write_path: str

    @property
    def total_rows(self) -> int:
        return sum(self.rows.values())


def _file_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in (path, Path(f"{path}-wal")) if p.exists())


def _recorded_build(path: Path) -> dict[str, Any] | None:
    """The build recorded in a benchmark file; None when the file has no record (not made by this benchmark)."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        found = conn.execute("SELECT name FROM sqlite_master WHERE type='table' AND name=?", (BUILD_TABLE,)).fetchone()
        if found is None:
            return None
        row = conn.execute(f"SELECT spec, complete, rows, build_s FROM {BUILD_TABLE}").fetchone()
    except sqlite3.DatabaseError as exc:
        raise BenchmarkError(f"--database {path}: not a SQLite file ({exc})") from None
    finally:
        conn.close()
    if row is None:
        return {"spec": None, "complete": False}
    return {"spec": json.loads(row[0]), "complete": bool(row[1]), "rows": json.loads(row[2]), "build_s": row[3]}


def build_store(
    path: Path,
    spec: BuildSpec,
    *,
    write_path: str = "bulk",
    progress: Callable[[str], None] | None = None,
) -> BuildReport:
    """Build the store at ``path``, or reuse it when it records the same ``spec`` as complete.

    A file that exists without this benchmark's record is refused (it may be someone's real store).
    """
    spec_json = json.dumps({"format": BUILD_FORMAT, **asdict(spec)}, sort_keys=True)
    if path.exists():
        recorded = _recorded_build(path)
        if recorded is None:
            raise BenchmarkError(f"--database {path}: exists and was not made by this benchmark; give another path")
        if recorded["complete"] and recorded["spec"] == json.loads(spec_json):
            return BuildReport(recorded["rows"], recorded["build_s"], _file_bytes(path), True, "reused")
        for p in (path, Path(f"{path}-wal"), Path(f"{path}-shm")):
            p.unlink(missing_ok=True)
    if write_path not in ("bulk", "store"):
        raise BenchmarkError(f"--write-path: 'bulk' or 'store', got {write_path!r}")
    store = SqlStore(f"sqlite:///{path}")
    try:
        with store.engine.begin() as conn:
            conn.execute(sa.text(f"CREATE TABLE {BUILD_TABLE} (spec TEXT, complete INTEGER, rows TEXT, build_s REAL)"))
            conn.execute(sa.text(f"INSERT INTO {BUILD_TABLE} VALUES (:s, 0, '{{}}', 0)"), {"s": spec_json})
        for rid in spec.robot_ids():
            store.register_robot(rid, family="delta", n_actuators=N_ACTUATORS, description_source="benchmarks.api_load")
        writer: BulkWriter | StoreWriter = BulkWriter(store) if write_path == "bulk" else StoreWriter(store)
        counts = dict.fromkeys(TABLES, 0)
        t0 = time.perf_counter()

        def report(robot_id: str) -> None:
            if progress is not None:
                done = sum(counts.values())
                rate = done / (time.perf_counter() - t0)
                progress(f"  {robot_id} written: {done:,} rows so far, {rate:,.0f} rows/s")

        previous = None
        try:
            for chunk in generate_chunks(spec):
                if previous is not None and chunk.robot_id != previous:
                    report(previous)
                previous = chunk.robot_id
                writer.write(chunk)
                for key, rows in chunk.rows.items():
                    counts[key] += len(rows)
        finally:
            writer.close()
        if previous is not None:
            report(previous)
        seconds = time.perf_counter() - t0
        with store.engine.begin() as conn:
            conn.execute(
                sa.text(f"UPDATE {BUILD_TABLE} SET complete = 1, rows = :r, build_s = :b"),
                {"r": json.dumps(counts), "b": seconds},
            )
        with store.engine.connect() as conn:
            conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
    finally:
        store.close()
    return BuildReport(counts, seconds, _file_bytes(path), False, write_path)


def write_path_rates(spec: BuildSpec) -> dict[str, float]:
    """Rows per second of the three write paths on one robot-hour of this spec's rows (a scratch file)."""
    hour = BuildSpec(**{**asdict(spec), "days": 1 / 24, "robots": 1})
    chunk = next(generate_chunks(hour))
    n = chunk.count()
    rates = {}
    with tempfile.TemporaryDirectory() as tmp:
        for name in ("bulk", "write_step per chunk", "write_step per output"):
            store = SqlStore(f"sqlite:///{Path(tmp) / (name.replace(' ', '_') + '.db')}")
            store.register_robot(chunk.robot_id, family="delta", n_actuators=N_ACTUATORS)
            t0 = time.perf_counter()
            if name == "bulk":
                w = BulkWriter(store)
                w.write(chunk)
                w.close()
            elif name == "write_step per chunk":
                store.write_step(step_results(chunk))
            else:  # the service: one transaction per output period
                for step in _per_output(chunk):
                    store.write_step(step)
            rates[name] = n / (time.perf_counter() - t0)
            store.close()
    return rates


def _per_output(chunk: Chunk) -> Iterator[StepResults]:
    """A chunk cut into one StepResults per output period, as the service writes them."""
    by_second: dict[int, Chunk] = {}
    time_col = {"estimates": 1, "residual_aggregates": 1, "health": 1, "events": 2, "unmonitored": 1}
    for key, rows in chunk.rows.items():
        for r in rows:
            second = int(r[time_col[key]] - START_S)
            by_second.setdefault(second, Chunk(chunk.robot_id, {k: [] for k in chunk.rows})).rows[key].append(r)
    for second in sorted(by_second):
        yield step_results(by_second[second])


# --------------------------------------------------------------------------------------------- the load
def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _pin(core: int) -> None:
    with contextlib.suppress(AttributeError, OSError):
        if len(os.sched_getaffinity(0)) > 1:
            os.sched_setaffinity(0, {core})


def serve(database: str, port: int) -> None:
    """The server process: the real app on uvicorn, rate limit lifted, on 127.0.0.1:port."""
    import uvicorn

    from shadow.api.app import create_app
    from shadow.api.security import GuardSettings

    _pin(SERVER_CORE)
    store = SqlStore(f"sqlite:///{database}", migrate_schema=False)
    app = create_app(store, guard=GuardSettings(rate_per_s=1e9, burst=10**9))
    config = uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning", access_log=False)
    uvicorn.Server(config).run()


@contextlib.contextmanager
def running_server(database: Path) -> Iterator[int]:
    port = _free_port()
    process = mp.get_context("spawn").Process(target=serve, args=(str(database), port), daemon=True)
    process.start()
    try:
        deadline = time.monotonic() + 60.0
        while True:
            try:
                conn = http.client.HTTPConnection("127.0.0.1", port, timeout=5)
                conn.request("GET", "/health/live")
                if conn.getresponse().status == 200:
                    conn.close()
                    break
            except OSError:
                pass
            if not process.is_alive() or time.monotonic() > deadline:
                raise BenchmarkError(f"the API server did not answer on 127.0.0.1:{port}")
            time.sleep(0.2)
        yield port
    finally:
        process.terminate()
        process.join(10)
        if process.is_alive():
            process.kill()
            process.join()


@dataclass(frozen=True, slots=True)
class Endpoint:
    name: str
    urls: tuple[str, ...]  # one per robot (or one), rotated over


@dataclass(slots=True)
class LoadResult:
    name: str
    requests: int
    seconds: float
    latencies_s: np.ndarray
    errors: int
    bytes_per_answer: float

    @property
    def rate(self) -> float:
        return self.requests / self.seconds

    def percentile_ms(self, q: float) -> float:
        return float(np.percentile(self.latencies_s, q)) * 1e3


def _range_query(start_s: float, end_s: float, *, every: bool) -> str:
    q: dict[str, Any] = {"start": iso(start_s), "end": iso(end_s)}
    if every:
        q.update(every=f"{(end_s - start_s) / 300:g}", limit=10000)  # what the dashboard asks for
    return urlencode(q)


def endpoints(spec: BuildSpec, collision_ids: list[int]) -> list[Endpoint]:
    """The requests of the dashboard's pages against the store's newest day, for every robot."""
    end = spec.end_s
    robots = [f"/api/v1/robots/{rid}" for rid in spec.robot_ids()]
    out = [
        Endpoint("robots overview", ("/api/v1/robots",)),
        Endpoint("robot health", tuple(f"{r}/health" for r in robots)),
    ]
    ranges = [("1 h", 3600.0), ("1 d", float(DAY_S)), (f"{spec.days:g} d", float(spec.span_s))]
    for kind in ("estimates", "residuals"):
        for label, length in ranges:
            if length > spec.span_s:
                continue
            query = _range_query(end - length, end, every=True)
            out.append(Endpoint(f"{kind} {label}", tuple(f"{r}/{kind}?{query}" for r in robots)))
    out.append(
        Endpoint(
            "unmonitored 1 d", tuple(f"{r}/unmonitored?{_range_query(end - DAY_S, end, every=False)}" for r in robots)
        )
    )
    out.append(Endpoint("events 24 h", (f"/api/v1/events?{urlencode({'start': iso(end - DAY_S), 'limit': 1000})}",)))
    per_robot = tuple(
        f"/api/v1/events?{urlencode({'robot_id': rid, 'start': iso(end - 7 * DAY_S), 'limit': 1000})}"
        for rid in spec.robot_ids()
    )
    out.append(Endpoint("robot events 7 d", per_robot))
    if collision_ids:
        out.append(Endpoint("event + evidence", tuple(f"/api/v1/events/{i}" for i in collision_ids[-len(robots) :])))
    return out


def load(port: int, endpoint: Endpoint, *, seconds: float, concurrency: int) -> LoadResult:
    """``concurrency`` closed-loop clients on keep-alive connections for ``seconds`` after one warm-up each."""
    latencies: list[list[float]] = [[] for _ in range(concurrency)]
    errors = [0] * concurrency
    sizes = [0] * concurrency
    ready = threading.Barrier(concurrency + 1)
    go = threading.Event()
    deadline = [0.0]

    def client(i: int) -> None:
        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=600)
        urls = endpoint.urls
        j = i

        def one() -> tuple[float, int, int]:
            t0 = time.perf_counter()
            conn.request("GET", urls[j % len(urls)])
            answer = conn.getresponse()
            body = answer.read()
            return time.perf_counter() - t0, answer.status, len(body)

        one()  # warm-up
        j += 1
        ready.wait()
        go.wait()
        while time.perf_counter() < deadline[0]:
            dt, status, size = one()
            j += 1
            latencies[i].append(dt)
            sizes[i] += size
            if status != 200:
                errors[i] += 1
        conn.close()

    threads = [threading.Thread(target=client, args=(i,), daemon=True) for i in range(concurrency)]
    for th in threads:
        th.start()
    ready.wait()
    t0 = time.perf_counter()
    deadline[0] = t0 + seconds
    go.set()
    for th in threads:
        th.join()
    wall = time.perf_counter() - t0
    lat = np.array([x for per in latencies for x in per])
    n = int(lat.shape[0])
    return LoadResult(endpoint.name, n, wall, lat, sum(errors), sum(sizes) / max(n, 1))


def collision_event_ids(database: Path, limit: int) -> list[int]:
    conn = sqlite3.connect(f"file:{database}?mode=ro", uri=True)
    try:
        rows = conn.execute(
            "SELECT event_id FROM events WHERE kind = 'collision' ORDER BY start_s DESC LIMIT ?", (limit,)
        ).fetchall()
    finally:
        conn.close()
    return [int(r[0]) for r in rows]


# --------------------------------------------------------------------------------------------- main
def _revision(database: Path) -> str | None:
    engine = sa.create_engine(f"sqlite:///{database}")
    try:
        return current_revision(engine)
    finally:
        engine.dispose()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.api_load", description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=float, default=30.0, help="simulated days (default 30)")
    parser.add_argument("--robots", type=int, default=10, help="delta pickers of the cell (default 10)")
    parser.add_argument("--database", type=Path, help="SQLite file to build or reuse (default in the temp folder)")
    parser.add_argument("--seconds", type=float, default=5.0, help="load per endpoint [s] (default 5)")
    parser.add_argument("--concurrency", type=int, default=8, help="concurrent clients (default 8)")
    parser.add_argument("--estimate-period", type=int, default=10, help="stored estimate period [s] (service: 1)")
    parser.add_argument("--health-period", type=int, default=10, help="stored health period [s] (service: 1)")
    parser.add_argument("--write-path", choices=("bulk", "store"), default="bulk", help="how the store is built")
    args = parser.parse_args(argv)
    if args.seconds <= 0 or args.concurrency < 1:
        parser.error("--seconds must be > 0 and --concurrency >= 1")
    try:
        spec = BuildSpec(
            days=args.days,
            robots=args.robots,
            estimate_period_s=args.estimate_period,
            health_period_s=args.health_period,
        )
    except BenchmarkError as exc:
        parser.error(str(exc))
    database: Path = args.database or Path(tempfile.gettempdir()) / (
        f"shadow-api-load-{spec.days:g}d-{spec.robots}r-e{spec.estimate_period_s}-h{spec.health_period_s}.db"
    )
    print(f"store {database}: {spec.days:g} days of {spec.robots} delta pickers of {SITE}/{CELL}")
    print(f"  estimates every {spec.estimate_period_s} s, health every {spec.health_period_s} s, residuals every 1 s")
    try:
        if not (database.exists() and (_recorded_build(database) or {}).get("complete")):
            rates = write_path_rates(spec)
            print("  write paths on one robot-hour (rows/s): " + ", ".join(f"{k} {v:,.0f}" for k, v in rates.items()))
        report = build_store(database, spec, write_path=args.write_path, progress=print)
    except BenchmarkError as exc:
        print(f"error: {exc}")
        return 2
    word = "reused (built earlier" if report.reused else f"built ({report.write_path} path"
    print(
        f"  {word}: {report.total_rows:,} rows in {report.seconds:,.0f} s, {report.total_rows / report.seconds:,.0f} "
        f"rows/s); file {report.file_bytes / 1e9:.2f} GB"
    )
    print("  rows: " + ", ".join(f"{k} {v:,}" for k, v in report.rows.items()))
    before = _revision(database)
    t0 = time.perf_counter()
    SqlStore(f"sqlite:///{database}").close()  # brings the schema to this version's head
    after = _revision(database)
    if before != after:
        size = _file_bytes(database)
        print(f"  schema {before} -> {after} in {time.perf_counter() - t0:.1f} s; file now {size / 1e9:.2f} GB")
    _pin(CLIENT_CORE)
    cpu = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    print(
        f"load: {args.concurrency} closed-loop clients for {args.seconds:g} s per endpoint; server pinned to core "
        f"{SERVER_CORE}, clients to core {CLIENT_CORE} ({os.cpu_count()} cores, {cpu} for the clients)"
    )
    results: list[LoadResult] = []
    live = Endpoint("liveness (baseline)", ("/health/live",))
    with running_server(database) as port:
        work = endpoints(spec, collision_event_ids(database, spec.robots))
        for endpoint in [live, *work, live]:
            results.append(load(port, endpoint, seconds=args.seconds, concurrency=args.concurrency))
    base_rate = (results[0].rate + results[-1].rate) / 2
    base_p50 = (results[0].percentile_ms(50) + results[-1].percentile_ms(50)) / 2
    print(
        f"\n{'endpoint':22} {'req/s':>8} {'p50 ms':>9} {'p99 ms':>9} {'n':>6} {'KB/ans':>8} "
        f"{'rate/live':>9} {'p50/live':>9} {'errors':>6}"
    )
    for r in results:
        print(
            f"{r.name:22} {r.rate:8.1f} {r.percentile_ms(50):9.2f} {r.percentile_ms(99):9.2f} {r.requests:6d} "
            f"{r.bytes_per_answer / 1e3:8.1f} {r.rate / base_rate:9.3f} {r.percentile_ms(50) / base_p50:9.1f} "
            f"{r.errors:6d}"
        )
    print(
        f"\nbaseline: liveness {results[0].rate:.0f} req/s before the others, {results[-1].rate:.0f} after; ratios use "
        "their mean. Only ratios compare across runs on a shared machine."
    )
    return 1 if any(r.errors for r in results) else 0


if __name__ == "__main__":
    raise SystemExit(main())
