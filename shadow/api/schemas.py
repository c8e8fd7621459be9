"""Response bodies of the health API. Separate from the store's rows; times are ISO 8601 in UTC."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from pydantic import BaseModel, Field

ADVISORY_NOTICE = (
    "Advisory only: shadow never sends anything to a robot controller. Keep the certified safety functions "
    "(ISO 10218-1/-2, ISO 13849) in place; local codes and qualified people decide."
)


def iso(t_s: float | None) -> str | None:
    """Unix seconds to ISO 8601 UTC with milliseconds, e.g. ``2026-12-02T03:04:05.678Z``."""
    if t_s is None:
        return None
    return datetime.fromtimestamp(t_s, tz=UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


class ErrorOut(BaseModel):
    """Every error has this shape, whatever the status code."""

    error: str = Field(description="machine-readable code, e.g. not_found, bad_time_range, read_only")
    detail: str = Field(description="what was wrong, in words")


class HealthOut(BaseModel):
    scope: str = Field(description="'robot' or 'actuator:<number>' (1-based, as in parameter names)")
    state: str = Field(description="health state name")
    time: str | None = Field(description="when it was assessed, ISO 8601 UTC")
    reasons: list[str] = Field(description="why, in words")
    figures: dict[str, Any] = Field(description="the numbers behind it; units in the keys")


class RobotOut(BaseModel):
    robot_id: str = Field(description="'site/cell/robot'")
    site: str
    cell: str
    name: str
    family: str = Field(description="'delta' or 'hexapod'")
    n_actuators: int
    health: HealthOut | None = Field(description="robot-level health, None before the first assessment")


class RobotListOut(BaseModel):
    notice: str = ADVISORY_NOTICE
    robots: list[RobotOut]


class RobotHealthOut(BaseModel):
    notice: str = ADVISORY_NOTICE
    robot_id: str
    robot: HealthOut | None
    actuators: list[HealthOut]


class EstimatePointOut(BaseModel):
    time: str
    parameter: str = Field(description="parameter name with its actuator, e.g. 'coulomb_2' or 'work_piece_mass'")
    value: float
    std: float = Field(description="one standard deviation, same unit as value")
    identifiable: bool = Field(description="False: the motion did not excite it; the value is not a measurement")


class PageOut(BaseModel):
    limit: int
    offset: int
    returned: int
    next_offset: int | None = Field(description="offset of the next page, None on the last page")


class EstimateSeriesOut(BaseModel):
    robot_id: str
    start: str
    end: str
    every_s: float | None = Field(description="downsampling step: the last point of each step is kept")
    page: PageOut
    points: list[EstimatePointOut]


class ResidualPointOut(BaseModel):
    time: str
    actuator: int = Field(description="actuator number, 1-based")
    window_s: float
    n_samples: int
    rms: float = Field(description="residual RMS over the window [N m or N]")
    peak: float = Field(description="largest |residual| in the window [N m or N]")
    nis: float | None = Field(description="normalised innovation squared of the window")


class ResidualSeriesOut(BaseModel):
    robot_id: str
    start: str
    end: str
    every_s: float | None
    page: PageOut
    points: list[ResidualPointOut]


class EventOut(BaseModel):
    event_id: int
    robot_id: str
    kind: str
    start: str
    end: str
    severity: str
    summary: str
    figures: dict[str, Any]
    evidence_start: str | None
    evidence_end: str | None


class EventListOut(BaseModel):
    notice: str = ADVISORY_NOTICE
    page: PageOut
    events: list[EventOut]


class EvidenceOut(BaseModel):
    """Raw samples around an event, as the controller sent them (SI units)."""

    time: list[str]
    position: list[list[float]]
    measured: list[list[float]] = Field(description="efforts [N m or N] or motor currents [A], see measured_kind")
    measured_kind: str
    gripping: list[bool] | None


class EventDetailOut(EventOut):
    notice: str = ADVISORY_NOTICE
    evidence: EvidenceOut | None


class IntervalOut(BaseModel):
    start: str
    end: str
    cause: str
    detail: str


class IntervalListOut(BaseModel):
    robot_id: str
    intervals: list[IntervalOut]


class RobotCountersOut(BaseModel):
    robot_id: str
    messages_processed: int
    samples_processed: int
    dead_letters: int
    duplicates_dropped: int
    gaps: int
    store_failures: int
    lag_s: float | None = Field(description="now minus the newest sample processed")
    unwritten_steps: int


class PoolStatusOut(BaseModel):
    """This worker's part in a worker pool; counts since the worker started."""

    worker_id: str
    in_pool: bool = Field(description="False while the worker has left the pool because the broker is out of reach")
    broker_reachable: bool = Field(description="the worker's own connection to the broker is up")
    live_workers: int = Field(description="live workers at the last heartbeat, this one included")
    robots_held: int = Field(description="robots whose lease this worker holds (they are in robots)")
    lease_renewals: int = Field(description="leases extended, one per robot per heartbeat")
    robots_claimed: int = Field(description="hand-overs to this worker")
    robots_released: int = Field(description="hand-overs from this worker: rebalancing, shutdown, broker out of reach")
    leases_lost: int = Field(description="leases found taken over by another worker, or refused by the fence")
    robots_unreadable: int = Field(description="robots given up because their own session could not connect")
    broker_cutoffs: int = Field(description="times the worker left the pool because the broker was out of reach")
    database_failures: int = Field(description="heartbeats that could not reach the database")
    fenced_writes_refused: int = Field(description="writes refused because the robot's lease had moved on")


class StatusOut(BaseModel):
    notice: str = ADVISORY_NOTICE
    version: str
    started: str | None
    broker_connected: dict[str, bool] = Field(description="per robot session")
    inbox_depth: dict[str, int]
    dead_letters_by_reason: dict[str, int]
    robots: list[RobotCountersOut]
    pool: PoolStatusOut | None = Field(default=None, description="None unless the service is a pool worker")
