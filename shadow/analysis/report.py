"""The analysis report: one self-contained HTML page (plots as embedded PNG, no outside resource).

Sections, top to bottom: the caution; the run and its health; the validation view (measured against
computed efforts for a stretch of the run, with the usual error measures); payload and friction trends
with +-2 std bands; every event with its evidence and the estimated contact force and pose; what was not
monitored and which lines were skipped.

The page is built from the bounded digest of the run (:mod:`shadow.analysis.digest`): trends from min-max
envelopes, the validation from one of a few raw stretches kept spread over the run, so its size and the memory
it needs do not grow with the recording's length.

Validation (symbols as in :mod:`shadow.robots.mechanism`): over a stretch of the run the positions are
differentiated with the centred Savitzky-Golay conditioner (:class:`shadow.estimation.conditioning.Conditioner`)
and the efforts computed with the final estimates theta = (theta_p, theta_f):

    tau_c = ID(q, qd, qdd; theta_p) + tau_f(qd; theta_f)          rigid model plus friction
    (delta: theta_p = m_tool + m_work gripping, per sample; ID is affine in theta_p)

with each actuator's motion taken at the instant its reported effort belongs to, as the tracker does
(:class:`shadow.estimation.conditioning.EffortMotion`). Per actuator, with e = tau_m - tau_c over
the K samples of the stretch:

    RMS error     = sqrt(mean(e^2))                               [N m | N]
    NRMS error    = 100 RMS / (max tau_m - min tau_m)             [% of the measured range]
    r             = cov(tau_m, tau_c) / (std tau_m std tau_c)     Pearson's correlation coefficient

(the fit measures of model validation, e.g. Ljung, "System Identification", 2nd ed., sec. 16.6; from memory;
normalising by the range is common practice, no source).

Plot look as on the dashboard (shadow/api/static/dashboard.js): one colour and dash pattern per actuator;
grey spans: not monitored; red dashed: events.
"""

from __future__ import annotations

import base64
import html
import io
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shadow.analysis import DEFAULT_STRETCH_S, Analysis, FinalEstimate, estimate_series
from shadow.api.schemas import ADVISORY_NOTICE
from shadow.errors import ConfigurationError, ShadowError
from shadow.estimation.conditioning import Conditioner, regressor_at_efforts
from shadow.ingest.wire import SampleBatch, decode_binary
from shadow.monitoring import RobotMonitor
from shadow.robots.drives import effort_from_current
from shadow.robots.friction import friction_effort

__all__ = [
    "COLOURS",
    "DEFAULT_STRETCH_S",
    "DASHES",
    "Validation",
    "build_report",
    "html_to_pdf",
    "validation_measures",
    "validation_stretch",
]

Array = NDArray[np.float64]

# the dashboard's series look (dashboard.js COLOURS / DASHES), in matplotlib's terms
COLOURS = ("#124e8c", "#c2410c", "#0f766e", "#7c3aed", "#8a5a00", "#be185d", "#334155", "#15803d")
DASHES: tuple[tuple[float, ...], ...] = ((), (7, 3), (2, 3), (9, 3, 2, 3), (1, 2), (12, 4, 4, 4), (5, 5), (3, 6))
EVENT_RED = "#b91c1c"
GREY_SPAN = (0.55, 0.55, 0.55, 0.18)
DPI = 96
ZOOM_BEFORE_MS = 60.0  # close-up of an event's evidence: this long before its start
ZOOM_AFTER_MS = 120.0  # and this long after its end


def look(i: int) -> dict[str, Any]:
    """matplotlib keyword arguments for series i (colour, dash pattern)."""
    dash = DASHES[i % len(DASHES)]
    return {"color": COLOURS[i % len(COLOURS)], "linestyle": "-" if not dash else (0, dash)}


# ---------------------------------------------------------------------------------------------- validation


@dataclass(frozen=True, slots=True)
class Validation:
    """Measured and computed efforts over one stretch, and the error measures per actuator."""

    t: Array  # (K,) [s]
    measured: Array  # (K, n) [N m | N]
    computed: Array  # (K, n) [N m | N]
    rms: Array  # (n,) [N m | N]
    nrms_percent: Array  # (n,) [% of the measured range]
    correlation: Array  # (n,) Pearson's r


def validation_measures(measured: Array, computed: Array) -> tuple[Array, Array, Array]:
    """(RMS error (n,), NRMS error in % of the measured range (n,), Pearson's r (n,)) over axis 0 of (K, n)."""
    e = measured - computed
    rms = np.sqrt(np.mean(e**2, axis=0))  # RMS = sqrt(mean e^2)
    span = np.ptp(measured, axis=0)
    nrms = np.where(span > 0, 100.0 * rms / np.where(span > 0, span, 1.0), np.nan)  # 100 RMS / range
    dm = measured - measured.mean(axis=0)
    dc = computed - computed.mean(axis=0)
    denom = np.sqrt(np.sum(dm**2, axis=0) * np.sum(dc**2, axis=0))
    r = np.where(denom > 0, np.sum(dm * dc, axis=0) / np.where(denom > 0, denom, 1.0), np.nan)  # Pearson's r
    return rms, nrms, r


def _raw_arrays(monitor: RobotMonitor, batches: list[SampleBatch]) -> tuple[Array, Array, Array, Array]:
    """(t, q, effort, gripping) of consecutive batches; currents converted with the nominal drive gains."""
    drives = monitor.description.parameters.drives
    t = np.concatenate([b.t for b in batches])
    q = np.concatenate([b.q for b in batches])
    effort = np.concatenate(
        [b.effort if b.effort is not None else effort_from_current(b.measured, drives) for b in batches]
    )
    grip = np.concatenate(
        [b.gripping.astype(float) if b.gripping is not None else np.zeros(b.n_samples) for b in batches]
    )
    return t, q, effort, grip


def _clear_of_events(start_s: float, end_s: float, events: list[dict[str, Any]], margin_s: float = 0.1) -> bool:
    return all(e["end_s"] + margin_s < start_s or e["start_s"] - margin_s > end_s for e in events)


def validation_stretch(
    monitor: RobotMonitor, analysis: Analysis, finals: list[FinalEstimate], *, stretch_s: float = DEFAULT_STRETCH_S
) -> Validation | None:
    """Measured vs computed efforts over up to ``stretch_s`` of one of the kept validation windows.

    The analysis keeps a bounded set of windows spread over the run (:class:`shadow.analysis.digest.WindowSet`,
    each ``analysis.results.stretch_s`` long); of each, the longest part without a gap counts. The stretch is
    taken from the part clear of every event, as long as the stretch, and nearest the middle of the run, in
    that order of preference. ``stretch_s`` longer than the kept windows is cut to their length.
    """
    tracker = monitor.settings.tracker
    rec = analysis.recording
    mid_s = 0.5 * (rec.start_s + rec.end_s)
    length_s = min(stretch_s, analysis.results.stretch_s)
    best: tuple[tuple[bool, bool, float], int, int, tuple[Array, Array, Array, Array]] | None = None
    for window in analysis.results.windows.all():
        arrays = _raw_arrays(monitor, window.batches)
        t = arrays[0]
        breaks = np.flatnonzero(np.diff(t) > tracker.max_gap_s) + 1
        bounds = np.concatenate([[0], breaks, [t.shape[0]]])
        k = int(np.argmax(np.diff(bounds)))
        a, b = int(bounds[k]), int(bounds[k + 1])
        if b - a < 2 * tracker.half_window + 2:
            continue
        b = min(b, a + int(np.searchsorted(t[a:b], t[a] + length_s)))
        key = (
            not _clear_of_events(float(t[a]), float(t[b - 1]), analysis.events),
            float(t[b - 1] - t[a]) < 0.99 * length_s - 2 * tracker.max_gap_s,
            abs(0.5 * (t[a] + t[b - 1]) - mid_s),
        )
        if best is None or key < best[0]:
            best = (key, a, b, arrays)
    if best is None:
        return None
    _, lo, hi, (t, q, effort, grip) = best
    n = monitor.n
    cond = Conditioner(
        n,
        {"effort": n, "gripping": 1},
        half_window=tracker.half_window,
        poly_order=tracker.poly_order,
        max_gap_s=tracker.max_gap_s,
        effort_delay_s=monitor.tracker.effort_delay_s,  # each effort against the motion at its own instant
    )
    cb = cond.feed(t[lo:hi], q[lo:hi], {"effort": effort[lo:hi], "gripping": grip[lo:hi, None]})
    if cb.n_samples < 2:
        return None
    by_name = {f.parameter: f.value for f in finals}  # the filter's state; per-transfer masses are not part of it
    x = np.array([by_name[name] for name in monitor.tracker.parameter_names])
    p = monitor.tracker.n_payload
    tau_known, y_p, qd = regressor_at_efforts(monitor.model, cb.effort_motion)  # tau = tau_known + Y_p theta_p
    theta = monitor.tracker.payload_per_sample(x, cb.channels["gripping"][:, 0])  # tool + work piece while gripping
    tau = tau_known + np.einsum("kap,kp->ka", y_p, theta)
    tau = tau + friction_effort(
        qd, x[p:], smooth_velocity=tracker.smooth_velocity, stribeck_velocity=tracker.stribeck_velocity
    )  # tau_c = ID + tau_f
    measured = cb.channels["effort"]
    rms, nrms, r = validation_measures(measured, tau)
    return Validation(cb.t, measured, tau, rms, nrms, r)


# ---------------------------------------------------------------------------------------------- plots


def _figure(rows: int, *, height_per_row: float = 2.1, width: float = 10.0, sharex: bool = True) -> tuple[Any, Any]:
    from matplotlib.figure import Figure  # imported here: only the report needs matplotlib

    fig = Figure(figsize=(width, 0.6 + height_per_row * rows), dpi=DPI, layout="constrained")
    axes = fig.subplots(rows, 1, sharex=sharex, squeeze=False)[:, 0]
    for ax in axes:
        ax.grid(True, color="#e5e7eb", linewidth=0.6)
        ax.tick_params(labelsize=8)
    return fig, axes


def _png(fig: Any, alt: str) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return f'<img class="plot" alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def _spans(ax: Any, analysis: Analysis, t0: float) -> None:
    for gap in analysis.results.unmonitored:
        ax.axvspan(gap["start_s"] - t0, gap["end_s"] - t0, color=GREY_SPAN, linewidth=0)
    for e in analysis.events:
        ax.axvline(e["start_s"] - t0, color=EVENT_RED, linestyle=(0, (4, 3)), linewidth=1.0)


def _validation_plot(v: Validation, unit: str) -> str:
    n = v.measured.shape[1]
    fig, axes = _figure(n)
    t = v.t - v.t[0]
    for i, ax in enumerate(axes):
        ax.plot(t, v.measured[:, i], color=COLOURS[i % len(COLOURS)], linewidth=1.0, label="measured")
        ax.plot(t, v.computed[:, i], color="#111827", linestyle=(0, (7, 3)), linewidth=1.1, label="computed")
        ax.set_ylabel(f"actuator {i + 1} [{unit}]", fontsize=8)
        ax.legend(loc="upper right", fontsize=7, ncols=2)
    axes[-1].set_xlabel("time in the stretch [s]", fontsize=8)
    return _png(fig, "measured and computed efforts per actuator")


def _trend_plot(analysis: Analysis, names: list[list[str]], labels: list[str], units: list[str], t0: float) -> str:
    rows = analysis.results.estimates
    fig, axes = _figure(len(names))
    for ax, group, label, unit in zip(axes, names, labels, units, strict=True):
        for i, name in enumerate(group):
            t, v, s, _ = estimate_series(rows, name)
            if t.size == 0:
                continue
            kw = look(i)
            ax.fill_between(t - t0, v - 2 * s, v + 2 * s, color=kw["color"], alpha=0.15, linewidth=0)
            ax.plot(t - t0, v, linewidth=1.3, label=name, **kw)
        _spans(ax, analysis, t0)
        ax.set_ylabel(f"{label} [{unit}]", fontsize=8)
        ax.legend(loc="upper right", fontsize=7, ncols=min(len(group), 4))
    axes[-1].set_xlabel("time since the start of the recording [s]", fontsize=8)
    return _png(fig, "estimate trends with 2 std bands: " + ", ".join(labels))


def _residual_plot(analysis: Analysis, n: int, unit: str, t0: float) -> str:
    fig, axes = _figure(1, height_per_row=2.4)
    ax = axes[0]
    rows = analysis.results.residual_aggregates
    for i in range(n):
        picked = [r for r in rows if r["actuator"] == i + 1]
        ax.plot([r["time_s"] - t0 for r in picked], [r["rms"] for r in picked], linewidth=1.3,
                label=f"actuator {i + 1}", **look(i))  # fmt: skip
    _spans(ax, analysis, t0)
    ax.set_ylabel(f"residual RMS [{unit}]", fontsize=8)
    ax.set_xlabel("time since the start of the recording [s]", fontsize=8)
    ax.legend(loc="upper right", fontsize=7, ncols=min(n, 6))
    return _png(fig, "effort residual RMS per actuator")


def _broken_at_gaps(t: Array, y: Array, max_gap_s: float) -> tuple[Array, Array]:
    """Insert a NaN row after every step longer than ``max_gap_s`` so a plotted line is not drawn across a gap."""
    cut = np.flatnonzero(np.diff(t) > max_gap_s) + 1
    return np.insert(t, cut, np.nan), np.insert(y, cut, np.nan, axis=0)


def _evidence_plot(event: dict[str, Any], unit: str, max_gap_s: float) -> str | None:
    blob = event.get("evidence")
    if blob is None:
        return None
    batch = decode_binary(blob)
    t, effort = _broken_at_gaps(batch.t - event["start_s"], np.asarray(batch.measured), max_gap_s)
    end_ms = 1000 * (event["end_s"] - event["start_s"])
    fig, axes = _figure(2, height_per_row=2.3, sharex=False)
    for row, ax in enumerate(axes):
        for i in range(effort.shape[1]):
            ax.plot(1000 * t, effort[:, i], linewidth=1.1, label=f"actuator {i + 1}", **look(i))
        ax.axvspan(0.0, end_ms, color=EVENT_RED, alpha=0.08, linewidth=0)
        for x in (0.0, end_ms):
            ax.axvline(x, color=EVENT_RED, linestyle=(0, (4, 3)), linewidth=1.0)
        ax.set_ylabel(f"measured effort [{unit}]", fontsize=8)
        ax.tick_params(labelbottom=True)
        if row == 1:  # close-up around the event
            ax.set_xlim(-ZOOM_BEFORE_MS, end_ms + ZOOM_AFTER_MS)
            inside = (1000 * t >= -ZOOM_BEFORE_MS) & (1000 * t <= end_ms + ZOOM_AFTER_MS)
            if inside.any():
                lo, hi = np.nanmin(effort[inside]), np.nanmax(effort[inside])
                pad = 0.08 * (hi - lo) + 1e-9
                ax.set_ylim(lo - pad, hi + pad)
            ax.set_title("close-up", fontsize=8, loc="left")
        else:
            ax.set_title("whole evidence window", fontsize=8, loc="left")
            ax.legend(loc="upper right", fontsize=7, ncols=min(effort.shape[1], 6))
    axes[-1].set_xlabel("time from the event's start [ms]", fontsize=8)
    return _png(fig, f"evidence of the event at {event['start_s']:.3f} s")


# ---------------------------------------------------------------------------------------------- page

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:0 auto;max-width:1000px;padding:1.2rem;
color:#111827;background:#fff;line-height:1.4}
h1{font-size:1.5rem;margin:.2rem 0 .6rem}h2{font-size:1.15rem;margin:1.6rem 0 .5rem;border-bottom:1px solid #d1d5db}
h3{font-size:1rem;margin:1.1rem 0 .3rem}
.caution{border:2px solid #8a5a00;background:#fff7e6;padding:.6rem .9rem;border-radius:4px;font-weight:600}
table{border-collapse:collapse;font-size:.85rem;margin:.4rem 0}
th,td{border:1px solid #d1d5db;padding:.2rem .5rem;text-align:left}
td.num{text-align:right;font-variant-numeric:tabular-nums}
.plot{max-width:100%;height:auto;display:block;margin:.3rem 0}
.state-steady{color:#15803d}.state-watch{color:#8a5a00}.state-act{color:#b91c1c}
.muted{color:#4b5563;font-size:.85rem}
.event{border-left:4px solid #b91c1c;padding-left:.7rem;margin:1rem 0;break-inside:avoid}
@media print{body{max-width:none}.plot{break-inside:avoid}}
"""


def _e(x: object) -> str:
    return html.escape(str(x))


def _table(header: list[str], rows: list[list[object]], numeric: set[int] | None = None) -> str:
    numeric = numeric or set()
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join(
        "<tr>" + "".join(f"<td{' class=num' if j in numeric else ''}>{_e(c)}</td>" for j, c in enumerate(r)) + "</tr>"
        for r in rows
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _iso(t_s: float) -> str:
    import datetime as dt

    return dt.datetime.fromtimestamp(t_s, tz=dt.UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _pose(monitor: RobotMonitor, q: list[float]) -> str:
    """Platform position (and orientation) at the event's peak, from the forward kinematics."""
    qa = np.asarray(q, dtype=float)[None, :]
    try:
        if monitor.delta:
            x = monitor.model.forward_kinematics(qa)[0]
            return f"platform at ({x[0]:.4f}, {x[1]:.4f}, {x[2]:.4f}) m"
        p, R = monitor.model.forward_kinematics(qa)
        angle = float(np.degrees(np.arccos(np.clip((np.trace(R[0]) - 1.0) / 2.0, -1.0, 1.0))))  # rotation angle
        return f"platform at ({p[0, 0]:.4f}, {p[0, 1]:.4f}, {p[0, 2]:.4f}) m, tilted {angle:.2f} deg"
    except ShadowError as exc:
        return f"pose not computed: {exc}"


def _health_section(analysis: Analysis) -> str:
    digest = analysis.results
    latest = digest.health
    if not latest:
        return "<p>No health assessment: the recording is shorter than one output period.</p>"
    last_t = latest[-1]["time_s"]
    n_robot = sum(digest.robot_states.values())
    parts = [f"<p>At the end ({_e(_iso(last_t))}):</p>"]
    rows = [[h["scope"], h["state"], "; ".join(h["reasons"]) or "-"] for h in latest]
    parts.append(_table(["scope", "state", "reasons"], rows))
    if n_robot:
        parts.append(
            '<p class="muted">Robot state over the run: '
            + ", ".join(f"{k} {100 * digest.robot_states[k] / n_robot:.0f} %" for k in ("steady", "watch", "act"))
            + f" of {n_robot} assessments.</p>"
        )
    return "".join(parts)


def build_report(
    monitor: RobotMonitor, analysis: Analysis, *, stretch_s: float = DEFAULT_STRETCH_S, title: str | None = None
) -> str:
    """The report page as one HTML string (UTF-8, no outside resource)."""
    description = monitor.description
    rec = analysis.recording
    delta = monitor.delta
    unit = "N m" if delta else "N"
    t0 = rec.start_s
    finals = analysis.final_estimates()
    title = title or f"shadow analysis: {rec.robot_id}"
    out = [
        "<!doctype html><html lang=en><head><meta charset=utf-8>",
        '<meta name="viewport" content="width=device-width,initial-scale=1">',
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
        f'<p class="caution" id="caution">{_e(ADVISORY_NOTICE)} This report is advice for maintenance people; '
        "it never commands the robot.</p>",
        f"<h1>{_e(title)}</h1>",
        _table(
            [
                "robot",
                "description",
                "stored range" if rec.layout == "store" else "recording",
                "samples",
                "start (UTC)",
                "end (UTC)",
                "duration",
            ],
            [
                [
                    rec.robot_id,
                    f"{description.name} ({description.family})",
                    rec.origin,
                    analysis.n_samples,
                    _iso(rec.start_s),
                    _iso(rec.end_s),
                    f"{rec.duration_s:.3f} s",
                ]
            ],
        ),  # fmt: skip
        f'<p class="muted">Analysed by the live monitor\'s code in {analysis.elapsed_s:.2f} s '
        f"({analysis.samples_per_s:,.0f} samples/s); {rec.skipped_total} "
        f"{'stored messages' if rec.layout == 'store' else 'lines'} skipped; "
        f"{len(analysis.events)} events.</p>",
        "<h2 id=health>Health</h2>",
        _health_section(analysis),
    ]
    out.append("<h2 id=validation>Model validation</h2>")
    v = validation_stretch(monitor, analysis, finals, stretch_s=stretch_s) if finals else None
    if v is None:
        out.append("<p>Not enough samples without a gap for the validation view.</p>")
    else:
        out.append(
            f"<p>Measured efforts against the rigid model with the final estimates (plus friction), "
            f"{v.t[-1] - v.t[0]:.2f} s from {_e(_iso(float(v.t[0])))}.</p>"
        )
        out.append(
            _table(
                ["actuator", f"RMS error [{unit}]", "NRMS error [% of range]", "correlation r"],
                [
                    [i + 1, f"{v.rms[i]:.4g}", f"{v.nrms_percent[i]:.2f}", f"{v.correlation[i]:.4f}"]
                    for i in range(v.rms.shape[0])
                ],  # fmt: skip
                numeric={1, 2, 3},
            )
        )
        out.append(_validation_plot(v, unit))
    out.append("<h2 id=estimates>Estimates at the end</h2>")
    out.append(
        _table(
            ["parameter", "value", "std", "identifiable"],
            [[f.parameter, f"{f.value:.5g}", f"{f.std:.3g}", "yes" if f.identifiable else "no"] for f in finals],
            numeric={1, 2},
        )
    )
    out.append("<h2 id=trends>Payload and friction trends</h2>")
    out.append('<p class="muted">Bands: +-2 std. Grey: not monitored. Red dashed: events.</p>')
    names = [f.parameter for f in finals]
    payload = names[: monitor.tracker.n_payload]
    if payload:
        masses = payload[:2] if delta else payload[:1] + [n for n in payload if n == "work_piece_mass"]
        out.append(_trend_plot(analysis, [masses], ["payload"], ["kg"], t0))
    friction_kinds = [("coulomb", "Coulomb friction", unit), ("viscous", "viscous friction",
                      f"{unit} s/rad" if delta else "N s/m"), ("offset", "effort offset", unit)]  # fmt: skip
    groups = [[n for n in names if n.startswith(k + "_")] for k, _, _ in friction_kinds]
    keep = [i for i, g in enumerate(groups) if g]
    if keep:
        out.append(
            _trend_plot(
                analysis,
                [groups[i] for i in keep],
                [friction_kinds[i][1] for i in keep],
                [friction_kinds[i][2] for i in keep],
                t0,
            )
        )
    if analysis.results.residual_aggregates:
        out.append(_residual_plot(analysis, monitor.n, unit, t0))
    out.append(f"<h2 id=events>Events ({len(analysis.events)})</h2>")
    if not analysis.events:
        out.append("<p>No event found.</p>")
    for k, e in enumerate(analysis.events, start=1):
        figures = e.get("figures", {})
        force = figures.get("platform_force_n", figures.get("platform_wrench_n_nm", []))
        size = float(np.linalg.norm(force[:3])) if force else float("nan")
        force_text = ", ".join(f"{x:.1f}" for x in force)
        out.append(f'<div class="event" id="event-{k}">')
        out.append(
            f"<h3>Event {k}: {_e(e['kind'])} at {_e(_iso(e['start_s']))} "
            f"(+{e['start_s'] - t0:.3f} s), {1000 * (e['end_s'] - e['start_s']):.0f} ms, {_e(e['severity'])}</h3>"
        )
        out.append(f"<p>{_e(e['summary'])}.</p>")
        pose = (
            _pose(monitor, figures.get("pose_actuator_positions", []))
            if figures.get("pose_actuator_positions")
            else "-"
        )
        out.append(
            _table(
                ["estimated contact " + ("force [N]" if delta else "wrench [N, N m]"), "|force| [N]", "pose"],
                [[f"({force_text})", f"{size:.1f}", pose]],
            )
        )
        plot = _evidence_plot(e, unit, monitor.settings.tracker.max_gap_s)
        out.append(plot if plot is not None else "<p>No evidence samples kept.</p>")
        out.append("</div>")
    out.append("<h2 id=gaps>Not monitored and skipped</h2>")
    gaps = analysis.results.unmonitored
    if gaps:
        out.append(
            _table(
                ["from (UTC)", "to (UTC)", "length", "cause", "detail"],
                [
                    [
                        _iso(g["start_s"]),
                        _iso(g["end_s"]),
                        f"{g['end_s'] - g['start_s']:.3f} s",
                        g["cause"],
                        g["detail"],
                    ]
                    for g in gaps
                ],  # fmt: skip
            )
        )
        digest = analysis.results
        if digest.unmonitored_count > len(gaps):
            out.append(
                f"<p>{digest.unmonitored_count} stretches not monitored, {digest.unmonitored_s:.3f} s in all; "
                f"the first {len(gaps)} are listed.</p>"
            )
    else:
        out.append("<p>The whole run was monitored.</p>")
    if rec.layout == "store":
        if rec.gaps:
            out.append(f"<p>Not retained in the store: {len(rec.gaps)} stretches of the asked range.</p>")
            out.append(
                _table(
                    ["from (UTC)", "to (UTC)", "length", "reason"],
                    [[_iso(g.start_s), _iso(g.end_s), f"{g.duration_s:.3f} s", g.reason] for g in rec.gaps],
                )
            )
        else:
            out.append("<p>The store retains every message of the asked range.</p>")
    what = "stored messages" if rec.layout == "store" else "lines"
    if rec.skipped_total:
        counts = ", ".join(f"{kind}: {k}" for kind, k in rec.skip_counts)
        out.append(f"<p>{rec.skipped_total} {what} skipped ({_e(counts)}).</p>")
        shown = rec.skipped[:200]
        out.append(_table([shown[0].where, "reason"], [[s.line, s.reason] for s in shown]))
        if rec.skipped_total > len(shown):
            out.append(
                f"<p>... and {rec.skipped_total - len(shown)} more skipped {what}; only the first {len(shown)} are "
                "listed, the rest are counted by reason above.</p>"
            )
    else:
        out.append(f"<p>No {what[:-1]} of the {'range' if rec.layout == 'store' else 'recording'} was skipped.</p>")
    out.append(f'<p class="muted">{_e(ADVISORY_NOTICE)}</p></body></html>')
    return "\n".join(out)


# ---------------------------------------------------------------------------------------------- PDF

PDF_BROWSERS = ("chromium", "chromium-browser", "google-chrome")
PDF_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--disable-dev-shm-usage",
    "--no-pdf-header-footer",
)


def find_pdf_converter() -> str | None:
    """A headless browser that can print to PDF, or None."""
    for name in PDF_BROWSERS:
        found = shutil.which(name)
        if found:
            return found
    return None


def html_to_pdf(html_path: Path, pdf_path: Path, *, timeout_s: float = 120.0) -> None:
    """Print the report to PDF with a headless Chromium (``--print-to-pdf``); only local files are opened."""
    browser = find_pdf_converter()
    if browser is None:
        raise ConfigurationError(
            "--pdf: no converter found (needs chromium: apt-get install chromium); the HTML report was written"
        )
    with tempfile.TemporaryDirectory(prefix="shadow-pdf-") as profile:
        cmd = [browser, *PDF_FLAGS, f"--user-data-dir={profile}", f"--print-to-pdf={pdf_path}",
               html_path.resolve().as_uri()]  # fmt: skip
        try:
            done = subprocess.run(cmd, capture_output=True, timeout=timeout_s, check=False)
        except subprocess.TimeoutExpired as exc:
            raise ConfigurationError(f"--pdf: {browser} did not finish within {timeout_s:.0f} s") from exc
    if done.returncode != 0 or not pdf_path.exists():
        tail = done.stderr.decode("utf-8", "replace").strip().splitlines()[-1:] or [""]
        raise ConfigurationError(f"--pdf: {browser} failed (exit {done.returncode}): {tail[0]}")
