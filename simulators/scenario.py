"""Scenarios: a declared stretch of a robot's life, simulated as short windows spread over a long horizon.

API
---
``load_scenario(path) -> Scenario``                 read and validate a scenario file (docs/scenario-file.md)
``generate(scenario) -> Iterator[ScenarioWindow]``  simulate it window by window, in time order

Each :class:`ScenarioWindow` holds the wire batches as they would arrive (stamped in simulated time: the
window's Unix start is ``scenario.start_s + day * 86400``; sequence numbers continue across windows, so a
lost message leaves a gap in them) and a :class:`WindowTruth`: payload, friction of the plant per actuator,
drive and ambient temperatures, wear ramp states, impacts, pick faults and the sensor faults injected.

Per window k (start day d_k):
  - friction of actuator i, term x in (Coulomb, static, viscous): the plant's nominal curve (the description's
    friction with the demo Stribeck hump, simulators.run.demo_loop) scaled by the product of the factors
    ``1 + rise * clip((d_k - d_start) / (d_end - d_start), 0, 1)`` of the ramps on that actuator and term;
  - ambient temperature ``T_a(d_k)`` (simulators.scenario_file.Environment); the drives start the window at
    ``T_a(d_k) + drive_self_heating_k`` and then follow the plant's thermal model (minutes of time constant,
    so they barely move in a window of seconds);
  - the payload in force at d_k (payload steps with day <= d_k); the controller's feed-forward uses it too;
  - impacts: one in a share ``window_fraction`` of the windows at a drawn time, or the listed ones; peak
    ``fraction * rated platform force`` (simulators.live.rated_platform_force_n);
  - sensor faults: simulators.sensor_faults.inject_sensor_faults on the window's batches.

Randomness: the plan of window k (path, pick faults, impacts, fault times) comes from a generator seeded
with (seed, k), the sensor faults from (seed, k, 2), so they do not depend on how windows are batched;
measurement noise comes from one generator per run of ``windows_per_run`` windows, (seed, 1, run).
The same scenario file gives the same messages and truth, bit for bit.

Messages with duplicate or out-of-order faults are in arrival order: pass them through
:class:`shadow.ingest.wire.SequenceTracker` (as the service does) before ``RobotMonitor.process_many``.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shadow.ingest.wire import SampleBatch
from shadow.robots.drives import current_to_effort_gains
from shadow.robots.parameters import MeasuredQuantity
from simulators.effects import StribeckFriction
from simulators.live import Window, rated_platform_force_n, window_batches
from simulators.plant import MassUpdate, Plant, PlatformPulse, PulseProfile, ShapedPulse
from simulators.run import DemoEffects, delta_reference, demo_loop, hexapod_reference, run_closed_loop
from simulators.scenario_file import (
    SECONDS_PER_DAY,
    ImpactShape,
    Scenario,
    SensorFaultSpec,
    example_scenarios,
    load_scenario,
    parse_scenario,
)
from simulators.sensor_faults import InjectedFault, SensorFault, inject_sensor_faults
from simulators.trajectories import PickPlaceCycles, delta_pick_place, hexapod_positioning

__all__ = [
    "FrictionTruth",
    "SECONDS_PER_DAY",
    "ImpactTruth",
    "PickFaultTruth",
    "Scenario",
    "ScenarioWindow",
    "WearTruth",
    "WindowTruth",
    "example_scenarios",
    "generate",
    "load_scenario",
    "parse_scenario",
    "simulated_seconds",
    "truth_document",
]

Array = NDArray[np.float64]
TRUTH_FORMAT = "shadow-scenario-truth/1"


# ------------------------------------------------------------------------------------------------- truth
@dataclass(frozen=True, slots=True)
class FrictionTruth:
    """The plant's friction in a window, per actuator (n,) each, joint side [N m | N] and [N m s/rad | N s/m].

    Curve: ``(F_c + (F_s - F_c) exp(-(v / v_s)^2)) tanh(v / v_e) + b(T) v`` (simulators.effects), with
    ``b(T) = b_ref exp(-beta (T - T_ref))``. ``viscous_mean`` is b(T) averaged over the window's samples.
    The factors are those of the wear ramps (1 without wear).
    """

    coulomb: tuple[float, ...]
    static: tuple[float, ...]
    viscous_ref: tuple[float, ...]
    viscous_mean: tuple[float, ...]
    stribeck_velocity: tuple[float, ...]
    reference_temperature_c: float
    coulomb_factor: tuple[float, ...]
    static_factor: tuple[float, ...]
    viscous_factor: tuple[float, ...]


@dataclass(frozen=True, slots=True)
class ImpactTruth:
    """An impact force pulse on the platform: start (Unix) [s], duration [s], peak [N], unit direction (3,)."""

    start_s: float
    duration_s: float
    peak_n: float
    direction: tuple[float, float, float]
    profile: str
    listed: bool  # declared in faults.impacts.listed (else drawn)


@dataclass(frozen=True, slots=True)
class PickFaultTruth:
    """A delta pick that went wrong: ``missed`` (closed on nothing) or ``double`` (two pieces lifted)."""

    kind: str
    cycle: int  # pick-and-place cycle in the window, 0-based
    pick_s: float  # gripper closes (Unix) [s]
    release_s: float  # gripper opens (Unix) [s]; may lie after the window's end
    carried_mass_kg: float  # work-piece mass carried in this cycle


@dataclass(frozen=True, slots=True)
class WearTruth:
    """State of one wear ramp in a window."""

    actuator: int  # 1-based
    progress: float  # 0..1 along the ramp
    factor: float  # 1 + rise_fraction * progress
    terms: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class WindowTruth:
    """What really happened in one window."""

    index: int
    day: float  # start day on the horizon
    start_s: float  # Unix time of the first sample (nominal)
    end_s: float  # Unix time of the last sample (nominal)
    first_seq: int
    last_seq: int  # as published, before transport faults
    n_published: int  # messages published (before transport faults)
    n_delivered: int  # messages in ScenarioWindow.batches
    ambient_c: float
    drive_temperature_start_c: tuple[float, ...]  # (n,)
    drive_temperature_mean_c: tuple[float, ...]  # (n,)
    tool_mass_kg: float  # delta: the tool; hexapod: the fixture (its mass)
    work_piece_mass_kg: float | None  # nominal work-piece (delta) or part (hexapod) mass in force; None: no part
    payload_parameters: tuple[float, ...]  # delta: [tool mass]; hexapod: the 10 fixture parameters (always carried)
    carried_work_piece_masses_kg: tuple[float, ...]  # delta: per cycle of the window (0: missed pick)
    friction: FrictionTruth
    wear: tuple[WearTruth, ...]
    impacts: tuple[ImpactTruth, ...]
    pick_faults: tuple[PickFaultTruth, ...]
    sensor_faults: tuple[InjectedFault, ...]

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able form (tuples become lists)."""
        out: dict[str, Any] = {}
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if f.name == "sensor_faults":
                out[f.name] = [s.to_dict() for s in value]
            elif f.name == "friction":
                out[f.name] = _jsonable(dataclasses.asdict(value))
            elif f.name in ("wear", "impacts", "pick_faults"):
                out[f.name] = [_jsonable(dataclasses.asdict(v)) for v in value]
            else:
                out[f.name] = _jsonable(value)
        return out


def _jsonable(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    return value


@dataclass(frozen=True, slots=True)
class ScenarioWindow:
    """One simulated window: the batches as they arrive (faults applied) and the truth."""

    index: int
    day: float
    start_s: float
    end_s: float
    batches: list[SampleBatch] = field(repr=False)
    truth: WindowTruth = field(repr=False)


def truth_document(scenario: Scenario, windows: list[WindowTruth]) -> dict[str, Any]:
    """The ground-truth file's content (JSON-able): the scenario's identity and every window's truth."""
    return {
        "format": TRUTH_FORMAT,
        "scenario": scenario.name,
        "source": str(scenario.source),
        "robot": scenario.robot,
        "robot_id": scenario.robot_id,
        "family": scenario.description.family,
        "seed": scenario.seed,
        "start_s": scenario.start_s,
        "horizon_days": scenario.horizon_days,
        "window_s": scenario.sampling.window_s,
        "sample_step_s": scenario.sampling.sample_step_s,
        "windows": [w.to_dict() for w in windows],
    }


# ------------------------------------------------------------------------------------------------- plans
@dataclass(frozen=True, slots=True)
class _Impact:
    offset_s: float
    shape: ImpactShape
    direction: Array  # (3,) unit
    listed: bool


@dataclass(frozen=True, slots=True)
class _Plan:
    """Everything drawn or looked up for one window before the batched run."""

    index: int
    day: float
    tool_mass_kg: float
    work_piece_mass_kg: float | None
    theta_fixture: Array  # hexapod: (10,) fixture parameters, always carried; delta: (0,)
    cycles: PickPlaceCycles | None
    hexapod_path: Any  # SegmentPath for a hexapod
    factors: tuple[Array, Array, Array]  # (n,) coulomb, static, viscous
    wear: tuple[WearTruth, ...]
    impacts: tuple[_Impact, ...]
    ambient_c: float


def _payload_at(scenario: Scenario, day: float) -> tuple[float, float | None]:
    tool = scenario.description.tool
    if scenario.description.family == "delta":
        mass, piece = float(tool.tool_mass_kg), float(tool.work_piece_mass_kg)  # type: ignore[union-attr]
    else:
        mass = float(tool.payload.mass_kg)  # type: ignore[union-attr]
        piece = float(tool.work_piece_mass_kg) if tool.work_piece_mass_kg > 0.0 else None  # the declared part
    for step in scenario.payload_steps:
        if step.day <= day:
            mass = step.tool_mass_kg if step.tool_mass_kg is not None else mass
            piece = step.work_piece_mass_kg if step.work_piece_mass_kg is not None else piece
    return mass, piece


def _direction(shape: ImpactShape, rng: np.random.Generator) -> Array:
    if shape.direction == "random":
        v = rng.normal(size=3)  # isotropic: a normalised Gaussian vector is uniform on the sphere
        return v / np.linalg.norm(v)
    if shape.direction == "horizontal":
        a = rng.uniform(0.0, 2.0 * np.pi)
        return np.array([np.cos(a), np.sin(a), 0.0])
    return np.asarray(shape.direction, dtype=float)


def _plan(scenario: Scenario, k: int) -> _Plan:
    rng = np.random.default_rng([scenario.seed, k])
    desc = scenario.description
    day = scenario.window_days[k]
    w_s = scenario.sampling.window_s
    n = desc.n_actuators
    mass, piece = _payload_at(scenario, day)
    cycles = None
    hexapod_path = None
    theta_fixture = np.zeros(0)
    if desc.family == "delta":
        picks = scenario.picks
        active = picks is not None and picks.start_day <= day < picks.end_day
        tolerance = float(desc.tool.work_piece_tolerance_kg)  # type: ignore[union-attr]
        cycles = delta_pick_place(
            rng,
            int(np.ceil(w_s / 0.8)) + 1,
            centre_m=np.asarray(desc.home_position_m, dtype=float) + np.array([-0.15, 0.0, 0.0]),
            tool_mass_kg=mass,
            workpiece_mass_mean_kg=float(piece),  # type: ignore[arg-type]
            workpiece_mass_std_kg=tolerance / 3.0,
            missed_pick_probability=picks.missed_fraction if active and picks else 0.0,
            double_pick_probability=picks.double_fraction if active and picks else 0.0,
        )
    else:
        nominal = desc.tool.payload_parameters()
        theta_fixture = nominal * (mass / float(nominal[0]))  # same centre of mass, inertia per kg unchanged
        per_kg = desc.tool.work_piece_parameters_per_kg()  # type: ignore[union-attr]
        theta_piece = None if per_kg is None or not piece else per_kg * piece  # the part's centre, inertia per kg kept
        home = np.asarray(desc.parameters.home_position_m, dtype=float)  # type: ignore[union-attr]
        hexapod_path = hexapod_positioning(
            rng,
            int(np.ceil(w_s / 0.9)) + 1,
            home_m=home,
            move_time_s=0.6,
            dwell_s=0.3,
            fixture_parameters=theta_fixture,
            part_parameters=theta_piece,
        )
    f = {term: np.ones(n) for term in ("coulomb", "static", "viscous")}
    wear = []
    for ramp in scenario.wear:
        factor = ramp.factor(day)
        for term in ramp.terms:
            f[term][ramp.actuator - 1] *= factor
        wear.append(WearTruth(ramp.actuator, ramp.progress(day), factor, ramp.terms))
    impacts: list[_Impact] = []
    spec = scenario.impacts
    if spec is not None:
        listed_here = any(item.window == k for item in spec.listed)
        if spec.window_fraction > 0.0 and rng.random() < spec.window_fraction:
            margin = min(0.5, 0.2 * w_s)
            offset = rng.uniform(margin, w_s - margin - spec.shape.duration_s)
            direction = _direction(spec.shape, rng)
            if not listed_here:  # a window with listed impacts gets no drawn one (they could overlap)
                impacts.append(_Impact(float(offset), spec.shape, direction, False))
        for item in spec.listed:
            if item.window == k:
                impacts.append(_Impact(item.offset_s, item.shape, _direction(item.shape, rng), True))
    return _Plan(
        index=k,
        day=day,
        tool_mass_kg=mass,
        work_piece_mass_kg=piece,
        theta_fixture=theta_fixture,
        cycles=cycles,
        hexapod_path=hexapod_path,
        factors=(f["coulomb"], f["static"], f["viscous"]),
        wear=tuple(wear),
        impacts=tuple(impacts),
        ambient_c=float(scenario.environment.ambient_c(day)),
    )


def _sensor_faults(scenario: Scenario, k: int, rng: np.random.Generator, rated_measured: Array) -> list[SensorFault]:
    """The concrete faults of window k from the declared ones (which apply, where, how big)."""
    w_s = scenario.sampling.window_s
    start = scenario.window_start_s(k)
    out = []
    for spec in scenario.sensor_faults:
        draw = rng.random()  # drawn for every declaration, so one declaration does not shift the next
        applies = k in spec.windows if spec.windows is not None else draw < spec.window_fraction
        offset_draw = rng.random()
        if not applies:
            continue
        out.append(_concrete(spec, start, w_s, offset_draw, rated_measured))
    return out


def _concrete(spec: SensorFaultSpec, start_s: float, w_s: float, u: float, rated_measured: Array) -> SensorFault:
    if spec.offset_s is not None:
        offset = spec.offset_s
        duration = spec.duration_s if spec.duration_s is not None else w_s - offset
    elif spec.duration_s is not None:
        offset = u * (w_s - spec.duration_s)  # the interval drawn uniformly inside the window
        duration = spec.duration_s
    else:
        offset, duration = 0.0, w_s
    size = 0.0 if spec.actuator is None else spec.size_rated_fraction * float(rated_measured[spec.actuator - 1])
    return SensorFault(
        kind=spec.kind,
        start_s=start_s + offset,
        duration_s=duration,
        actuator=spec.actuator,
        signal=spec.signal,
        size=size,
        count=spec.count,
        std_s=spec.std_s,
        delay_messages=spec.delay_messages,
    )


# ------------------------------------------------------------------------------------------------- runs
def _pulses(plans: list[_Plan], peak_unit_n: float, k_dof: int) -> list[PlatformPulse]:
    """One pulse object per (impact slot, profile) for the batch; peak 0 where a window has none."""
    b = len(plans)
    slots = max((len(p.impacts) for p in plans), default=0)
    pulses: list[PlatformPulse] = []
    for j in range(slots):
        for profile in PulseProfile:
            start, duration, peak = np.zeros(b), np.ones(b), np.zeros(b)
            direction = np.zeros((b, k_dof))
            for i, p in enumerate(plans):
                if j < len(p.impacts) and p.impacts[j].shape.profile is profile:
                    imp = p.impacts[j]
                    start[i], duration[i] = imp.offset_s, imp.shape.duration_s
                    peak[i] = imp.shape.peak_rated_fraction * peak_unit_n
                    direction[i, :3] = imp.direction  # hexapod: a pure force [f; 0] at the platform origin
            if peak.any():
                pulses.append(ShapedPulse(start, duration, peak, direction, profile))
    return pulses


def _run(scenario: Scenario, plans: list[_Plan], run_index: int) -> tuple[Any, StribeckFriction]:
    desc = scenario.description
    opts = scenario.plant
    step = scenario.sampling.sample_step_s
    effects = DemoEffects(
        coupling_frequency_hz=opts.structural_mode_hz,
        effort_noise_fraction=opts.effort_noise_rated_fraction,
        jitter_std_s=opts.timestamp_jitter_std_s,
    )
    plant, controller, sensors = demo_loop(
        desc, effects=effects, internal_step_s=step, mass_update=MassUpdate.EVERY_STEP
    )
    base = plant.config.friction
    if base is None:  # demo_loop always builds one
        raise RuntimeError("demo_loop built a plant without friction")
    worn = base.with_factors(
        coulomb=np.array([p.factors[0] for p in plans]),
        static=np.array([p.factors[1] for p in plans]),
        viscous=np.array([p.factors[2] for p in plans]),
    )  # (B, n) per window
    plant = Plant(
        plant.mechanism,
        dataclasses.replace(plant.config, friction=worn),
        internal_step_s=step,
        mass_update=MassUpdate.EVERY_STEP,
    )
    t = np.arange(round(scenario.sampling.window_s / step)) * step
    if desc.family == "delta":
        reference = delta_reference(plant.mechanism, [p.cycles.path for p in plans], t)[0]  # type: ignore[union-attr]
    else:
        reference = hexapod_reference(plant.mechanism, [p.hexapod_path.sample(t) for p in plans])
    ambient = np.array([p.ambient_c for p in plans])
    n = desc.n_actuators
    initial = np.broadcast_to((ambient + opts.drive_self_heating_k)[:, None], (len(plans), n)).copy()
    pulses = _pulses(plans, rated_platform_force_n(desc), plant.mechanism.platform_dof())
    rec = run_closed_loop(
        plant,
        controller,
        sensors,
        reference,
        np.random.default_rng([scenario.seed, 1, run_index]),
        sample_step_s=step,
        substeps=1,
        ambient_c=ambient,
        initial_temperature_c=initial,
        pulses=pulses,
    )
    return rec, worn


def _pick_faults(plan: _Plan, start_s: float, window_s: float) -> tuple[PickFaultTruth, ...]:
    if plan.cycles is None:
        return ()
    close, release = plan.cycles.grip_times_s()
    out = []
    for c in range(close.shape[0]):
        if close[c] >= window_s:
            break
        kind = "missed" if plan.cycles.missed[c] else "double" if plan.cycles.doubled[c] else None
        if kind is not None:
            out.append(PickFaultTruth(kind, c, start_s + float(close[c]), start_s + float(release[c]),
                                      float(plan.cycles.workpiece_mass_kg[c])))  # fmt: skip
    return tuple(out)


def _tuple(a: Array) -> tuple[float, ...]:
    return tuple(float(v) for v in np.asarray(a, dtype=float).reshape(-1))


def generate(scenario: Scenario) -> Iterator[ScenarioWindow]:
    """Simulate the scenario's windows in time order (see the module docstring); each is yielded when ready.

    Windows are simulated ``scenario.sampling.windows_per_run`` at a time in one batched closed-loop run.
    """
    desc = scenario.description
    samp = scenario.sampling
    n = desc.n_actuators
    drives = desc.parameters.drives
    rated = np.array([d.rated_effort for d in drives], dtype=float)
    current = drives[0].measured is MeasuredQuantity.MOTOR_CURRENT
    rated_measured = rated / current_to_effort_gains(drives) if current else rated
    n_samples = round(samp.window_s / samp.sample_step_s)
    per_window = math.ceil(n_samples / samp.samples_per_message)
    for run_index, first in enumerate(range(0, samp.windows, samp.windows_per_run)):
        indices = list(range(first, min(first + samp.windows_per_run, samp.windows)))
        plans = [_plan(scenario, k) for k in indices]
        rec, worn = _run(scenario, plans, run_index)
        viscous_ref = np.broadcast_to(worn.viscous_ref, (len(plans), n))
        v_s = np.broadcast_to(worn.stribeck_velocity, (len(plans), n))
        for i, plan in enumerate(plans):
            k = plan.index
            start = scenario.window_start_s(k)
            window = Window.from_record(
                rec, i, work_piece_masses_kg=None if plan.cycles is None else plan.cycles.workpiece_mass_kg.tolist()
            )
            first_seq = k * per_window
            published = window_batches(
                window,
                scenario.robot_id,
                start_s=start,
                first_seq=first_seq,
                samples_per_batch=samp.samples_per_message,
                family=desc.family,
            )
            fault_rng = np.random.default_rng([scenario.seed, k, 2])
            faults = _sensor_faults(scenario, k, fault_rng, rated_measured)
            delivered, injected = inject_sensor_faults(
                published, faults, fault_rng, sample_step_s=samp.sample_step_s, nominal_start_s=start
            )
            peak_unit = rated_platform_force_n(desc)
            truth = WindowTruth(
                index=k,
                day=plan.day,
                start_s=start,
                end_s=start + float(rec.t_s[-1]),
                first_seq=first_seq,
                last_seq=first_seq + len(published) - 1,
                n_published=len(published),
                n_delivered=len(delivered),
                ambient_c=plan.ambient_c,
                drive_temperature_start_c=_tuple(rec.temperature_c[i, 0]),
                drive_temperature_mean_c=_tuple(rec.temperature_c[i].mean(axis=0)),
                tool_mass_kg=plan.tool_mass_kg,
                work_piece_mass_kg=plan.work_piece_mass_kg,
                payload_parameters=(plan.tool_mass_kg,) if desc.family == "delta" else _tuple(plan.theta_fixture),
                carried_work_piece_masses_kg=() if plan.cycles is None else _tuple(plan.cycles.workpiece_mass_kg),
                friction=FrictionTruth(
                    coulomb=_tuple(rec.truth.friction_coulomb[i]),
                    static=_tuple(rec.truth.friction_static[i]),
                    viscous_ref=_tuple(viscous_ref[i]),
                    viscous_mean=_tuple(rec.truth.friction_viscous[i].mean(axis=0)),
                    stribeck_velocity=_tuple(v_s[i]),
                    reference_temperature_c=float(worn.reference_temperature_c),
                    coulomb_factor=_tuple(plan.factors[0]),
                    static_factor=_tuple(plan.factors[1]),
                    viscous_factor=_tuple(plan.factors[2]),
                ),
                wear=plan.wear,
                impacts=tuple(
                    ImpactTruth(
                        start_s=start + imp.offset_s,
                        duration_s=imp.shape.duration_s,
                        peak_n=imp.shape.peak_rated_fraction * peak_unit,
                        direction=(float(imp.direction[0]), float(imp.direction[1]), float(imp.direction[2])),
                        profile=imp.shape.profile.value,
                        listed=imp.listed,
                    )
                    for imp in plan.impacts
                ),
                pick_faults=_pick_faults(plan, start, samp.window_s),
                sensor_faults=tuple(injected),
            )
            yield ScenarioWindow(k, plan.day, start, truth.end_s, delivered, truth)


def simulated_seconds(scenario: Scenario) -> float:
    """Seconds of motion the scenario simulates (windows x window length) [s]."""
    return scenario.sampling.windows * scenario.sampling.window_s
