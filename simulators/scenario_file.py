"""Scenario files: a TOML description of a simulated stretch of a robot's life, loaded and validated.

The layout, key by key, is in docs/scenario-file.md. A scenario names the robot (an example description by
name, or a description file), a seed, a horizon of days sampled by short windows of simulated motion, the
environment (an ambient temperature cycle) and the faults: wear ramps of friction, payload steps, missed and
double picks, impacts, and sensor or transport faults on the published messages.

Every key carries its unit in its name (``window_s``, ``horizon_days``, ``tool_mass_kg``); unknown keys are
refused (typos), and every error is a :class:`~shadow.errors.ConfigurationError` whose message names the
file, the dotted key and the problem, e.g. ``wear.toml: faults.wear[0].actuator: must be 1 to 3 (this delta
has 3 actuators), got 4``.

Public API: :func:`load_scenario`, :func:`parse_scenario` and the records they return (:class:`Scenario` ...).
"""

from __future__ import annotations

import datetime as dt
import math
import tomllib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from shadow.errors import ConfigurationError, ShadowError
from shadow.ingest.wire import ROBOT_ID_PATTERN
from shadow.robots.description import RobotDescription, example_paths, load_description
from simulators.plant import PulseProfile
from simulators.sensor_faults import SensorFaultKind

FORMAT = "shadow-scenario/1"
SECONDS_PER_DAY = 86400.0
MIN_GAP_S = 1.0  # silence between two windows: longer than the monitor's gap limit, so it restarts there
WEAR_TERMS = ("coulomb", "static", "viscous")
DIRECTION_WORDS = ("random", "horizontal")
FAMILY_DEFAULTS = {"delta": (1e-3, 10), "hexapod": (4e-3, 5)}  # (sample step [s], samples per message)

# keys each sensor fault kind takes besides kind, windows, window_fraction, offset_s, duration_s
SENSOR_KEYS = {
    SensorFaultKind.SPIKE: ("actuator", "size_rated_fraction", "count"),
    SensorFaultKind.STUCK: ("actuator", "signal"),
    SensorFaultKind.CLOCK_JITTER: ("std_s",),
    SensorFaultKind.DROPOUT: (),
    SensorFaultKind.OUT_OF_ORDER: ("count", "delay_messages"),
    SensorFaultKind.DUPLICATE: ("count",),
}
# default duration [s] of a sensor fault's interval; None: from its offset to the end of the window
SENSOR_DEFAULT_DURATION_S = {SensorFaultKind.DROPOUT: 0.1, SensorFaultKind.STUCK: 0.5}

_MISSING = object()


# ------------------------------------------------------------------------------------------------ records
@dataclass(frozen=True, slots=True)
class Sampling:
    """How the horizon is sampled: ``windows`` windows of ``window_s`` of motion each."""

    windows: int
    window_s: float
    spacing: str  # "even", "random" or "listed"
    days: tuple[float, ...] | None  # listed start days
    sample_step_s: float
    samples_per_message: int
    windows_per_run: int  # windows simulated side by side (one batched run; part of the noise realisation)


@dataclass(frozen=True, slots=True)
class PlantOptions:
    """Effect sizes of the simulated plant (see simulators.run.DemoEffects)."""

    structural_mode_hz: float | None
    effort_noise_rated_fraction: float
    timestamp_jitter_std_s: float
    drive_self_heating_k: float  # drive temperature above ambient at the start of every window [K]


@dataclass(frozen=True, slots=True)
class Environment:
    """Ambient temperature ``T(d) = mean + A cos(2 pi (d - d_peak) / P)`` [degC], d in days."""

    ambient_mean_c: float
    ambient_amplitude_k: float
    ambient_period_days: float
    ambient_peak_day: float

    def ambient_c(self, day: float | np.ndarray) -> np.ndarray:
        """Ambient temperature at ``day`` [degC]."""
        phase = 2.0 * np.pi * (np.asarray(day, dtype=float) - self.ambient_peak_day) / self.ambient_period_days
        return self.ambient_mean_c + self.ambient_amplitude_k * np.cos(phase)


@dataclass(frozen=True, slots=True)
class WearRamp:
    """Friction of one actuator rising linearly by ``rise_fraction`` from ``start_day`` to ``end_day``."""

    actuator: int  # 1-based
    rise_fraction: float
    start_day: float
    end_day: float
    terms: tuple[str, ...]  # of WEAR_TERMS

    def progress(self, day: float) -> float:
        """0 before the start, 1 after the end, linear in between."""
        return float(np.clip((day - self.start_day) / (self.end_day - self.start_day), 0.0, 1.0))

    def factor(self, day: float) -> float:
        """Friction factor of the ramp's terms at ``day``: 1 + rise_fraction * progress."""
        return 1.0 + self.rise_fraction * self.progress(day)


@dataclass(frozen=True, slots=True)
class PayloadStep:
    """From ``day`` on, the tool (and for a delta the work piece) has a new mass; None keeps the previous one."""

    day: float
    tool_mass_kg: float | None
    work_piece_mass_kg: float | None


@dataclass(frozen=True, slots=True)
class PickFaults:
    """Share of delta picks that close on nothing or lift two pieces, between two days."""

    missed_fraction: float
    double_fraction: float
    start_day: float
    end_day: float


@dataclass(frozen=True, slots=True)
class ImpactShape:
    """Peak (fraction of the rated platform force), duration, direction and profile of an impact pulse."""

    peak_rated_fraction: float
    duration_s: float
    direction: tuple[float, ...] | str  # unit vector (3,), or "random" / "horizontal" (drawn per impact)
    profile: PulseProfile


@dataclass(frozen=True, slots=True)
class ListedImpact:
    """An impact at ``offset_s`` into window ``window`` (0-based)."""

    window: int
    offset_s: float
    shape: ImpactShape


@dataclass(frozen=True, slots=True)
class Impacts:
    """Impacts drawn in a share of the windows, plus listed ones."""

    window_fraction: float
    shape: ImpactShape
    listed: tuple[ListedImpact, ...]


@dataclass(frozen=True, slots=True)
class SensorFaultSpec:
    """A sensor fault as declared: in which windows, where in the window, and its parameters."""

    kind: SensorFaultKind
    windows: tuple[int, ...] | None  # listed windows, or None for window_fraction
    window_fraction: float
    offset_s: float | None  # None: drawn per window
    duration_s: float | None  # None: to the end of the window
    actuator: int | None = None
    signal: str = "effort"
    size_rated_fraction: float = 0.0
    count: int = 1
    std_s: float = 0.0
    delay_messages: int = 1


@dataclass(frozen=True, slots=True)
class Scenario:
    """A loaded, validated scenario file."""

    source: Path
    name: str
    summary: str
    robot: str  # as written in the file
    description: RobotDescription
    robot_id: str
    seed: int
    start_s: float  # Unix time of day 0 [s]
    horizon_days: float
    sampling: Sampling
    plant: PlantOptions
    environment: Environment
    wear: tuple[WearRamp, ...]
    payload_steps: tuple[PayloadStep, ...]  # sorted by day
    picks: PickFaults | None
    impacts: Impacts | None
    sensor_faults: tuple[SensorFaultSpec, ...]
    window_days: tuple[float, ...]  # start day of every window

    def window_start_s(self, index: int) -> float:
        """Unix time of window ``index``'s first sample [s]."""
        return self.start_s + self.window_days[index] * SECONDS_PER_DAY


# ------------------------------------------------------------------------------------------------ reading
class _Table:
    """A TOML table with the dotted path of its keys, for checked reads and error messages."""

    def __init__(self, data: Any, path: str, source: str) -> None:
        self.path = path
        self.source = source
        if not isinstance(data, dict):
            raise self.error(None, f"must be a table, got {_kind(data)}")
        self.data: dict[str, Any] = data
        self.used: set[str] = set()

    def key(self, key: str | None) -> str:
        if key is None:
            return self.path
        return f"{self.path}.{key}" if self.path else key

    def error(self, key: str | None, problem: str) -> ConfigurationError:
        return ConfigurationError(f"{self.source}: {self.key(key)}: {problem}")

    def has(self, key: str) -> bool:
        return key in self.data

    def raw(self, key: str, default: Any = _MISSING) -> Any:
        self.used.add(key)
        if key not in self.data:
            if default is _MISSING:
                raise self.error(key, "missing (required)")
            return default
        return self.data[key]

    def number(
        self,
        key: str,
        default: Any = _MISSING,
        *,
        minimum: float | None = None,
        maximum: float | None = None,
        above: float | None = None,
        below: float | None = None,
        integer: bool = False,
    ) -> Any:
        value = self.raw(key, default)
        if value is default and key not in self.data:
            return value
        wanted = "an integer" if integer else "a number"
        if isinstance(value, bool) or not isinstance(value, int | float) or (integer and not isinstance(value, int)):
            raise self.error(key, f"must be {wanted}, got {_kind(value)} {value!r}")
        if not math.isfinite(value):
            raise self.error(key, f"must be finite, got {value!r}")
        if minimum is not None and value < minimum:
            raise self.error(key, f"must be >= {minimum:g}, got {value!r}")
        if maximum is not None and value > maximum:
            raise self.error(key, f"must be <= {maximum:g}, got {value!r}")
        if above is not None and value <= above:
            raise self.error(key, f"must be > {above:g}, got {value!r}")
        if below is not None and value >= below:
            raise self.error(key, f"must be < {below:g}, got {value!r}")
        return int(value) if integer else float(value)

    def string(self, key: str, default: Any = _MISSING, *, choices: Sequence[str] | None = None) -> Any:
        value = self.raw(key, default)
        if value is default and key not in self.data:
            return value
        if not isinstance(value, str):
            raise self.error(key, f"must be a string, got {_kind(value)} {value!r}")
        if choices is not None and value not in choices:
            raise self.error(key, f"must be one of {', '.join(repr(c) for c in choices)}, got {value!r}")
        return value

    def table(self, key: str) -> _Table | None:
        value = self.raw(key, None)
        return None if value is None else _Table(value, self.key(key), self.source)

    def tables(self, key: str) -> list[_Table]:
        value = self.raw(key, [])
        if not isinstance(value, list):
            raise self.error(key, f"must be an array of tables ([[{self.key(key)}]]), got {_kind(value)}")
        return [_Table(item, f"{self.key(key)}[{i}]", self.source) for i, item in enumerate(value)]

    def list_of(self, key: str, kind: type, default: Any = _MISSING) -> Any:
        value = self.raw(key, default)
        if value is default and key not in self.data:
            return value
        if not isinstance(value, list):
            raise self.error(key, f"must be an array, got {_kind(value)} {value!r}")
        for i, item in enumerate(value):
            ok = isinstance(item, kind) and not isinstance(item, bool)
            if kind is float:
                ok = isinstance(item, int | float) and not isinstance(item, bool) and math.isfinite(item)
            if not ok:
                wanted = "number" if kind is float else kind.__name__
                raise self.error(f"{key}[{i}]", f"must be a {wanted}, got {_kind(item)} {item!r}")
        return [float(v) for v in value] if kind is float else list(value)

    def finish(self, hint: str = "") -> None:
        unknown = [k for k in self.data if k not in self.used]
        if unknown:
            known = ", ".join(sorted(self.used))
            raise self.error(unknown[0], f"unknown key{hint} (known here: {known})")


def _kind(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, int | float):
        return "a number"
    if isinstance(value, dt.datetime | dt.date | dt.time):
        return "a date/time"
    return type(value).__name__


def _start_s(top: _Table) -> float:
    value = top.raw("start", dt.datetime(2026, 1, 5, 6, 0, tzinfo=dt.UTC))
    if isinstance(value, str):
        try:
            value = dt.datetime.fromisoformat(value.replace("Z", "+00:00"))
        except ValueError as exc:
            raise top.error("start", f"not an ISO 8601 date and time: {value!r}") from exc
    if not isinstance(value, dt.datetime):
        raise top.error("start", f"must be a date and time with offset (e.g. 2026-03-02T06:00:00Z), got {value!r}")
    if value.tzinfo is None:
        raise top.error("start", f"needs a UTC offset (e.g. 'Z' or '+01:00'), got {value.isoformat()}")
    return value.timestamp()


def _robot(top: _Table, base: Path) -> tuple[str, RobotDescription]:
    given = top.string("robot")
    examples = {p.stem: p for p in example_paths()}
    path = examples.get(given)
    if path is None:
        candidate = Path(given)
        path = candidate if candidate.is_absolute() else base / candidate
        if not path.is_file():
            raise top.error(
                "robot",
                f"{given!r} is neither an example robot ({', '.join(sorted(examples))}) nor a file (looked for {path})",
            )
    try:
        return given, load_description(path)
    except ShadowError as exc:
        raise top.error("robot", f"the description does not load: {exc}") from exc


def _sampling(top: _Table, family: str, horizon_days: float) -> Sampling:
    t = top.table("sampling")
    if t is None:
        raise top.error("sampling", "missing (required): the windows that sample the horizon")
    step_default, per_message_default = FAMILY_DEFAULTS[family]
    windows = t.number("windows", minimum=1, integer=True)
    window_s = t.number("window_s", above=0.0)
    spacing = t.string("spacing", "even", choices=("even", "random", "listed"))
    step = t.number("sample_step_s", step_default, above=0.0, maximum=0.1)
    per_message = t.number("samples_per_message", per_message_default, minimum=1, maximum=10000, integer=True)
    per_run = t.number("windows_per_run", 8, minimum=1, maximum=256, integer=True)
    days = None
    if spacing == "listed":
        days = tuple(t.list_of("days", float))
        if len(days) != windows:
            raise t.error("days", f"lists {len(days)} days but windows = {windows}")
    elif t.has("days"):
        t.raw("days")
        raise t.error("days", f"only with spacing = 'listed' (spacing is {spacing!r})")
    t.finish()
    if window_s < 10 * step:
        raise t.error("window_s", f"{window_s} s is shorter than 10 samples of {step} s")
    window_days = window_s / SECONDS_PER_DAY
    gap_days = MIN_GAP_S / SECONDS_PER_DAY
    if window_days * windows + gap_days * (windows - 1) > horizon_days:
        raise t.error(
            "windows", f"{windows} windows of {window_s} s, {MIN_GAP_S:g} s apart, do not fit in {horizon_days} days"
        )
    if days is not None:
        for i, d in enumerate(days):
            if not 0.0 <= d <= horizon_days - window_days:
                raise t.error(f"days[{i}]", f"{d} is outside the horizon (0 to {horizon_days} days less one window)")
            if i and d < days[i - 1] + window_days + gap_days:
                raise t.error(
                    f"days[{i}]",
                    f"{d} starts less than {MIN_GAP_S:g} s after window {i - 1} (day {days[i - 1]}) has ended",
                )
    return Sampling(windows, window_s, spacing, days, step, per_message, per_run)


def _window_days(sampling: Sampling, horizon_days: float, seed: int) -> tuple[float, ...]:
    """Start day of each window: even (first at day 0, last ending at the horizon), random, or listed."""
    n, w, g = sampling.windows, sampling.window_s / SECONDS_PER_DAY, MIN_GAP_S / SECONDS_PER_DAY
    if sampling.days is not None:
        return sampling.days
    if sampling.spacing == "even":
        if n == 1:
            return (0.0,)
        return tuple(float(k * (horizon_days - w) / (n - 1)) for k in range(n))
    # random: n sorted uniform draws on the horizon less the windows and their gaps, then shifted apart by
    # them, so windows never overlap (order statistics of the free time)
    free = np.sort(np.random.default_rng([seed, 0x5CE7]).uniform(0.0, horizon_days - n * w - (n - 1) * g, size=n))
    return tuple(float(d + k * (w + g)) for k, d in enumerate(free))


def _plant(top: _Table) -> PlantOptions:
    t = top.table("plant") or _Table({}, "plant", top.source)
    mode = t.number("structural_mode_hz", None, above=0.0)
    options = PlantOptions(
        structural_mode_hz=mode,
        effort_noise_rated_fraction=t.number("effort_noise_rated_fraction", 0.002, minimum=0.0, maximum=0.5),
        timestamp_jitter_std_s=t.number("timestamp_jitter_std_s", 2e-6, minimum=0.0, maximum=1e-3),
        drive_self_heating_k=t.number("drive_self_heating_k", 10.0, minimum=0.0, maximum=100.0),
    )
    t.finish()
    return options


def _environment(top: _Table) -> Environment:
    t = top.table("environment") or _Table({}, "environment", top.source)
    env = Environment(
        ambient_mean_c=t.number("ambient_mean_c", 24.0, minimum=-40.0, maximum=80.0),
        ambient_amplitude_k=t.number("ambient_amplitude_k", 0.0, minimum=0.0, maximum=40.0),
        ambient_period_days=t.number("ambient_period_days", 1.0, above=0.0),
        ambient_peak_day=t.number("ambient_peak_day", 0.375),  # 15:00 when day 0 starts at 06:00
    )
    t.finish()
    return env


def _day_range(t: _Table, horizon_days: float, *, start_default: Any, end_default: Any) -> tuple[float, float]:
    start = t.number("start_day", start_default, minimum=0.0, maximum=horizon_days)
    end = t.number("end_day", end_default, minimum=0.0, maximum=horizon_days)
    if end <= start:
        raise t.error("end_day", f"{end} must be after start_day {start}")
    return start, end


def _actuator(t: _Table, description: RobotDescription) -> int:
    n = description.n_actuators
    a = t.number("actuator", integer=True)
    if not 1 <= a <= n:
        raise t.error("actuator", f"must be 1 to {n} (this {description.family} has {n} actuators), got {a}")
    return int(a)


def _wear(faults: _Table, description: RobotDescription, horizon_days: float) -> tuple[WearRamp, ...]:
    ramps = []
    for t in faults.tables("wear"):
        actuator = _actuator(t, description)
        rise = t.number("rise_fraction", minimum=0.0, maximum=10.0)
        start, end = _day_range(t, horizon_days, start_default=0.0, end_default=horizon_days)
        terms = tuple(t.list_of("terms", str, ["coulomb", "viscous"]))
        for i, term in enumerate(terms):
            if term not in WEAR_TERMS:
                raise t.error(f"terms[{i}]", f"must be one of {', '.join(WEAR_TERMS)}, got {term!r}")
        if not terms or len(set(terms)) != len(terms):
            raise t.error("terms", f"must name at least one term, each once, got {list(terms)}")
        t.finish()
        ramps.append(WearRamp(actuator, rise, start, end, terms))
    return tuple(ramps)


def _payload_steps(faults: _Table, description: RobotDescription, horizon_days: float) -> tuple[PayloadStep, ...]:
    steps = []
    for t in faults.tables("payload_steps"):
        day = t.number("day", minimum=0.0, maximum=horizon_days)
        tool = t.number("tool_mass_kg", None, above=0.0, maximum=1000.0)
        piece = None
        if t.has("work_piece_mass_kg"):
            if description.tool.work_piece_mass_kg <= 0.0:
                t.raw("work_piece_mass_kg")
                raise t.error(
                    "work_piece_mass_kg",
                    f"this {description.family}'s description declares no work piece or part to change the mass of",
                )
            piece = t.number("work_piece_mass_kg", minimum=0.0, maximum=100.0)
        if tool is None and piece is None:
            raise t.error(None, "needs tool_mass_kg or work_piece_mass_kg (the new mass)")
        t.finish()
        steps.append(PayloadStep(day, tool, piece))
    return tuple(sorted(steps, key=lambda s: s.day))


def _picks(faults: _Table, description: RobotDescription, horizon_days: float) -> PickFaults | None:
    t = faults.table("picks")
    if t is None:
        return None
    if description.family != "delta":
        raise t.error(None, f"only a delta picks work pieces; this robot is a {description.family}")
    missed = t.number("missed_fraction", 0.0, minimum=0.0, maximum=1.0)
    double = t.number("double_fraction", 0.0, minimum=0.0, maximum=1.0)
    if missed + double > 1.0:
        raise t.error("double_fraction", f"missed_fraction + double_fraction = {missed + double:g} exceeds 1")
    start, end = _day_range(t, horizon_days, start_default=0.0, end_default=horizon_days)
    t.finish()
    return PickFaults(missed, double, start, end)


def _impact_shape(t: _Table, default: ImpactShape | None) -> ImpactShape:
    d = default
    peak = t.number("peak_rated_fraction", d.peak_rated_fraction if d else 0.3, above=0.0, maximum=5.0)
    duration = t.number("duration_s", d.duration_s if d else 0.03, above=0.0, maximum=5.0)
    raw = t.raw("direction", d.direction if d else "random")
    direction: tuple[float, ...] | str
    if isinstance(raw, str):
        if raw not in DIRECTION_WORDS:
            raise t.error(
                "direction", f"must be {' or '.join(repr(w) for w in DIRECTION_WORDS)} or [x, y, z], got {raw!r}"
            )
        direction = raw
    else:
        vec = t.list_of("direction", float)
        norm = math.sqrt(sum(v * v for v in vec))
        if len(vec) != 3 or norm == 0.0:
            raise t.error("direction", f"must be a non-zero [x, y, z] force direction, got {raw!r}")
        direction = tuple(v / norm for v in vec)
    profiles = [p.value for p in PulseProfile]
    profile = PulseProfile(t.string("profile", d.profile.value if d else "half_sine", choices=profiles))
    return ImpactShape(peak, duration, direction, profile)


def _impacts(faults: _Table, sampling: Sampling) -> Impacts | None:
    t = faults.table("impacts")
    if t is None:
        return None
    fraction = t.number("window_fraction", 0.0, minimum=0.0, maximum=1.0)
    shape = _impact_shape(t, None)
    if fraction > 0.0 and shape.duration_s + 2 * _impact_margin_s(sampling.window_s) > sampling.window_s:
        raise t.error("duration_s", f"{shape.duration_s} s does not fit a window of {sampling.window_s} s")
    listed = []
    for item in t.tables("listed"):
        window = item.number("window", minimum=0, integer=True)
        if window >= sampling.windows:
            raise item.error(
                "window", f"must be 0 to {sampling.windows - 1} (there are {sampling.windows}), got {window}"
            )
        offset = item.number("offset_s", minimum=0.0)
        own = _impact_shape(item, shape)
        if offset + own.duration_s > sampling.window_s:
            raise item.error(
                "offset_s", f"{offset} s + {own.duration_s} s runs past the window's {sampling.window_s} s"
            )
        item.finish()
        listed.append(ListedImpact(window, offset, own))
    t.finish()
    return Impacts(fraction, shape, tuple(listed))


def _impact_margin_s(window_s: float) -> float:
    """Drawn impacts keep this far from the window's ends [s] (the monitor settles after a gap)."""
    return min(0.5, 0.2 * window_s)


def _sensor_faults(faults: _Table, description: RobotDescription, sampling: Sampling) -> tuple[SensorFaultSpec, ...]:
    specs = []
    kinds = [k.value for k in SensorFaultKind]
    for t in faults.tables("sensor"):
        kind = SensorFaultKind(t.string("kind", choices=kinds))
        windows = None
        fraction = 0.0
        if t.has("windows"):
            windows = tuple(t.list_of("windows", int))
            for i, w in enumerate(windows):
                if not 0 <= w < sampling.windows:
                    raise t.error(f"windows[{i}]", f"must be 0 to {sampling.windows - 1}, got {w}")
            if t.has("window_fraction"):
                t.raw("window_fraction")
                raise t.error("window_fraction", "give either windows or window_fraction, not both")
        else:
            fraction = t.number("window_fraction", 1.0, above=0.0, maximum=1.0)
        offset = t.number("offset_s", None, minimum=0.0, below=sampling.window_s)
        default = SENSOR_DEFAULT_DURATION_S.get(kind)
        default = None if default is None else min(default, 0.25 * sampling.window_s)  # short windows: a quarter
        duration = t.number("duration_s", default, above=0.0)
        if duration is not None and (offset or 0.0) + duration > sampling.window_s:
            raise t.error(
                "duration_s", f"{offset or 0.0} s + {duration} s runs past the window's {sampling.window_s} s"
            )
        extra: dict[str, Any] = {}
        own = SENSOR_KEYS[kind]
        if "actuator" in own:
            extra["actuator"] = _actuator(t, description)
        if "signal" in own:
            extra["signal"] = t.string("signal", "effort", choices=("effort", "position"))
        if "size_rated_fraction" in own:
            extra["size_rated_fraction"] = t.number("size_rated_fraction", above=0.0, maximum=10.0)
        if "count" in own:
            extra["count"] = t.number("count", 1, minimum=1, maximum=10000, integer=True)
        if "std_s" in own:
            extra["std_s"] = t.number("std_s", above=0.0, maximum=1.0)
        if "delay_messages" in own:
            extra["delay_messages"] = t.number("delay_messages", 1, minimum=1, maximum=1000, integer=True)
        t.finish(f" for a {kind.value!r} fault")
        specs.append(SensorFaultSpec(kind, windows, fraction, offset, duration, **extra))
    return tuple(specs)


def parse_scenario(text: str, source: str = "<scenario>", *, base_dir: Path | None = None) -> Scenario:
    """Parse and validate a scenario from TOML text; ``base_dir`` resolves a relative robot path.

    Raises
    ------
    ConfigurationError naming ``source``, the dotted key and the problem.
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigurationError(f"{source}: not valid TOML: {exc}") from exc
    top = _Table(data, "", source)
    fmt = top.raw("format")
    if fmt != FORMAT:
        raise top.error("format", f"expected {FORMAT!r} (this reader knows version 1), got {fmt!r}")
    name = top.string("name")
    summary = top.string("summary", "")
    robot, description = _robot(top, base_dir or Path.cwd())
    robot_id = top.string("robot_id", description.name)
    seed = top.number("seed", minimum=0, integer=True)
    start_s = _start_s(top)
    horizon = top.number("horizon_days", above=0.0, maximum=3650.0)
    sampling = _sampling(top, description.family, horizon)
    plant = _plant(top)
    environment = _environment(top)
    faults = top.table("faults") or _Table({}, "faults", source)
    wear = _wear(faults, description, horizon)
    steps = _payload_steps(faults, description, horizon)
    picks = _picks(faults, description, horizon)
    impacts = _impacts(faults, sampling)
    sensor = _sensor_faults(faults, description, sampling)
    faults.finish()
    top.finish()
    if ROBOT_ID_PATTERN.fullmatch(robot_id) is None:
        raise top.error("robot_id", f"{robot_id!r} must be 1-64 of A-Z a-z 0-9 . _ - and start with a letter or digit")
    return Scenario(
        source=Path(source),
        name=name,
        summary=summary,
        robot=robot,
        description=description,
        robot_id=robot_id,
        seed=seed,
        start_s=start_s,
        horizon_days=horizon,
        sampling=sampling,
        plant=plant,
        environment=environment,
        wear=wear,
        payload_steps=steps,
        picks=picks,
        impacts=impacts,
        sensor_faults=sensor,
        window_days=_window_days(sampling, horizon, seed),
    )


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario file (docs/scenario-file.md).

    Raises
    ------
    ConfigurationError naming the file, the dotted key and the problem.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigurationError(f"{p}: cannot read the scenario: {exc.strerror or exc}") from exc
    return parse_scenario(text, str(p), base_dir=p.resolve().parent)


def example_scenarios() -> list[Path]:
    """The example scenarios shipped with the simulators (simulators/scenarios/*.toml), sorted by name."""
    return sorted((Path(__file__).resolve().parent / "scenarios").glob("*.toml"))
