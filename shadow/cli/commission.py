"""``shadow commission``: identify a robot's healthy baseline (friction, offsets, payload, noise) from a recorded run.

``shadow commission DESCRIPTION RECORDING -o BASELINE.json [--gain-run RECORDING2 --test-mass-kg M]``

RECORDING holds one wire-format JSON message per line (docs/wire-format.md), in time order, of the robot that
DESCRIPTION describes, recorded while it ran healthy. Efforts may come as joint-side efforts or as motor currents
(converted with the drives' nominal gains). The command conditions the run (centred Savitzky-Golay derivatives:
offline, so non-causal), fits the measurement model of :mod:`shadow.estimation.commissioning` by weighted least
squares, prints the estimates with their confidence intervals, the per-actuator noise, the condition number and
what the run could not see, and writes the baseline file the live tracker starts from (layout in
docs/commissioning.md). When the recording carries drive temperatures that vary enough, it also identifies each
actuator's viscous temperature coefficient (the live wear indicator's compensation) and says in words where the
run could not show it. With ``--gain-run`` (the same kind of motion with a known test mass added to the platform)
it also calibrates each drive's current-to-effort gain by the added-mass method.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError, RecordingError, RejectedMessageError
from shadow.estimation.baseline import Baseline
from shadow.estimation.commissioning import (
    PAYLOAD_SPLIT,
    CommissioningSettings,
    ConditionedRun,
    GainCalibration,
    Identification,
    InsufficientDataError,
    ViscousTemperatureFit,
    baseline_from_identification,
    calibrate_gains,
    condition_run,
    fit_sample_clock,
    identify_run,
    identify_stribeck_velocity,
    identify_viscous_temperature,
    unseen_prior_std,
)
from shadow.ingest.wire import PlausibilityLimits, PositionUnit, SampleBatch, decode_json
from shadow.robots.description import (
    DEFAULT_SMOOTH_VELOCITY_M_S,
    DEFAULT_SMOOTH_VELOCITY_RAD_S,
    HexapodFixture,
    RobotDescription,
    build_model,
    load_description,
)
from shadow.robots.drives import declared_effort_timing, effort_from_current
from shadow.robots.parameters import MeasuredQuantity, RigidPayload

Array = NDArray[np.float64]

BASELINE_FORMAT = "shadow-baseline"
BASELINE_VERSION = 1
DEFAULT_HALF_WINDOW = 10
DEFAULT_POLY_ORDER = 5
DEFAULT_MAX_GAP_S = 0.05
DEFAULT_CONFIDENCE = 0.95
DEFAULT_MAX_CONDITION = 200.0


@dataclass(frozen=True, slots=True)
class Recording:
    """One robot's run as read from a recording file."""

    path: Path
    robot_id: str
    t: Array  # (N,) [s since the Unix epoch]
    q: Array  # (N, n)
    effort: Array  # (N, n) joint-side efforts [N m | N] (currents converted with the nominal gains)
    gripping: NDArray[np.bool_]  # (N,)
    n_messages: int
    measured: tuple[str, ...]  # the effort kinds found ("effort", "motor_current")
    temperature_k: Array | None = None  # (N, n) drive temperatures [K], NaN in messages without them; None: none


def register(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = commands.add_parser(
        "commission",
        help="identify a healthy baseline from a recorded run",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("description", type=Path, metavar="DESCRIPTION", help="robot description (TOML, schema 1)")
    parser.add_argument("recording", type=Path, metavar="RECORDING", help="healthy run: one JSON wire message a line")
    parser.add_argument("-o", "--output", type=Path, required=True, metavar="BASELINE.json", help="baseline file")
    parser.add_argument("--gain-run", type=Path, metavar="RECORDING2", help="the same motion with a test mass added")
    parser.add_argument("--test-mass-kg", type=float, metavar="M", help="the test mass of --gain-run [kg]")
    parser.add_argument(
        "--apply-gains",
        action="store_true",
        help="identify with the efforts corrected by the calibrated gains (needs --gain-run; the live side must "
        "then apply the same gains)",
    )
    parser.add_argument(
        "--robot", metavar="ID", help="accept recordings under this robot id (default: the description's name)"
    )
    parser.add_argument(
        "--payload",
        choices=("auto", "full", "mass"),
        default="auto",
        help="hexapod: estimate all ten payload parameters, the mass only, or decide from the run (default)",
    )
    parser.add_argument(
        "--stribeck-velocity",
        default="described",
        metavar="V|auto|none|described",
        help="friction's Stribeck term: its velocity v_st [rad/s | m/s], 'auto' (chosen from the run by profiled "
        "likelihood), 'none', or 'described' (the description's [friction] value, else none; default)",
    )
    parser.add_argument(
        "--half-window",
        type=int,
        default=DEFAULT_HALF_WINDOW,
        metavar="M",
        help=f"Savitzky-Golay half window, samples (default {DEFAULT_HALF_WINDOW})",
    )
    parser.add_argument(
        "--poly-order",
        type=int,
        default=DEFAULT_POLY_ORDER,
        metavar="D",
        help=f"Savitzky-Golay polynomial order (default {DEFAULT_POLY_ORDER})",
    )
    parser.add_argument(
        "--max-gap-s",
        type=float,
        default=DEFAULT_MAX_GAP_S,
        metavar="S",
        help=f"a longer step between samples splits the run (default {DEFAULT_MAX_GAP_S} s)",
    )
    parser.add_argument(
        "--confidence",
        type=float,
        default=DEFAULT_CONFIDENCE,
        metavar="P",
        help=f"level of the confidence intervals (default {DEFAULT_CONFIDENCE})",
    )
    parser.add_argument(
        "--max-condition",
        type=float,
        default=DEFAULT_MAX_CONDITION,
        metavar="K",
        help=f"directions weaker than 1/K of the best one count as unseen (default {DEFAULT_MAX_CONDITION:g})",
    )
    parser.add_argument(
        "--fit-clock",
        action="store_true",
        help="move the time stamps onto a fitted fixed-rate clock before differentiating (for controllers that "
        "sample on a fixed clock and stamp with jitter)",
    )
    parser.add_argument(
        "--ideal-drives",
        action="store_true",
        help="take every effort as belonging to the motion at its own instant (ideal current loops, continuous "
        "commands), not at the instant the description's drives and measurement section give",
    )
    parser.set_defaults(handler=run)


# ---------------------------------------------------------------------------------------------- reading


def read_recording(path: Path, description: RobotDescription, *, robot_id: str | None = None) -> Recording:
    """Read a recording (one JSON wire message per line) of the described robot.

    Raises
    ------
    RecordingError naming the file, the line and the field: unreadable file, a line that is not a valid message
    (a cut-off last line is called truncated), another robot's id, actuator count or units, samples out of the
    robot's range, times that go back between lines, an empty file.
    """
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise RecordingError(f"{path}: cannot read the recording: {exc.strerror or exc}") from exc
    n = description.n_actuators
    limits = PlausibilityLimits.for_parameters(description.parameters)
    wanted = robot_id if robot_id is not None else description.name
    drives = description.parameters.drives
    lines = raw.split(b"\n")
    ends_with_newline = raw.endswith(b"\n")
    batches: list[tuple[int, SampleBatch]] = []
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            batch = decode_json(line, n_actuators=n, limits=limits)
        except RejectedMessageError as exc:
            last = number == len(lines) and not ends_with_newline
            hint = " (the last line is cut off: the recording looks truncated)" if last else ""
            raise RecordingError(f"{path}: line {number}: {exc.reason} [{exc.reason_code}]{hint}") from exc
        if batch.robot_id != wanted:
            raise RecordingError(
                f"{path}: line {number}: robot: {batch.robot_id!r} is not the described robot {wanted!r}"
                + ("" if robot_id is not None else f" (pass --robot {batch.robot_id} to accept it under that id)")
            )
        if batches:
            prev_number, prev = batches[-1]
            if not batch.t[0] > prev.t[-1]:
                raise RecordingError(
                    f"{path}: line {number}: time: first sample {float(batch.t[0])!r} s is not after the last sample "
                    f"of line {prev_number} ({float(prev.t[-1])!r} s); the recording must be in time order"
                )
        batches.append((number, batch))
    if not batches:
        raise RecordingError(f"{path}: no messages (the file is empty)")
    efforts = []
    for _, b in batches:
        if b.effort_kind is MeasuredQuantity.MOTOR_CURRENT:
            efforts.append(effort_from_current(b.measured, drives))  # tau = eta k_t G i, nominal gains
        else:
            efforts.append(np.asarray(b.measured))
    return Recording(
        path=path,
        robot_id=batches[0][1].robot_id,
        t=np.concatenate([b.t for _, b in batches]),
        q=np.concatenate([b.q for _, b in batches]),
        effort=np.concatenate(efforts),
        gripping=np.concatenate(
            [b.gripping if b.gripping is not None else np.zeros(b.n_samples, dtype=bool) for _, b in batches]
        ),
        n_messages=len(batches),
        measured=tuple(sorted({b.effort_kind.value for _, b in batches})),
        temperature_k=_temperatures(batches, n),
    )


def _temperatures(batches: list[tuple[int, SampleBatch]], n: int) -> Array | None:
    """(N, n) drive temperatures of the recording [K], NaN for messages without them; None if none has any."""
    if all(b.temperature_k is None for _, b in batches):
        return None
    return np.concatenate(
        [b.temperature_k if b.temperature_k is not None else np.full((b.n_samples, n), np.nan) for _, b in batches]
    )


# ---------------------------------------------------------------------------------------------- baseline file


def read_baseline_file(path: Path) -> tuple[Baseline, dict[str, Any]]:
    """Read a baseline file written by ``shadow commission``: (Baseline, the whole document)."""
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigurationError(f"{path}: cannot read the baseline: {exc.strerror or exc}") from exc
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ConfigurationError(f"{path}: not a JSON baseline file ({exc})") from exc
    if not isinstance(doc, dict) or doc.get("format") != BASELINE_FORMAT:
        raise ConfigurationError(f"{path}: format: expected {BASELINE_FORMAT!r}")
    if doc.get("version") != BASELINE_VERSION:
        raise ConfigurationError(f"{path}: version: {doc.get('version')!r} is not supported (this reader: 1)")
    try:
        return Baseline.from_dict(doc), doc
    except ConfigurationError as exc:
        raise ConfigurationError(f"{path}: {exc}") from exc


def _num(x: float) -> float | None:
    """JSON has no infinity: None for a non-finite number."""
    return float(x) if math.isfinite(float(x)) else None


def _iso(t_s: float) -> str:
    return dt.datetime.fromtimestamp(t_s, tz=dt.UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _unit(name: str, rotary: bool) -> str:
    """UCUM unit of a parameter."""
    if name.endswith("_mass") or name == "payload_m":
        return "kg"
    if name.startswith("payload_m_c"):
        return "kg.m"
    if name.startswith("payload_I"):
        return "kg.m2"
    if name.startswith("viscous_"):
        return "N.m.s/rad" if rotary else "N.s/m"
    return "N.m" if rotary else "N"


# ---------------------------------------------------------------------------------------------- command


def _settings(args: argparse.Namespace, description: RobotDescription, sample_period_s: float) -> CommissioningSettings:
    """Settings from the options; the efforts' timing from the description on a stream of ``sample_period_s`` [s]."""
    rotary = description.family == "delta"
    if description.friction is not None:
        v_s = description.friction.smooth_velocity
    else:
        v_s = DEFAULT_SMOOTH_VELOCITY_RAD_S if rotary else DEFAULT_SMOOTH_VELOCITY_M_S
    bandwidth = reported = period = None
    if not args.ideal_drives:
        drives = description.parameters.drives
        bandwidth = np.array([d.current_loop_bandwidth_hz for d in drives], dtype=float)
        reported, period = declared_effort_timing(drives, sample_period_s)
    if args.half_window < 1:
        raise ConfigurationError(f"--half-window: must be >= 1, got {args.half_window}")
    if not 2 <= args.poly_order < 2 * args.half_window + 1:
        raise ConfigurationError(f"--poly-order: must lie in [2, 2 * half window], got {args.poly_order}")
    if not args.max_gap_s > 0:
        raise ConfigurationError(f"--max-gap-s: must be > 0, got {args.max_gap_s}")
    return CommissioningSettings(
        smooth_velocity=v_s,
        stribeck_velocity=_stribeck_option(args.stribeck_velocity, description),
        half_window=args.half_window,
        poly_order=args.poly_order,
        max_gap_s=args.max_gap_s,
        current_loop_bandwidth_hz=bandwidth,
        reported_effort=reported,
        command_period_s=period,
        confidence=args.confidence,
        max_condition=args.max_condition,
        velocity_unit="rad/s" if rotary else "m/s",
        work_piece_per_kg=None if rotary else description.tool.work_piece_parameters_per_kg(),
    )


def _stribeck_option(value: str, description: RobotDescription) -> float | None:
    """v_st from --stribeck-velocity ('auto' is resolved later, from the run: None here)."""
    if value in ("none", "auto"):
        return None
    if value == "described":
        return description.friction.stribeck_velocity if description.friction is not None else None
    try:
        v_st = float(value)
    except ValueError:
        raise ConfigurationError(
            f"--stribeck-velocity: expected a velocity, 'auto', 'none' or 'described', got {value!r}"
        ) from None
    if not (math.isfinite(v_st) and v_st > 0):
        raise ConfigurationError(f"--stribeck-velocity: must be a finite velocity > 0, got {value!r}")
    return v_st


def _nominal_friction(description: RobotDescription, stribeck_velocity: float | None) -> Array | None:
    """The description's friction (k n,) in the form the run is identified with (Stribeck level 0 where the
    description declares none); None without a [friction] section."""
    friction = description.friction
    if friction is None:
        return None
    n = description.n_actuators
    per = friction.parameters().reshape(n, friction.per_actuator)
    theta = per[:, :3]
    if stribeck_velocity is not None:
        level = per[:, 3:4] if friction.per_actuator == 4 else np.zeros((n, 1))
        theta = np.concatenate([theta, level], axis=1)
    return theta.reshape(-1)


def _conditioned(rec: Recording, settings: CommissioningSettings, fit_clock: bool) -> ConditionedRun:
    t = fit_sample_clock(rec.t) if fit_clock else rec.t
    return condition_run(t, rec.q, rec.effort, rec.gripping, settings, temperature=rec.temperature_k)


def _test_parameters(description: RobotDescription, mass_kg: float) -> Array:
    """Payload parameters of the test body: a point mass at the platform (origin of the platform frame)."""
    if description.family == "delta":
        return np.array([mass_kg])
    return RigidPayload(mass_kg=mass_kg).standard_parameters()


def run(args: argparse.Namespace) -> int:
    if (args.gain_run is None) != (args.test_mass_kg is None):
        raise ConfigurationError("--gain-run and --test-mass-kg: give both or neither")
    if args.test_mass_kg is not None and not args.test_mass_kg > 0:
        raise ConfigurationError(f"--test-mass-kg: must be > 0, got {args.test_mass_kg}")
    description = load_description(args.description)
    model = build_model(description)
    rec = read_recording(args.recording, description, robot_id=args.robot)
    settings = _settings(args, description, float(np.median(np.diff(rec.t))))
    run_c = _conditioned(rec, settings, args.fit_clock)
    if args.apply_gains and args.gain_run is None:
        raise ConfigurationError("--apply-gains: needs --gain-run and --test-mass-kg")
    gains = None
    if args.gain_run is not None:
        rec_b = read_recording(args.gain_run, description, robot_id=args.robot)
        gains = calibrate_gains(
            model,
            run_c,
            _conditioned(rec_b, settings, args.fit_clock),
            _test_parameters(description, args.test_mass_kg),
            settings,
        )
        if args.apply_gains:
            run_c = dataclasses.replace(run_c, effort=run_c.effort * gains.gain)  # tau_true = gamma tau_nom
    nominal_payload = None
    if isinstance(description.tool, HexapodFixture):
        nominal_payload = description.tool.payload_parameters()
    stribeck_search = None
    if args.stribeck_velocity == "auto":
        stribeck_search = identify_stribeck_velocity(
            model, run_c, settings, payload=args.payload, nominal_payload=nominal_payload
        )
        settings = dataclasses.replace(settings, stribeck_velocity=stribeck_search.velocity)
        ident = stribeck_search.identification
    else:
        ident = identify_run(model, run_c, settings, payload=args.payload, nominal_payload=nominal_payload)
    nominal_friction = _nominal_friction(description, settings.stribeck_velocity)
    baseline = baseline_from_identification(
        ident,
        description.n_actuators,
        unseen_std=unseen_prior_std(run_c, ident, settings),
        nominal_friction=nominal_friction,
        nominal_work_piece_kg=description.tool.work_piece_mass_kg,
        stribeck_velocity=settings.stribeck_velocity,
        work_piece_per_kg=settings.work_piece_per_kg,
    )
    temperature = identify_viscous_temperature(model, run_c, ident, settings)
    baseline = dataclasses.replace(
        baseline,
        collision_threshold=healthy_run_thresholds(description, baseline, rec),
        reference_temperature_k=(
            None if np.all(np.isnan(temperature.reference_temperature_k)) else temperature.reference_temperature_k
        ),
        viscous_temperature_coefficient_per_k=(
            temperature.coefficient_per_k if temperature.identified.any() else None
        ),  # not identified anywhere: the field stays out (the live side falls back to the declared value)
    )
    doc = baseline_document(description, rec, run_c, settings, ident, baseline, gains, args)
    doc["temperature_law"] = temperature_law_document(description, temperature)
    if stribeck_search is not None:
        doc["stribeck_search"] = {
            "chosen": stribeck_search.velocity,
            "reason": stribeck_search.reason,
            "candidates": stribeck_search.candidates.tolist(),
            "cost": stribeck_search.cost.tolist(),
            "cost_without": stribeck_search.cost_without,
            "statistic": stribeck_search.statistic,
            "threshold": stribeck_search.threshold,
        }
    try:
        args.output.parent.mkdir(parents=True, exist_ok=True)
        args.output.write_text(json.dumps(doc, indent=1, allow_nan=False) + "\n", encoding="utf-8")
    except OSError as exc:
        raise ConfigurationError(f"{args.output}: cannot write the baseline: {exc.strerror or exc}") from exc
    print("\n".join(report_lines(description, rec, run_c, ident, gains, args)))
    speed = "rad/s" if description.family == "delta" else "m/s"
    if stribeck_search is not None:
        print(f"friction form chosen from the run: {stribeck_search.reason}")
    elif settings.stribeck_velocity is not None:
        print(f"friction form: with the Stribeck term at v_st = {settings.stribeck_velocity:.3g} {speed}")
    print("\n".join(temperature_lines(description, temperature)))
    unit = "N m" if description.family == "delta" else "N"
    thresholds = ", ".join(f"{i + 1}: {v:.3g} {unit}" for i, v in enumerate(baseline.collision_threshold))  # type: ignore[arg-type]
    print(f"collision thresholds calibrated on this run: {thresholds}")
    print(f"baseline written to {args.output}")
    return 0


def healthy_run_thresholds(description: RobotDescription, baseline: Baseline, rec: Recording) -> Array:
    """Run the live monitor with the new baseline over the healthy run and calibrate its collision thresholds
    on the observer residual it sees there (:func:`shadow.monitoring.calibrated_thresholds`)."""
    from shadow.monitoring import RobotMonitor, calibrated_thresholds, default_settings  # the live monitor itself

    rate = 1.0 / float(np.median(np.diff(rec.t)))
    settings = default_settings(description, sample_rate_hz=rate)
    monitor = RobotMonitor(f"commission/run/{rec.robot_id}", description, baseline, settings)
    monitor.residual_log = []
    unit = PositionUnit.RAD if description.family == "delta" else PositionUnit.M
    batches = [
        SampleBatch(
            robot_id=rec.robot_id,
            seq=k,
            position_unit=unit,
            effort_kind=MeasuredQuantity.EFFORT,
            t=rec.t[s : s + 500],
            q=rec.q[s : s + 500],
            effort=rec.effort[s : s + 500],
            gripping=rec.gripping[s : s + 500],
        )
        for k, s in enumerate(range(0, rec.t.shape[0], 500))
    ]
    monitor.process_many(batches)
    residual = np.concatenate(monitor.residual_log) if monitor.residual_log else np.zeros((0, description.n_actuators))
    if residual.shape[0] < 10 * settings.sample_rate_hz / settings.observer_gain_per_s:
        raise InsufficientDataError("the run is too short to calibrate the collision thresholds")
    return calibrated_thresholds(residual, settings)


def baseline_document(
    description: RobotDescription,
    rec: Recording,
    run_c: ConditionedRun,
    settings: CommissioningSettings,
    ident: Identification,
    baseline: Baseline,
    gains: GainCalibration | None,
    args: argparse.Namespace,
) -> dict[str, Any]:
    """The baseline file's content (docs/commissioning.md)."""
    rotary = description.family == "delta"
    doc: dict[str, Any] = {"format": BASELINE_FORMAT, "version": BASELINE_VERSION, **baseline.to_dict()}
    doc["robot"] = {"name": description.name, "family": description.family, "description": description.source}
    doc["run"] = {
        "recording": str(rec.path),
        "robot_id": rec.robot_id,
        "messages": rec.n_messages,
        "samples_recorded": int(rec.t.shape[0]),
        "samples_used": ident.n_samples,
        "segments": run_c.n_segments,
        "start_utc": _iso(float(rec.t[0])),
        "end_utc": _iso(float(rec.t[-1])),
        "duration_s": float(rec.t[-1] - rec.t[0]),
        "measured": list(rec.measured),
        "gripping_fraction": ident.gripping_fraction,
    }
    doc["method"] = {
        "conditioning": "Savitzky-Golay, windows centred on each sample (offline, non-causal)",
        "half_window": settings.half_window,
        "poly_order": settings.poly_order,
        "max_gap_s": settings.max_gap_s,
        "fitted_clock": bool(args.fit_clock),
        "smooth_velocity": settings.smooth_velocity,
        "stribeck_velocity": settings.stribeck_velocity,
        "current_loop_lag": settings.current_loop_bandwidth_hz is not None,
        "estimator": "weighted least squares, weights 1/sigma per actuator, reweighted once",
        "confidence": settings.confidence,
        "payload_model": ident.payload_mode,
        "dof": ident.dof,
    }
    doc["estimates"] = [
        {
            "name": name,
            "value": float(ident.theta[j]),
            "std": None if ident.held[j] else float(ident.std[j]),
            "ci_low": _num(ident.ci_low[j]),
            "ci_high": _num(ident.ci_high[j]),
            "identified": bool(ident.identified[j]),
            "held": bool(ident.held[j]),
            "at_bound": bool(ident.at_bound[j]),
            "unit": _unit(name, rotary),
        }
        for j, name in enumerate(ident.parameter_names)
    ]
    doc["noise"] = {"std": ident.noise_std.tolist(), "unit": "N.m" if rotary else "N"}
    doc["excitation"] = {
        "condition_number": _num(ident.condition_number),
        "fitted_condition_number": _num(ident.fitted_condition_number),
        "max_condition": settings.max_condition,
        "singular_values": ident.singular_values.tolist(),
        "unseen": [
            {"parameters": list(u.parameters), "held": list(u.held), "explanation": u.explanation} for u in ident.unseen
        ],
        "motion": [
            {
                "actuator": m.index + 1,
                "positive_fraction": m.positive_fraction,
                "negative_fraction": m.negative_fraction,
                "peak_speed": m.peak_speed,
            }
            for m in ident.motion
        ],
    }
    doc["gain_calibration"] = None
    if gains is not None:
        doc["gain_calibration"] = {
            "recording": str(args.gain_run),
            "test_mass_kg": float(args.test_mass_kg),
            "method": "added mass, per-actuator least squares with the measured effort as output",
            "gain": gains.gain.tolist(),
            "ci_low": gains.ci_low.tolist(),
            "ci_high": gains.ci_high.tolist(),
            "noise_std": gains.noise_std.tolist(),
            "confidence": gains.confidence,
            "applied": bool(args.apply_gains),
        }
    return doc


def _declared_coefficients(description: RobotDescription) -> Array | None:
    """The description's declared viscous temperature coefficients (n,) [1/K], or None."""
    f = description.friction
    return (
        None
        if f is None or f.viscous_temperature_coefficient_per_k is None
        else f.viscous_temperature_coefficient_per_k
    )


def _fallback_words(declared: Array | None, i: int) -> str:
    if declared is not None:
        return f"the description's declared {declared[i]:.3g} 1/K is used"
    return "none is declared, so the wear indicator is not compensated for temperature (0 1/K)"


def temperature_law_document(description: RobotDescription, fit: ViscousTemperatureFit) -> dict[str, Any]:
    """The ``temperature_law`` record of the baseline file (docs/commissioning.md)."""
    declared = _declared_coefficients(description)
    rotary = description.family == "delta"
    per_actuator = []
    for i in range(fit.identified.shape[0]):
        used = fit.coefficient_per_k[i] if fit.identified[i] else (0.0 if declared is None else declared[i])
        source = "identified" if fit.identified[i] else ("declared" if declared is not None else "none")
        per_actuator.append(
            {
                "actuator": i + 1,
                "identified": bool(fit.identified[i]),
                "coefficient_per_k": _num(fit.coefficient_per_k[i]),
                "std_per_k": _num(fit.std_per_k[i]),
                "ci_low": _num(fit.ci_low[i]),
                "ci_high": _num(fit.ci_high[i]),
                "reference_temperature_k": _num(fit.reference_temperature_k[i]),
                "temperature_span_k": _num(fit.span_k[i]),
                "viscous_at_reference": _num(fit.viscous_at_reference[i]),
                "viscous_unit": "N.m.s/rad" if rotary else "N.s/m",
                "declared_per_k": None if declared is None else float(declared[i]),
                "used_per_k": float(used),
                "source": source,
            }
        )
    return {
        "law": "F_v(T) = F_v(T_ref) exp(-k (T - T_ref))",
        "method": "Gauss-Newton on the weighted least squares, T_ref the qd^2-weighted mean drive temperature",
        "confidence": fit.confidence,
        "iterations": fit.iterations,
        "actuators": per_actuator,
        "explanations": list(fit.explanations),
    }


def temperature_lines(description: RobotDescription, fit: ViscousTemperatureFit) -> list[str]:
    """The report's lines on the viscous temperature law."""
    declared = _declared_coefficients(description)
    level = f"{100 * fit.confidence:g} %"
    lines = ["viscous temperature coefficient, F_v(T) = F_v(T_ref) exp(-k (T - T_ref)):"]
    explained = iter(fit.explanations)
    no_temperature = not np.any(np.isfinite(fit.reference_temperature_k))
    for i in range(fit.identified.shape[0]):
        if fit.identified[i]:
            lines.append(
                f"  actuator {i + 1}: k = {fit.coefficient_per_k[i]:.4g} 1/K, {level} interval "
                f"[{fit.ci_low[i]:.4g}, {fit.ci_high[i]:.4g}], about T_ref = {fit.reference_temperature_k[i]:.2f} K "
                f"(temperature span {fit.span_k[i]:.3g} K)"
            )
        elif no_temperature:
            lines.append(f"  actuator {i + 1}: not seen; {_fallback_words(declared, i)}")
        else:
            reason = next(explained, "").split(": ", 1)[-1]
            lines.append(f"  actuator {i + 1}: not seen, {reason}; {_fallback_words(declared, i)}")
    if no_temperature and fit.explanations:
        lines.append(f"  ({fit.explanations[0]})")
    return lines


def report_lines(
    description: RobotDescription,
    rec: Recording,
    run_c: ConditionedRun,
    ident: Identification,
    gains: GainCalibration | None,
    args: argparse.Namespace,
) -> list[str]:
    """The readable report."""
    rotary = description.family == "delta"
    level = f"{100 * ident.confidence:g} %"
    lines = [
        f"{description.name} ({description.family}): {rec.n_messages} messages, {rec.t.shape[0]} samples over "
        f"{rec.t[-1] - rec.t[0]:.3f} s from {_iso(float(rec.t[0]))}; {ident.n_samples} used "
        f"({run_c.n_segments} segment{'s' if run_c.n_segments != 1 else ''}), tool gripping "
        f"{100 * ident.gripping_fraction:.0f} % of the time",
        f"payload model: {ident.payload_mode}",
        f"{'parameter':<18} {'estimate':>12} {level + ' interval':>28}  unit",
    ]
    for j, name in enumerate(ident.parameter_names):
        if ident.held[j]:
            interval = "not seen: held at 0"
        else:
            interval = f"[{ident.ci_low[j]:.5g}, {ident.ci_high[j]:.5g}]"
        flag = "  (at its bound)" if ident.at_bound[j] else ""
        if not ident.identified[j] and not ident.held[j]:
            flag += "  (not separable, see below)"
        lines.append(f"{name:<18} {ident.theta[j]:>12.5g} {interval:>28}  {_unit(name, rotary)}{flag}")
    unit = "N m" if rotary else "N"
    lines.append(
        "noise std per actuator: " + ", ".join(f"{i + 1}: {s:.4g} {unit}" for i, s in enumerate(ident.noise_std))
    )
    kappa = f"condition number (column-scaled regressor): {ident.condition_number:.4g}"
    if ident.held.any():  # a held parameter's empty column makes the first figure huge: say what was solved
        kappa += f"; {ident.fitted_condition_number:.4g} without the {int(ident.held.sum())} held parameter(s)"
    lines.append(kappa)
    if ident.unseen:
        lines.append("what the run could not see:")
        lines += [f"  - {u.explanation}" for u in ident.unseen]
        lines.append(
            "  (held parameters were left out of the fit; the baseline starts the live tracker from their "
            "nominal values with a wide uncertainty)"
        )
    else:
        lines.append("every parameter was seen by the run")
    if ident.payload_mode == "mass only":
        lines.append("  the run did not excite the payload's first and second moments: only its mass was estimated")
    if gains is not None:
        g_level = f"{100 * gains.confidence:g} %"
        lines.append(
            f"drive gains (true effort per nominal effort), {g_level} intervals, test mass {args.test_mass_kg} kg:"
        )
        lines += [
            f"  actuator {i + 1}: {gains.gain[i]:.4f} [{gains.ci_low[i]:.4f}, {gains.ci_high[i]:.4f}]"
            for i in range(gains.gain.shape[0])
        ]
    if ident.payload_mode == PAYLOAD_SPLIT and description.family == "delta":
        tool = description.tool
        lines.append(
            f"described: tool {getattr(tool, 'tool_mass_kg', float('nan')):.4g} kg, work piece "
            f"{getattr(tool, 'work_piece_mass_kg', float('nan')):.4g} kg"
        )
    elif isinstance(description.tool, HexapodFixture):
        fixture = description.tool
        lines.append(
            f"described: fixture {fixture.payload.mass_kg:.4g} kg, part {fixture.work_piece_mass_kg:.4g} kg"
            + ("" if fixture.work_piece_mass_kg > 0 else " (none declared)")
        )
    return lines
