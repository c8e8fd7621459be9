"""Wire format v1 of shadow: one message carries a batch of samples of one robot.

Pure code: no sockets, no clock, no logging. The MQTT adapter hands payload bytes to
:func:`decode_message` (or :func:`decode_json` / :func:`decode_binary`) and gets a :class:`SampleBatch`
or a :class:`~shadow.errors.RejectedMessageError` whose ``reason_code`` goes to a counter and whose
message names the field. The simulator publishes with :func:`encode_json` / :func:`encode_binary`.
The format is specified field by field and byte by byte in docs/wire-format.md; the JSON form also has
a JSON Schema (draft 2020-12) in ``shadow/ingest/schema/samples-v1.schema.json``.

Fields of a batch (N samples, n actuators; units fixed by the format, SI)
------------------------------------------------------------------------
t             : (N,)   sample times, float64 seconds since 1970-01-01T00:00:00Z (Unix time, UTC),
                       strictly increasing. float64 resolves about 0.24 us at today's epoch seconds.
q             : (N, n) actuator positions [rad] (rotary, delta) or [m] (linear, hexapod legs)
qd            : (N, n) actuator velocities [rad/s | m/s], optional
effort        : (N, n) measured joint-side efforts [N m | N], present iff effort_kind is EFFORT
current       : (N, n) torque-producing motor currents [A], present iff effort_kind is MOTOR_CURRENT
temperature_k : (N, n) drive temperatures [K], optional
gripping      : (N,)   tool state, True while the tool holds a part, optional
seq           : per-robot message sequence number, uint64, +1 per message; :class:`SequenceTracker` sorts
                out duplicates, reorderings, gaps and restarts

Unit strings are case-sensitive UCUM codes (Unified Code for Units of Measure): ``s``, ``rad``, ``m``,
``rad/s``, ``m/s``, ``N.m``, ``N``, ``A``, ``K``. A JSON message must declare, in its ``units`` object, exactly
the unit of each signal it carries, and it must be the one the format fixes; anything else is rejected
(``bad_unit``), so a controller sending degrees or Celsius is caught instead of silently misread.
"""

from __future__ import annotations

import enum
import importlib.resources
import json
import math
import re
import struct
from collections.abc import Mapping
from dataclasses import dataclass, field
from itertools import chain
from typing import Any, cast

import numpy as np
from numpy.typing import NDArray

from shadow.errors import DescriptionError, RejectedMessageError, expect_shape
from shadow.robots.parameters import DeltaParameters, HexapodParameters, MeasuredQuantity

__all__ = [
    "BINARY_HEADER",
    "BINARY_MAGIC",
    "DropKind",
    "Dropped",
    "Flag",
    "Gap",
    "MAX_ACTUATORS",
    "MAX_MESSAGE_BYTES",
    "PlausibilityLimits",
    "PositionUnit",
    "ROBOT_ID_PATTERN",
    "Released",
    "Restart",
    "SCHEMA_VERSION",
    "SampleBatch",
    "SequenceTracker",
    "TrackerEvent",
    "TrackerState",
    "check_plausible",
    "decode_binary",
    "decode_json",
    "decode_message",
    "encode_binary",
    "encode_json",
    "expected_units",
    "load_json_schema",
    "track_flush",
    "track_step",
]

SCHEMA_VERSION = 1
MAX_MESSAGE_BYTES = 1 << 20  # 1 MiB, checked before any parsing
MAX_ACTUATORS = 64
ROBOT_ID_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")  # also a valid MQTT topic level
MAX_SEQ = (1 << 64) - 1

BINARY_MAGIC = b"SHB\x1a"  # "SHB" + SUB (0x1a): never the first bytes of a UTF-8 JSON text
BINARY_HEADER = struct.Struct("<4sBBHIQB")  # magic, version, flags, n, N, seq, robot id length: 21 bytes
_FLOAT32_MAX = float(np.finfo(np.float32).max)
_ALIGN = 8  # signal blocks start on a multiple of 8 bytes from the start of the message

Array = NDArray[np.float64]


class PositionUnit(enum.Enum):
    """Kind of actuator coordinate: rotary joints in radians or linear legs in metres."""

    RAD = "rad"
    M = "m"


class Flag(enum.IntFlag):
    """Bits of the binary flags byte (offset 5)."""

    VELOCITY = 0x01  # qd block present
    TEMPERATURE = 0x02  # temperature block present
    GRIPPING = 0x04  # gripping block present
    MOTOR_CURRENT = 0x08  # the effort block holds motor currents [A] (clear: efforts [N m | N])
    LINEAR = 0x10  # positions in m (clear: rad)
    FLOAT32 = 0x20  # q, qd, effort/current, temperature blocks are float32 (clear: float64); t is always float64


_KNOWN_FLAGS = int(Flag.VELOCITY | Flag.TEMPERATURE | Flag.GRIPPING | Flag.MOTOR_CURRENT | Flag.LINEAR | Flag.FLOAT32)
_F_VELOCITY, _F_TEMPERATURE, _F_GRIPPING = int(Flag.VELOCITY), int(Flag.TEMPERATURE), int(Flag.GRIPPING)
_F_MOTOR_CURRENT, _F_LINEAR, _F_FLOAT32 = int(Flag.MOTOR_CURRENT), int(Flag.LINEAR), int(Flag.FLOAT32)


def _reject(code: str, reason: str) -> RejectedMessageError:
    return RejectedMessageError(code, reason)


def expected_units(
    position_unit: PositionUnit,
    effort_kind: MeasuredQuantity,
    *,
    velocity: bool,
    temperature: bool,
) -> dict[str, str]:
    """The ``units`` object a JSON message with these signals must carry (UCUM codes).

    >>> expected_units(PositionUnit.RAD, MeasuredQuantity.EFFORT, velocity=True, temperature=False)
    {'time': 's', 'position': 'rad', 'velocity': 'rad/s', 'effort': 'N.m'}
    """
    rotary = position_unit is PositionUnit.RAD
    units = {"time": "s", "position": position_unit.value}
    if velocity:
        units["velocity"] = "rad/s" if rotary else "m/s"
    if effort_kind is MeasuredQuantity.EFFORT:
        units["effort"] = "N.m" if rotary else "N"
    else:
        units["current"] = "A"
    if temperature:
        units["temperature"] = "K"
    return units


def _frozen_float(name: str, value: Any, shape: tuple[int | None, ...]) -> Array:
    """float64 read-only copy of ``value`` with the given shape (None = any length >= 1), finite."""
    if isinstance(value, np.ndarray) and value.dtype == np.float64:
        a = value.copy()  # the binary decoder's blocks: no conversion, so no floating-point exception to silence
    else:
        try:
            with np.errstate(all="ignore"):  # a signalling NaN from the wire is reported below, not warned about
                a = np.array(value, dtype=np.float64)
        except (TypeError, ValueError, OverflowError) as exc:
            raise _reject("bad_field", f"{name}: not an array of numbers ({exc})") from None
    _check_shape(name, a, shape)
    if not np.isfinite(a).all():
        first = tuple(int(i) for i in np.argwhere(~np.isfinite(a))[0])
        raise _reject("non_finite", f"{name}: non-finite value {float(a[first])!r} at index {first}")
    a.setflags(write=False)
    return a


def _check_shape(name: str, a: NDArray[Any], shape: tuple[int | None, ...]) -> None:
    ok = a.ndim == len(shape) and all(s is None or s == d for s, d in zip(shape, a.shape, strict=False))
    if not ok:
        labels = [
            ("N" if i == 0 else "n") if s is None else str(s) for i, s in enumerate(shape)
        ]  # N samples, n actuators
        wanted = "(" + ", ".join(labels) + (",)" if len(shape) == 1 else ")")
        raise _reject("bad_shape", f"{name}: expected shape {wanted}, got {a.shape}")


@dataclass(frozen=True, slots=True, eq=False)
class SampleBatch:
    """A decoded, structurally valid batch of N samples of one robot's n actuators.

    Building one checks everything that does not need the robot description: robot id, seq range,
    N >= 1, 1 <= n <= 64, shapes consistent, all numbers finite, t strictly increasing, exactly one of
    ``effort``/``current`` as ``effort_kind`` says. Arrays are stored as read-only float64 copies
    (``gripping`` as read-only bool); any array-like (nested lists included) may be passed in.
    Plausibility against the robot is :func:`check_plausible`. Raises :class:`~shadow.errors.RejectedMessageError`.
    Equality is not defined (arrays); compare fields.
    """

    robot_id: str
    seq: int
    position_unit: PositionUnit
    effort_kind: MeasuredQuantity
    t: Array  # (N,) [s since Unix epoch, UTC]
    q: Array  # (N, n) [rad | m]
    qd: Array | None = None  # (N, n) [rad/s | m/s]
    effort: Array | None = None  # (N, n) [N m | N]
    current: Array | None = None  # (N, n) [A]
    temperature_k: Array | None = None  # (N, n) [K]
    gripping: NDArray[np.bool_] | None = None  # (N,)
    schema_version: int = field(default=SCHEMA_VERSION)

    def __post_init__(self) -> None:
        if self.schema_version != SCHEMA_VERSION:
            raise _reject("bad_version", f"version: {self.schema_version!r} is not supported (this reader: 1)")
        if not isinstance(self.robot_id, str) or ROBOT_ID_PATTERN.fullmatch(self.robot_id) is None:
            raise _reject(
                "bad_robot_id",
                f"robot: {self.robot_id!r} must be 1-64 of A-Z a-z 0-9 . _ - and start with a letter or digit",
            )
        if isinstance(self.seq, bool) or not isinstance(self.seq, int | np.integer) or not 0 <= self.seq <= MAX_SEQ:
            raise _reject("bad_seq", f"seq: {self.seq!r} is not an integer in [0, 2**64 - 1]")
        object.__setattr__(self, "seq", int(self.seq))
        if not isinstance(self.position_unit, PositionUnit):
            raise _reject("bad_unit", f"position_unit: {self.position_unit!r} is not a PositionUnit")
        if not isinstance(self.effort_kind, MeasuredQuantity):
            raise _reject("bad_field", f"effort_kind: {self.effort_kind!r} is not a MeasuredQuantity")
        t = _frozen_float("time", self.t, (None,))
        if t.shape[0] < 1:
            raise _reject("bad_shape", "time: a batch needs at least one sample, got 0")
        object.__setattr__(self, "t", t)
        q = _frozen_float("position", self.q, (t.shape[0], None))
        if not 1 <= q.shape[1] <= MAX_ACTUATORS:
            raise _reject("bad_shape", f"position: {q.shape[1]} actuators, expected 1 to {MAX_ACTUATORS}")
        object.__setattr__(self, "q", q)
        shape = q.shape
        for attr, wire_name in (("qd", "velocity"), ("temperature_k", "temperature")):
            value = getattr(self, attr)
            if value is not None:
                object.__setattr__(self, attr, _frozen_float(wire_name, value, shape))
        wants_effort = self.effort_kind is MeasuredQuantity.EFFORT
        present, absent = ("effort", "current") if wants_effort else ("current", "effort")
        if getattr(self, present) is None:
            raise _reject("bad_field", f"{present}: required when effort_kind is {self.effort_kind.value!r}")
        if getattr(self, absent) is not None:
            raise _reject("bad_field", f"{absent}: not allowed when effort_kind is {self.effort_kind.value!r}")
        object.__setattr__(self, present, _frozen_float(present, getattr(self, present), shape))
        if self.gripping is not None:
            g = np.array(self.gripping)
            if g.dtype != np.bool_:
                raise _reject("bad_field", f"gripping: expected booleans, got dtype {g.dtype}")
            _check_shape("gripping", g, (shape[0],))
            g.setflags(write=False)
            object.__setattr__(self, "gripping", g)
        dt = np.diff(t)  # strictly increasing: t[k+1] - t[k] > 0
        if (dt <= 0.0).any():
            k = int(np.argmax(dt <= 0.0))
            raise _reject(
                "time_order",
                f"time: not strictly increasing at sample {k + 1} ({float(t[k + 1])!r} after {float(t[k])!r})",
            )

    @property
    def n_samples(self) -> int:
        """N, number of samples."""
        return int(self.t.shape[0])

    @property
    def n_actuators(self) -> int:
        """n, number of actuators."""
        return int(self.q.shape[1])

    @property
    def measured(self) -> Array:
        """The effort block, whichever kind it is: ``effort`` [N m | N] or ``current`` [A], (N, n)."""
        if self.effort is not None:
            return self.effort
        return cast(Array, self.current)  # never None: __post_init__ requires one of the two


# --------------------------------------------------------------------------------------------------
# Plausibility against the robot description


@dataclass(frozen=True, slots=True)
class PlausibilityLimits:
    """Ranges a batch of one robot must stay within; build it from the robot description.

    Arrays are (n,). Positions may leave ``[position_lower, position_upper]`` by ``position_margin``
    (encoder noise, homing offsets); |effort| may reach ``effort_factor`` times the rated effort (peak
    torque of servo drives is typically 3 x rated: common practice, no source); currents likewise
    against the rated current. Temperatures must lie within ``[temperature_lower_k, temperature_upper_k]``
    (200 K is far below any factory floor, 450 K above any insulation class of motor windings).
    """

    position_unit: PositionUnit
    position_lower: Array  # (n,) [rad | m]
    position_upper: Array  # (n,) [rad | m]
    rated_effort: Array  # (n,) [N m | N]
    rated_current_a: Array  # (n,) [A]
    position_margin: float  # [rad | m]
    effort_factor: float = 3.0
    velocity_limit: Array | None = None  # (n,) [rad/s | m/s], None = not checked
    temperature_lower_k: float = 200.0
    temperature_upper_k: float = 450.0
    earliest_time_s: float = 946_684_800.0  # 2000-01-01T00:00:00Z: catches uptime sent instead of Unix time
    latest_time_s: float | None = None  # the adapter may pass "now + tolerance"; None = not checked

    def __post_init__(self) -> None:
        n = int(np.shape(self.position_lower)[0]) if np.ndim(self.position_lower) == 1 else 0
        for name in ("position_lower", "position_upper", "rated_effort", "rated_current_a", "velocity_limit"):
            value = getattr(self, name)
            if value is not None:
                expect_shape(name, np.asarray(value, dtype=float), (max(n, 1),))

    @property
    def n_actuators(self) -> int:
        """n."""
        return int(np.shape(self.position_lower)[0])

    @classmethod
    def for_parameters(cls, params: DeltaParameters | HexapodParameters) -> PlausibilityLimits:
        """The limits of either family (:meth:`for_delta` or :meth:`for_hexapod`), with the default margins."""
        if isinstance(params, DeltaParameters):
            return cls.for_delta(params)
        return cls.for_hexapod(params)

    @classmethod
    def for_delta(
        cls, params: DeltaParameters, *, position_margin_rad: float = 0.05, effort_factor: float = 3.0
    ) -> PlausibilityLimits:
        """Limits of a delta: joint limits [rad], rated joint torques, rated currents.

        Rated current ``i = tau_rated / (n k_t)``: joint torque is n times motor torque ``k_t i`` (ideal
        transmission, as in :mod:`shadow.robots.parameters`; with ``effort_factor`` the margin is ample).
        """
        rated = np.array([d.rated_effort for d in params.drives], dtype=float)
        current = np.array([d.rated_effort / (d.gear_ratio * d.torque_constant_nm_per_a) for d in params.drives])
        return cls(
            position_unit=PositionUnit.RAD,
            position_lower=np.asarray(params.joint_lower_rad, dtype=float),
            position_upper=np.asarray(params.joint_upper_rad, dtype=float),
            rated_effort=rated,
            rated_current_a=current,
            position_margin=position_margin_rad,
            effort_factor=effort_factor,
        )

    @classmethod
    def for_hexapod(
        cls, params: HexapodParameters, *, position_margin_m: float = 0.005, effort_factor: float = 3.0
    ) -> PlausibilityLimits:
        """Limits of a hexapod: leg length range [m], rated leg forces, rated currents.

        Motor torque ``T = F h / (2 pi n)`` (ideal screw, :mod:`shadow.robots.parameters`), so the rated
        current is ``F_rated h / (2 pi n k_t)``.
        """
        rated = np.array([d.rated_effort for d in params.drives], dtype=float)
        current = []
        for j, d in enumerate(params.drives):
            if d.screw_lead_m is None:
                raise DescriptionError(f"drives[{j}].screw_lead_m: required for a hexapod's screw-driven leg")
            current.append(
                d.rated_effort * d.screw_lead_m / (2.0 * math.pi * d.gear_ratio * d.torque_constant_nm_per_a)
            )
        return cls(
            position_unit=PositionUnit.M,
            position_lower=np.full(6, params.leg_lower_m),
            position_upper=np.full(6, params.leg_upper_m),
            rated_effort=rated,
            rated_current_a=np.array(current),
            position_margin=position_margin_m,
            effort_factor=effort_factor,
        )


def _first_outside(name: str, a: Array, lower: Array | float, upper: Array | float, unit: str) -> None:
    bad = (a < lower) | (a > upper)
    if bad.any():
        k, j = (int(i) for i in np.argwhere(bad)[0])
        lo = float(np.broadcast_to(lower, a.shape)[k, j])
        hi = float(np.broadcast_to(upper, a.shape)[k, j])
        raise _reject(
            "implausible",
            f"{name}: {float(a[k, j])!r} {unit} at sample {k}, actuator {j} is outside [{lo:.6g}, {hi:.6g}] {unit}",
        )


def check_plausible(batch: SampleBatch, limits: PlausibilityLimits) -> None:
    """Raise ``RejectedMessageError`` (``bad_shape``, ``bad_unit`` or ``implausible``) unless ``batch`` fits ``limits``.

    The message names the field, the first offending sample and actuator, the value and the range.
    """
    n = limits.n_actuators
    if batch.n_actuators != n:
        raise _reject("bad_shape", f"position: {batch.n_actuators} actuators, this robot has {n}")
    if batch.position_unit is not limits.position_unit:
        raise _reject(
            "bad_unit",
            f"units.position: {batch.position_unit.value!r}, but this robot's positions are in "
            f"{limits.position_unit.value!r}",
        )
    rotary = limits.position_unit is PositionUnit.RAD
    pu = limits.position_unit.value
    t = batch.t
    if t[0] < limits.earliest_time_s:
        raise _reject(
            "implausible",
            f"time: {float(t[0])!r} s is before {limits.earliest_time_s!r} s; "
            "times are seconds since the Unix epoch (UTC)",
        )
    if limits.latest_time_s is not None and t[-1] > limits.latest_time_s:
        raise _reject(
            "implausible", f"time: {float(t[-1])!r} s is after the latest accepted {limits.latest_time_s!r} s"
        )
    m = limits.position_margin
    _first_outside("position", batch.q, limits.position_lower - m, limits.position_upper + m, pu)
    if batch.qd is not None and limits.velocity_limit is not None:
        v = np.asarray(limits.velocity_limit)
        _first_outside("velocity", batch.qd, -v, v, pu + "/s")
    k = limits.effort_factor
    if batch.effort is not None:
        cap = k * np.asarray(limits.rated_effort)  # |effort| <= k * rated
        _first_outside("effort", batch.effort, -cap, cap, "N.m" if rotary else "N")
    if batch.current is not None:
        cap = k * np.asarray(limits.rated_current_a)  # |current| <= k * rated
        _first_outside("current", batch.current, -cap, cap, "A")
    if batch.temperature_k is not None:
        _first_outside("temperature", batch.temperature_k, limits.temperature_lower_k, limits.temperature_upper_k, "K")


def _finish(batch: SampleBatch, n_actuators: int | None, limits: PlausibilityLimits | None) -> SampleBatch:
    if n_actuators is not None and batch.n_actuators != n_actuators:
        raise _reject("bad_shape", f"position: {batch.n_actuators} actuators, expected {n_actuators}")
    if limits is not None:
        check_plausible(batch, limits)
    return batch


def _check_size(payload: object, max_bytes: int) -> memoryview:
    if not isinstance(payload, bytes | bytearray | memoryview):
        raise _reject("bad_payload", f"payload: expected bytes, got {type(payload).__name__}")
    try:
        view = memoryview(payload).cast("B")  # flat bytes view; bytes and bytearray are already flat
    except TypeError:
        raise _reject("bad_payload", "payload: a memoryview must be C-contiguous") from None
    if view.nbytes > max_bytes:
        raise _reject("too_large", f"payload: {view.nbytes} bytes exceeds the limit of {max_bytes} bytes")
    if view.nbytes == 0:
        raise _reject("empty", "payload: empty message")
    return view


# --------------------------------------------------------------------------------------------------
# JSON


_JSON_KEYS_REQUIRED = ("version", "robot", "seq", "effort_kind", "units", "time", "position")
_JSON_KEYS_OPTIONAL = ("velocity", "effort", "current", "temperature", "gripping")
_JSON_KEYS = frozenset(_JSON_KEYS_REQUIRED + _JSON_KEYS_OPTIONAL)
_NUMBER_TYPES = frozenset({int, float})


def _reject_constant(name: str) -> float:
    raise _reject("non_finite", f"JSON constant {name} is not allowed; every number must be finite")


def encode_json(batch: SampleBatch) -> bytes:
    """The JSON form of ``batch`` (UTF-8, compact). Floats are written with Python's shortest round-trip repr,
    so :func:`decode_json` gives back the identical float64 values."""
    doc: dict[str, Any] = {
        "version": batch.schema_version,
        "robot": batch.robot_id,
        "seq": batch.seq,
        "effort_kind": batch.effort_kind.value,
        "units": expected_units(
            batch.position_unit,
            batch.effort_kind,
            velocity=batch.qd is not None,
            temperature=batch.temperature_k is not None,
        ),
        "time": batch.t.tolist(),
        "position": batch.q.tolist(),
    }
    if batch.qd is not None:
        doc["velocity"] = batch.qd.tolist()
    if batch.effort is not None:
        doc["effort"] = batch.effort.tolist()
    if batch.current is not None:
        doc["current"] = batch.current.tolist()
    if batch.temperature_k is not None:
        doc["temperature"] = batch.temperature_k.tolist()
    if batch.gripping is not None:
        doc["gripping"] = batch.gripping.tolist()
    return json.dumps(doc, separators=(",", ":"), allow_nan=False).encode("utf-8")


def _json_matrix(name: str, value: Any) -> list[Any]:
    """Check a JSON signal is a list of rows of numbers (no booleans, strings or nulls)."""
    if not isinstance(value, list) or not all(isinstance(row, list) for row in value):
        raise _reject("bad_field", f"{name}: expected a list of N rows, one list of n numbers per sample")
    if not set(map(type, chain.from_iterable(value))) <= _NUMBER_TYPES:
        raise _reject("bad_field", f"{name}: every element must be a number")
    return value


def _json_units(doc: Mapping[str, Any]) -> tuple[PositionUnit, MeasuredQuantity]:
    kind_text = doc["effort_kind"]
    try:
        kind = MeasuredQuantity(kind_text)
    except (ValueError, TypeError):
        raise _reject("bad_field", f"effort_kind: {kind_text!r} must be 'effort' or 'motor_current'") from None
    present, absent = ("effort", "current") if kind is MeasuredQuantity.EFFORT else ("current", "effort")
    if present not in doc:
        raise _reject("bad_field", f"{present}: required when effort_kind is {kind.value!r}")
    if absent in doc:
        raise _reject("bad_field", f"{absent}: not allowed when effort_kind is {kind.value!r}")
    units = doc["units"]
    if not isinstance(units, dict):
        raise _reject("bad_field", "units: expected an object of unit strings")
    pos = units.get("position")
    if pos not in ("rad", "m"):
        raise _reject(
            "bad_unit", f"units.position: {pos!r} is not allowed; positions are in 'rad' (rotary) or 'm' (linear)"
        )
    position_unit = PositionUnit(pos)
    want = expected_units(position_unit, kind, velocity="velocity" in doc, temperature="temperature" in doc)
    for key, got in units.items():
        if key not in want:
            raise _reject("bad_unit", f"units.{key}: no such signal in this message")
        if got != want[key]:
            raise _reject("bad_unit", f"units.{key}: {got!r} is not allowed; the format requires {want[key]!r}")
    for key in want:
        if key not in units:
            raise _reject("bad_unit", f"units.{key}: missing; the format requires {want[key]!r}")
    return position_unit, kind


def decode_json(
    payload: bytes | bytearray | memoryview,
    *,
    max_bytes: int = MAX_MESSAGE_BYTES,
    n_actuators: int | None = None,
    limits: PlausibilityLimits | None = None,
) -> SampleBatch:
    """Decode and validate a JSON message (UTF-8). Raises ``RejectedMessageError`` naming the field.

    ``n_actuators`` (the robot's n) and ``limits`` (:class:`PlausibilityLimits`) add the robot-specific
    checks; without them only the structure is checked.
    """
    view = _check_size(payload, max_bytes)
    try:
        text = bytes(view).decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _reject("bad_json", f"payload: not UTF-8 ({exc.reason} at byte {exc.start})") from None
    try:
        doc = json.loads(text, parse_constant=_reject_constant)
    except RejectedMessageError:
        raise
    except (ValueError, RecursionError) as exc:
        raise _reject("bad_json", f"payload: not valid JSON ({str(exc)[:80]})") from None
    if not isinstance(doc, dict):
        raise _reject("bad_json", f"payload: expected a JSON object, got {type(doc).__name__}")
    for key in doc:
        if key not in _JSON_KEYS and not key.startswith("x-"):
            raise _reject("bad_field", f"{key}: unknown field (extensions must start with 'x-')")
    for key in _JSON_KEYS_REQUIRED:
        if key not in doc:
            raise _reject("bad_field", f"{key}: required field missing")
    version = doc["version"]
    if type(version) is not int or version != SCHEMA_VERSION:
        raise _reject("bad_version", f"version: {version!r} is not supported (this reader: 1)")
    if type(doc["seq"]) is not int:
        raise _reject("bad_seq", f"seq: {doc['seq']!r} is not an integer in [0, 2**64 - 1]")
    position_unit, kind = _json_units(doc)
    t = doc["time"]
    if not isinstance(t, list) or not set(map(type, t)) <= _NUMBER_TYPES:
        raise _reject("bad_field", "time: expected a list of N numbers")
    arrays: dict[str, Any] = {}
    for wire_name, attr in (
        ("position", "q"),
        ("velocity", "qd"),
        ("effort", "effort"),
        ("current", "current"),
        ("temperature", "temperature_k"),
    ):
        if wire_name in doc:
            arrays[attr] = _json_matrix(wire_name, doc[wire_name])
    gripping = doc.get("gripping")
    if gripping is not None:
        if not isinstance(gripping, list) or not set(map(type, gripping)) <= {bool}:
            raise _reject("bad_field", "gripping: expected a list of N booleans")
        if len(gripping) == 0:
            gripping = np.zeros(0, dtype=bool)
    elif "gripping" in doc:
        raise _reject("bad_field", "gripping: null is not allowed; leave the field out")
    batch = SampleBatch(
        robot_id=doc["robot"],
        seq=doc["seq"],
        position_unit=position_unit,
        effort_kind=kind,
        t=cast(Array, t),  # lists are fine: SampleBatch converts and checks every array it is given
        gripping=cast("NDArray[np.bool_] | None", gripping),
        **arrays,
    )
    return _finish(batch, n_actuators, limits)


def load_json_schema() -> dict[str, Any]:
    """The JSON Schema (draft 2020-12) of the JSON encoding, shipped as package data."""
    resource = importlib.resources.files("shadow.ingest").joinpath("schema/samples-v1.schema.json")
    return cast(dict[str, Any], json.loads(resource.read_text(encoding="utf-8")))


# --------------------------------------------------------------------------------------------------
# Binary


def _header_length(robot_id_length: int) -> int:
    raw = BINARY_HEADER.size + robot_id_length
    return -(-raw // _ALIGN) * _ALIGN  # padded up to a multiple of 8


def encode_binary(batch: SampleBatch, *, float32: bool = False) -> bytes:
    """The compact binary form of ``batch`` (little-endian; layout in docs/wire-format.md).

    ``float32=True`` writes the signal blocks as float32 (about 7 significant digits: enough for
    positions, efforts, currents and temperatures, and half the size); the time block stays float64.
    """
    flags = 0
    if batch.qd is not None:
        flags |= Flag.VELOCITY
    if batch.temperature_k is not None:
        flags |= Flag.TEMPERATURE
    if batch.gripping is not None:
        flags |= Flag.GRIPPING
    if batch.effort_kind is MeasuredQuantity.MOTOR_CURRENT:
        flags |= Flag.MOTOR_CURRENT
    if batch.position_unit is PositionUnit.M:
        flags |= Flag.LINEAR
    if float32:
        flags |= Flag.FLOAT32
    measured_name = "current" if batch.effort_kind is MeasuredQuantity.MOTOR_CURRENT else "effort"
    rid = batch.robot_id.encode("ascii")
    head = BINARY_HEADER.pack(
        BINARY_MAGIC, batch.schema_version, int(flags), batch.n_actuators, batch.n_samples, batch.seq, len(rid)
    )
    head += rid
    head += b"\x00" * (_header_length(len(rid)) - len(head))
    dtype = "<f4" if float32 else "<f8"
    parts = [head, batch.t.astype("<f8").tobytes()]
    for name, block in (
        ("position", batch.q),
        ("velocity", batch.qd),
        (measured_name, batch.measured),
        ("temperature", batch.temperature_k),
    ):
        if block is None:
            continue
        if float32 and (np.abs(block) > _FLOAT32_MAX).any():
            raise _reject("non_finite", f"{name}: a value exceeds the float32 range; encode with float32=False")
        parts.append(block.astype(dtype).tobytes())
    if batch.gripping is not None:
        parts.append(batch.gripping.astype(np.uint8).tobytes())
    return b"".join(parts)


def decode_binary(
    payload: bytes | bytearray | memoryview,
    *,
    max_bytes: int = MAX_MESSAGE_BYTES,
    n_actuators: int | None = None,
    limits: PlausibilityLimits | None = None,
) -> SampleBatch:
    """Decode and validate a binary message. Raises ``RejectedMessageError`` naming the field."""
    view = _check_size(payload, max_bytes)
    size = view.nbytes
    if size < BINARY_HEADER.size:
        raise _reject("truncated", f"header: {size} bytes, a binary message needs at least {BINARY_HEADER.size}")
    magic, version, flags, n, n_samples, seq, id_length = BINARY_HEADER.unpack_from(view, 0)
    if magic != BINARY_MAGIC:
        raise _reject("bad_magic", f"magic: {bytes(magic)!r} is not {BINARY_MAGIC!r}")
    if version != SCHEMA_VERSION:
        raise _reject("bad_version", f"version: {version} is not supported (this reader: 1)")
    if flags & ~_KNOWN_FLAGS:
        raise _reject("bad_flags", f"flags: reserved bits set in 0x{flags:02x}")
    if not 1 <= n <= MAX_ACTUATORS:
        raise _reject("bad_shape", f"n_actuators: {n}, expected 1 to {MAX_ACTUATORS}")
    if n_samples < 1:
        raise _reject("bad_shape", "n_samples: a batch needs at least one sample, got 0")
    if not 1 <= id_length <= 64:
        raise _reject("bad_robot_id", f"robot_id_length: {id_length}, expected 1 to 64")
    offset = _header_length(id_length)
    width = 4 if flags & _F_FLOAT32 else 8
    n_blocks = 2 + bool(flags & _F_VELOCITY) + bool(flags & _F_TEMPERATURE)  # q, effort/current, qd?, temp?
    expected = offset + 8 * n_samples + n_blocks * width * n_samples * n + (n_samples if flags & _F_GRIPPING else 0)
    if size != expected:
        code = "truncated" if size < expected else "bad_length"
        raise _reject(
            code, f"length: {size} bytes, header (n={n}, N={n_samples}, flags=0x{flags:02x}) implies {expected}"
        )
    rid_bytes = bytes(view[BINARY_HEADER.size : BINARY_HEADER.size + id_length])
    if any(view[BINARY_HEADER.size + id_length : offset]):
        raise _reject("bad_padding", "padding: bytes after the robot id must be zero")
    try:
        robot_id = rid_bytes.decode("ascii")
    except UnicodeDecodeError:
        raise _reject("bad_robot_id", f"robot: {rid_bytes!r} is not ASCII") from None
    t = np.frombuffer(view, dtype="<f8", count=n_samples, offset=offset)
    offset += 8 * n_samples
    dtype = "<f4" if width == 4 else "<f8"

    def block() -> NDArray[Any]:
        nonlocal offset
        a = np.frombuffer(view, dtype=dtype, count=n_samples * n, offset=offset).reshape(n_samples, n)
        offset += width * n_samples * n
        return a

    q = block()
    qd = block() if flags & _F_VELOCITY else None
    measured = block()
    temperature = block() if flags & _F_TEMPERATURE else None
    gripping = None
    if flags & _F_GRIPPING:
        raw = np.frombuffer(view, dtype=np.uint8, count=n_samples, offset=offset)
        if (raw > 1).any():
            k = int(np.argmax(raw > 1))
            raise _reject("bad_field", f"gripping: byte {int(raw[k])} at sample {k}, expected 0 or 1")
        gripping = raw.astype(bool)
    current = bool(flags & _F_MOTOR_CURRENT)
    batch = SampleBatch(
        robot_id=robot_id,
        seq=seq,
        position_unit=PositionUnit.M if flags & _F_LINEAR else PositionUnit.RAD,
        effort_kind=MeasuredQuantity.MOTOR_CURRENT if current else MeasuredQuantity.EFFORT,
        t=t,
        q=q,
        qd=qd,
        effort=None if current else measured,
        current=measured if current else None,
        temperature_k=temperature,
        gripping=gripping,
    )
    return _finish(batch, n_actuators, limits)


def decode_message(
    payload: bytes | bytearray | memoryview,
    *,
    max_bytes: int = MAX_MESSAGE_BYTES,
    n_actuators: int | None = None,
    limits: PlausibilityLimits | None = None,
) -> SampleBatch:
    """Decode either encoding: binary if the payload starts with :data:`BINARY_MAGIC`, else JSON."""
    view = _check_size(payload, max_bytes)
    if view[: len(BINARY_MAGIC)].tobytes() == BINARY_MAGIC:
        return decode_binary(view, max_bytes=max_bytes, n_actuators=n_actuators, limits=limits)
    return decode_json(view, max_bytes=max_bytes, n_actuators=n_actuators, limits=limits)


# --------------------------------------------------------------------------------------------------
# Sequence tracking (per robot, pure step function + thin wrapper)


class DropKind(enum.Enum):
    """Why :class:`SequenceTracker` dropped a batch."""

    DUPLICATE = "duplicate"  # this seq was already passed on, or is already held
    LATE = "late"  # this seq had already been given up and reported in a Gap
    TIME_OVERLAP = "time_overlap"  # seq in order, but its first time is not after the last time passed on


@dataclass(frozen=True, slots=True, eq=False)
class Released:
    """A batch passed on for processing, in sequence order."""

    batch: SampleBatch


@dataclass(frozen=True, slots=True)
class Dropped:
    """A batch that was not passed on."""

    seq: int
    kind: DropKind


@dataclass(frozen=True, slots=True)
class Gap:
    """Messages ``first_seq..last_seq`` never arrived: the robot was unmonitored from ``after_t_s`` (last
    sample time passed on) to ``before_t_s`` (first sample time of the next batch passed on)."""

    first_seq: int
    last_seq: int
    after_t_s: float
    before_t_s: float

    @property
    def n_missing(self) -> int:
        """Number of missing messages."""
        return self.last_seq - self.first_seq + 1


@dataclass(frozen=True, slots=True)
class Restart:
    """The sender restarted its sequence: ``new_seq`` is below the expected one while its samples are newer
    than everything passed on. The interval ``after_t_s``..``before_t_s`` is unmonitored."""

    previous_seq: int
    new_seq: int
    after_t_s: float
    before_t_s: float


TrackerEvent = Released | Dropped | Gap | Restart

_MAX_REMEMBERED_GAPS = 16


@dataclass(frozen=True, slots=True, eq=False)
class TrackerState:
    """Everything :func:`track_step` needs between messages of one robot.

    ``next_seq`` is the seq expected next (None before the first batch); ``last_t_s`` the last sample time
    passed on; ``held`` the batches waiting for a missing predecessor, sorted by seq, all > ``next_seq``;
    ``gaps`` the last few seq ranges given up (so a very late batch is told apart from a duplicate).
    """

    robot_id: str | None = None
    next_seq: int | None = None
    last_t_s: float | None = None
    held: tuple[SampleBatch, ...] = ()
    gaps: tuple[tuple[int, int], ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able form; :meth:`from_dict` restores it exactly (held batches in their JSON encoding,
        whose floats round-trip bit for bit)."""
        return {
            "robot_id": self.robot_id,
            "next_seq": self.next_seq,
            "last_t_s": self.last_t_s,
            "held": [encode_json(b).decode("utf-8") for b in self.held],
            "gaps": [list(g) for g in self.gaps],
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> TrackerState:
        """Inverse of :meth:`to_dict`."""
        last = data["last_t_s"]
        return cls(
            robot_id=data["robot_id"],
            next_seq=data["next_seq"],
            last_t_s=None if last is None else float(last),
            held=tuple(decode_json(text.encode("utf-8")) for text in data["held"]),
            gaps=tuple((int(a), int(b)) for a, b in data["gaps"]),
        )


def _release(last_t: float | None, batch: SampleBatch, events: list[TrackerEvent]) -> tuple[int, float]:
    """Pass ``batch`` on (or drop it for overlapping time); returns the new (next_seq, last_t)."""
    if last_t is not None and batch.t[0] <= last_t:
        events.append(Dropped(batch.seq, DropKind.TIME_OVERLAP))
        return batch.seq + 1, last_t
    events.append(Released(batch))  # first batch ever (last_t None), or newer than everything passed on
    return batch.seq + 1, float(batch.t[-1])


def _drain(state: TrackerState, reorder_window: int, events: list[TrackerEvent], *, flush: bool) -> TrackerState:
    """Release held batches in order; give up on a missing seq once the newest held seq is more than
    ``reorder_window`` ahead of it (or at once when flushing)."""
    if not state.held:
        return state
    held = list(state.held)
    # batches are held only after the first one was passed on, so next_seq and last_t_s are set
    next_seq, last_t, gaps = cast(int, state.next_seq), cast(float, state.last_t_s), list(state.gaps)
    while held:
        head = held[0]
        if head.seq != next_seq:
            if not flush and held[-1].seq - next_seq <= reorder_window:
                break
            events.append(Gap(next_seq, head.seq - 1, last_t, float(head.t[0])))
            gaps.append((next_seq, head.seq - 1))
        held.pop(0)
        next_seq, last_t = _release(last_t, head, events)
    return TrackerState(state.robot_id, next_seq, last_t, tuple(held), tuple(gaps[-_MAX_REMEMBERED_GAPS:]))


def track_step(
    state: TrackerState, batch: SampleBatch, *, reorder_window: int = 4
) -> tuple[TrackerState, tuple[TrackerEvent, ...]]:
    """Classify one arriving batch; returns the new state and the events, in order. No side effects.

    Rules (docs/wire-format.md, "Sequence numbers"): the first batch is passed on. Then, with ``s`` its seq
    and ``e`` the expected one: ``s == e`` passes on (with any held successors); ``s > e`` is held until
    ``e`` arrives or the newest held seq is more than ``reorder_window`` ahead of ``e``, when ``e..`` is
    reported as a :class:`Gap`; ``s < e`` is a :class:`Restart` if its first sample time is after the last
    time passed on, else it is dropped (duplicate, or late if its seq was already reported missing).
    Raises ``RejectedMessageError`` (``robot_mismatch``) for a batch of another robot.
    """
    if reorder_window < 0:
        raise ValueError(f"reorder_window: {reorder_window} must be >= 0")
    events: list[TrackerEvent] = []
    if state.robot_id is not None and batch.robot_id != state.robot_id:
        raise _reject("robot_mismatch", f"robot: {batch.robot_id!r} given to the tracker of {state.robot_id!r}")
    s = batch.seq
    if state.next_seq is None or state.last_t_s is None:
        next_seq, last_t = _release(None, batch, events)
        return TrackerState(batch.robot_id, next_seq, last_t), tuple(events)
    if s < state.next_seq:
        if batch.t[0] > state.last_t_s:
            flushed = _drain(state, reorder_window, events, flush=True)  # the old run's held batches first
            previous = cast(int, flushed.next_seq) - 1
            events.append(Restart(previous, s, cast(float, flushed.last_t_s), float(batch.t[0])))
            events.append(Released(batch))
            return TrackerState(state.robot_id, s + 1, float(batch.t[-1])), tuple(events)
        late = any(a <= s <= b for a, b in state.gaps)
        events.append(Dropped(s, DropKind.LATE if late else DropKind.DUPLICATE))
        return state, tuple(events)
    if any(h.seq == s for h in state.held):
        events.append(Dropped(s, DropKind.DUPLICATE))
        return state, tuple(events)
    held = tuple(sorted((*state.held, batch), key=lambda b: b.seq))
    new = _drain(
        TrackerState(state.robot_id, state.next_seq, state.last_t_s, held, state.gaps),
        reorder_window,
        events,
        flush=False,
    )
    return new, tuple(events)


def track_flush(state: TrackerState) -> tuple[TrackerState, tuple[TrackerEvent, ...]]:
    """Pass on every held batch in order, reporting the gaps between them (e.g. at shutdown or on a timeout)."""
    events: list[TrackerEvent] = []
    return _drain(state, 0, events, flush=True), tuple(events)


class SequenceTracker:
    """Per-robot wrapper carrying a :class:`TrackerState` between batches; all logic is in :func:`track_step`."""

    def __init__(self, *, reorder_window: int = 4, state: TrackerState | None = None) -> None:
        if reorder_window < 0:
            raise ValueError(f"reorder_window: {reorder_window} must be >= 0")
        self.reorder_window = reorder_window
        self.state = state if state is not None else TrackerState()

    def push(self, batch: SampleBatch) -> tuple[TrackerEvent, ...]:
        """Classify one arriving batch; returns the events in order."""
        self.state, events = track_step(self.state, batch, reorder_window=self.reorder_window)
        return events

    def flush(self) -> tuple[TrackerEvent, ...]:
        """Pass on everything held."""
        self.state, events = track_flush(self.state)
        return events
