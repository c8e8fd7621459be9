"""The read-only health API (FastAPI). Routes read the store, convert, return; nothing else.

Routes (all GET; HEAD answers the same without a body; every other method gets 405 read_only):

    /api/v1/robots                                         robots with their current health
    /api/v1/robots/{site}/{cell}/{robot}/health            robot and per-actuator health with reasons and figures
    /api/v1/robots/{site}/{cell}/{robot}/estimates         estimate series (ISO 8601 range, downsampling, pages)
    /api/v1/robots/{site}/{cell}/{robot}/residuals         per-second residual RMS and peak per actuator
    /api/v1/robots/{site}/{cell}/{robot}/unmonitored       intervals without monitoring, with their cause
    /api/v1/events                                         events filtered by robot, kind and time
    /api/v1/events/{event_id}                              one event with its evidence window
    /api/v1/status                                         service status: sessions, lag, queues, dead letters, pool
    /metrics                                               Prometheus text format
    /health/live                                           liveness probe (no token needed)

With bearer tokens configured, every route above but the liveness probe needs ``Authorization: Bearer``;
the dashboard's page shells and static files (shadow.api.pages) do not, and its script signs in
(shadow.api.security explains how and why).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from datetime import UTC, datetime
from typing import Annotated, Any

from fastapi import APIRouter, Depends, FastAPI, Query, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, PlainTextResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from shadow import __version__
from shadow.api import schemas as out
from shadow.api.metrics import metrics_renderer
from shadow.api.pages import pages_router
from shadow.api.security import GuardSettings, ReadOnlyGuard
from shadow.errors import RejectedMessageError, ShadowError
from shadow.ingest.topics import RobotAddress
from shadow.ingest.wire import decode_message
from shadow.store.repository import SqlStore

MAX_PAGE = 10_000
DEFAULT_RANGE_S = 3600.0
StatusProvider = Callable[[], dict[str, Any]]


class ApiError(ShadowError):
    """An error answered as ``{"error": code, "detail": ...}`` with its HTTP status."""

    def __init__(self, status: int, code: str, detail: str) -> None:
        super().__init__(detail)
        self.status = status
        self.code = code
        self.detail = detail


def parse_time(name: str, text: str | None, default_s: float) -> float:
    """ISO 8601 (``2026-12-02T03:00:00Z``, offsets allowed; no offset means UTC) to Unix seconds."""
    if text is None:
        return default_s
    try:
        dt = datetime.fromisoformat(text)
    except ValueError:
        raise ApiError(400, "bad_time", f"{name}: {text[:40]!r} is not an ISO 8601 date-time") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt.timestamp()


def time_range(start: str | None, end: str | None) -> tuple[float, float]:
    now = time.time()
    end_s = parse_time("end", end, now)
    start_s = parse_time("start", start, end_s - DEFAULT_RANGE_S)
    if not start_s < end_s:
        raise ApiError(400, "bad_time_range", "start must be before end")
    return start_s, end_s


def get_store(request: Request) -> SqlStore:
    return request.app.state.store  # type: ignore[no-any-return]


StoreDep = Annotated[SqlStore, Depends(get_store)]


def robot_id_of(site: str, cell: str, robot: str, store: SqlStore) -> str:
    try:
        rid = str(RobotAddress(site, cell, robot))
    except RejectedMessageError as exc:
        raise ApiError(400, "bad_robot", exc.reason) from None
    if not any(r["robot_id"] == rid for r in store.robots()):
        raise ApiError(404, "not_found", f"no robot {rid}")
    return rid


def page(rows: list[Any], limit: int, offset: int) -> tuple[list[Any], out.PageOut]:
    """The page of ``rows`` read from ``offset`` on, at most ``limit + 1`` (one more tells another page follows)."""
    chunk = rows[:limit]
    more = len(rows) > limit
    return chunk, out.PageOut(
        limit=limit, offset=offset, returned=len(chunk), next_offset=offset + limit if more else None
    )


def health_out(row: dict[str, Any]) -> out.HealthOut:
    return out.HealthOut(
        scope=row["scope"],
        state=row["state"],
        time=out.iso(row["time_s"]),
        reasons=row["reasons"],
        figures=row["figures"],
    )


def event_out(row: dict[str, Any]) -> out.EventOut:
    return out.EventOut(
        event_id=row["event_id"],
        robot_id=row["robot_id"],
        kind=row["kind"],
        start=out.iso(row["start_s"]) or "",
        end=out.iso(row["end_s"]) or "",
        severity=row["severity"],
        summary=row["summary"],
        figures=row["figures"],
        evidence_start=out.iso(row["evidence_start_s"]),
        evidence_end=out.iso(row["evidence_end_s"]),
    )


ERROR_RESPONSES: dict[int | str, dict[str, Any]] = {
    code: {"model": out.ErrorOut, "description": text}
    for code, text in (
        (400, "bad parameter (time, robot id)"),
        (401, "bearer token missing or wrong"),
        (404, "no such robot or event"),
        (405, "read-only: only GET and HEAD"),
        (422, "parameter of the wrong type or out of range"),
        (429, "rate limit"),
    )
}
router = APIRouter(prefix="/api/v1", responses=ERROR_RESPONSES)
Limit = Annotated[int, Query(ge=1, le=MAX_PAGE, description="rows per page")]
Offset = Annotated[int, Query(ge=0, le=100 * MAX_PAGE, description="rows to skip")]
Every = Annotated[
    float | None,
    Query(gt=0, description="downsampling step [s]: the last point of each step k*every <= t < (k+1)*every is kept"),
]
Start = Annotated[str | None, Query(description="ISO 8601 start (default: end minus one hour)")]
End = Annotated[str | None, Query(description="ISO 8601 end (default: now)")]


@router.get("/robots", summary="Robots and their current health")
def list_robots(store: StoreDep) -> out.RobotListOut:
    robots = []
    for r, health in store.robots_with_health():
        robots.append(
            out.RobotOut(
                robot_id=r["robot_id"],
                site=r["site"],
                cell=r["cell"],
                name=r["name"],
                family=r["family"],
                n_actuators=r["n_actuators"],
                health=None if health is None else health_out(health),
            )
        )
    return out.RobotListOut(robots=robots)


@router.get("/robots/{site}/{cell}/{robot}/health", summary="Health of a robot and of each actuator")
def robot_health(site: str, cell: str, robot: str, store: StoreDep) -> out.RobotHealthOut:
    rid = robot_id_of(site, cell, robot, store)
    rows = store.latest_health(rid)
    robot_row = next((health_out(h) for h in rows if h["scope"] == "robot"), None)
    actuators = sorted(
        (health_out(h) for h in rows if h["scope"].startswith("actuator:")), key=lambda h: int(h.scope.split(":")[1])
    )
    return out.RobotHealthOut(robot_id=rid, robot=robot_row, actuators=actuators)


@router.get("/robots/{site}/{cell}/{robot}/estimates", summary="Payload and friction estimates over time")
def estimate_series(
    site: str,
    cell: str,
    robot: str,
    store: StoreDep,
    start: Start = None,
    end: End = None,
    parameter: Annotated[list[str] | None, Query(description="parameter names; repeat for several")] = None,
    every: Every = None,
    limit: Limit = 1000,
    offset: Offset = 0,
) -> out.EstimateSeriesOut:
    rid = robot_id_of(site, cell, robot, store)
    start_s, end_s = time_range(start, end)
    rows = store.estimates(
        rid, start_s=start_s, end_s=end_s, parameters=parameter, every_s=every, limit=limit + 1, offset=offset
    )
    chunk, p = page(rows, limit, offset)
    points = [
        out.EstimatePointOut(
            time=out.iso(r["time_s"]) or "",
            parameter=r["parameter"],
            value=r["value"],
            std=r["std"],
            identifiable=r["identifiable"],
        )
        for r in chunk
    ]
    return out.EstimateSeriesOut(
        robot_id=rid, start=out.iso(start_s) or "", end=out.iso(end_s) or "", every_s=every, page=p, points=points
    )


@router.get("/robots/{site}/{cell}/{robot}/residuals", summary="Residual RMS and peak per actuator")
def residual_series(
    site: str,
    cell: str,
    robot: str,
    store: StoreDep,
    start: Start = None,
    end: End = None,
    every: Every = None,
    limit: Limit = 1000,
    offset: Offset = 0,
) -> out.ResidualSeriesOut:
    rid = robot_id_of(site, cell, robot, store)
    start_s, end_s = time_range(start, end)
    rows = store.residual_aggregates(rid, start_s=start_s, end_s=end_s, every_s=every, limit=limit + 1, offset=offset)
    chunk, p = page(rows, limit, offset)
    points = [
        out.ResidualPointOut(
            time=out.iso(r["time_s"]) or "",
            actuator=r["actuator"],
            window_s=r["window_s"],
            n_samples=r["n_samples"],
            rms=r["rms"],
            peak=r["peak"],
            nis=r["nis"],
        )
        for r in chunk
    ]
    return out.ResidualSeriesOut(
        robot_id=rid, start=out.iso(start_s) or "", end=out.iso(end_s) or "", every_s=every, page=p, points=points
    )


@router.get("/robots/{site}/{cell}/{robot}/unmonitored", summary="Intervals when the robot was not monitored")
def unmonitored(
    site: str, cell: str, robot: str, store: StoreDep, start: Start = None, end: End = None
) -> out.IntervalListOut:
    rid = robot_id_of(site, cell, robot, store)
    start_s, end_s = time_range(start, end)
    rows = store.unmonitored_intervals(rid, start_s=start_s, end_s=end_s)
    intervals = [
        out.IntervalOut(
            start=out.iso(r["start_s"]) or "", end=out.iso(r["end_s"]) or "", cause=r["cause"], detail=r["detail"]
        )
        for r in rows
    ]
    return out.IntervalListOut(robot_id=rid, intervals=intervals)


@router.get("/events", summary="Events, newest last")
def list_events(
    store: StoreDep,
    robot_id: Annotated[str | None, Query(description="'site/cell/robot'")] = None,
    kind: Annotated[str | None, Query(description="collision, payload_fault, wear, drift, ...")] = None,
    start: Start = None,
    end: End = None,
    limit: Limit = 100,
    offset: Offset = 0,
) -> out.EventListOut:
    start_s = parse_time("start", start, 0.0)
    end_s = parse_time("end", end, time.time() + 86400.0)
    rows = store.events(robot_id=robot_id, kind=kind, start_s=start_s, end_s=end_s, limit=offset + limit + 1)
    chunk, p = page(rows[offset:], limit, offset)
    return out.EventListOut(page=p, events=[event_out(r) for r in chunk])


@router.get("/events/{event_id}", summary="One event with the raw samples around it")
def event_detail(event_id: int, store: StoreDep) -> out.EventDetailOut:
    row = store.event(event_id)
    if row is None:
        raise ApiError(404, "not_found", f"no event {event_id}")
    evidence = None
    if row["evidence"]:
        try:
            b = decode_message(row["evidence"])
        except RejectedMessageError as exc:
            raise ApiError(500, "bad_evidence", f"stored evidence of event {event_id} is unreadable: {exc}") from None
        evidence = out.EvidenceOut(
            time=[out.iso(float(t)) or "" for t in b.t],
            position=b.q.tolist(),
            measured=b.measured.tolist(),
            measured_kind=b.effort_kind.value,
            gripping=None if b.gripping is None else b.gripping.tolist(),
        )
    return out.EventDetailOut(**event_out(row).model_dump(), evidence=evidence)


@router.get("/status", summary="Service status")
def service_status(request: Request, store: StoreDep) -> out.StatusOut:
    provider: StatusProvider | None = request.app.state.status_provider
    status = provider() if provider is not None else {}
    now = time.time()
    robots = [
        out.RobotCountersOut(
            robot_id=rid,
            messages_processed=c.get("messages_processed", 0),
            samples_processed=c.get("samples_processed", 0),
            dead_letters=c.get("dead_letters", 0),
            duplicates_dropped=c.get("duplicates_dropped", 0),
            gaps=c.get("gaps", 0),
            store_failures=c.get("store_failures", 0),
            lag_s=None if c.get("last_sample_time_s") is None else now - c["last_sample_time_s"],
            unwritten_steps=c.get("unwritten_steps", 0),
        )
        for rid, c in sorted(status.get("robots", {}).items())
    ]
    return out.StatusOut(
        version=__version__,
        started=out.iso(status.get("started_at_s")),
        broker_connected=status.get("broker_connected", {}),
        inbox_depth=status.get("inbox_depth", {}),
        dead_letters_by_reason=store.dead_letter_counts(),
        robots=robots,
        pool=None if status.get("pool") is None else out.PoolStatusOut(**status["pool"]),
    )


def create_app(
    store: SqlStore,
    *,
    status_provider: StatusProvider | None = None,
    guard: GuardSettings | None = None,
    metrics: Callable[[], bytes] | None = None,
) -> Any:
    """The ASGI application: FastAPI wrapped in the read-only guard."""
    app = FastAPI(
        title="shadow health API",
        version=__version__,
        description="Read-only health indicators of parallel robots. " + out.ADVISORY_NOTICE,
    )
    guard = guard or GuardSettings()
    app.state.store = store
    app.state.status_provider = status_provider
    app.state.tokens_required = bool(guard.token_digests)  # the page shells then read nothing (shadow.api.pages)
    app.include_router(router)
    app.include_router(pages_router)

    @app.exception_handler(ApiError)
    async def _api_error(request: Request, exc: ApiError) -> JSONResponse:
        return JSONResponse({"error": exc.code, "detail": exc.detail}, status_code=exc.status)

    @app.exception_handler(StarletteHTTPException)
    async def _http_error(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        code = {404: "not_found", 405: "read_only"}.get(exc.status_code, "http_error")
        return JSONResponse({"error": code, "detail": str(exc.detail)}, status_code=exc.status_code)

    @app.exception_handler(RequestValidationError)
    async def _validation_error(request: Request, exc: RequestValidationError) -> JSONResponse:
        first = exc.errors()[0] if exc.errors() else {"loc": (), "msg": "invalid request"}
        where = ".".join(str(p) for p in first.get("loc", ()))
        return JSONResponse({"error": "bad_request", "detail": f"{where}: {first.get('msg')}"}, status_code=422)

    @app.get("/health/live", include_in_schema=False)
    def live() -> dict[str, str]:
        return {"state": "running"}

    render = metrics if metrics is not None else metrics_renderer(store, status_provider)

    @app.get(
        "/metrics",
        response_class=PlainTextResponse,
        summary="Prometheus text format",
        responses={
            k: {
                "description": v["description"],
                "content": {"application/json": {"schema": out.ErrorOut.model_json_schema()}},
            }
            for k, v in ERROR_RESPONSES.items()
            if k in (401, 405, 429)
        },
    )
    def prometheus() -> PlainTextResponse:
        body = render()
        return PlainTextResponse(body.decode(), media_type="text/plain; version=0.0.4; charset=utf-8")

    return ReadOnlyGuard(app, guard)


def openapi_document(app: Any) -> dict[str, Any]:
    """The OpenAPI document of an application made by :func:`create_app`."""
    inner: FastAPI = app.app
    return inner.openapi()
