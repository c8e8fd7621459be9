"""Sensor and transport faults injected into published messages: a pure, seeded transform on wire batches.

:func:`inject_sensor_faults` takes the batches of one stretch of stream in publishing order, the faults
to inject and a random generator, and returns the batches as they would arrive plus one
:class:`InjectedFault` record per fault actually injected (the ground truth). It never changes its inputs
(:class:`~shadow.ingest.wire.SampleBatch` arrays are read-only; changed batches are new ones).

Kinds (:class:`SensorFaultKind`). Times are Unix times [s]; a sample lies in a fault's interval
``[start_s, start_s + duration_s)`` when its nominal instant ``nominal_start_s + k h`` does (so the stamps'
own jitter cannot move a sample across an edge), and a message when its first sample does.

- ``spike``: ``count`` single samples of one actuator's measured effort (or current) get an outlier of
  ``size`` (the measured unit, sign drawn) added; samples drawn among those in ``[start_s, start_s + duration_s)``.
- ``stuck``: one actuator's reading (``signal`` "effort" or "position") holds the value of the first sample in
  ``[start_s, start_s + duration_s)`` over that interval.
- ``clock_jitter``: sample stamps in the interval get white Gaussian noise of ``std_s``. The stamp's total
  error from its nominal instant ``nominal_start_s + k h`` is clipped to +-0.49 h, so stamps stay strictly
  increasing within and across messages (a message with time going backwards would be refused whole).
- ``dropout``: messages whose first sample lies in the interval are lost (their sequence numbers are missing).
- ``out_of_order``: ``count`` messages drawn in the interval arrive ``delay_messages`` places late.
- ``duplicate``: ``count`` messages drawn in the interval arrive twice (the copy right after the original).

Value faults (spike, stuck, clock jitter) are applied first, in the order given, then dropouts, late
messages, and duplicates, so a duplicate or a late message is always one that was not lost.
"""

from __future__ import annotations

import dataclasses
import enum
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError
from shadow.ingest.wire import SampleBatch

Array = NDArray[np.float64]

JITTER_CLIP_STEPS = 0.49  # largest stamp error after clock jitter, in sample steps (keeps stamps increasing)


class SensorFaultKind(enum.Enum):
    """What goes wrong between the sensor and the monitor."""

    SPIKE = "spike"
    STUCK = "stuck"
    CLOCK_JITTER = "clock_jitter"
    DROPOUT = "dropout"
    OUT_OF_ORDER = "out_of_order"
    DUPLICATE = "duplicate"


VALUE_KINDS = (SensorFaultKind.SPIKE, SensorFaultKind.STUCK, SensorFaultKind.CLOCK_JITTER)


@dataclass(frozen=True, slots=True)
class SensorFault:
    """One fault to inject. ``actuator`` is 1-based (spike, stuck); ``size`` in the measured unit [N m | N | A]."""

    kind: SensorFaultKind
    start_s: float  # Unix time where the fault's interval begins
    duration_s: float  # length of the interval [s]
    actuator: int | None = None
    signal: str = "effort"  # stuck: "effort" (the measured effort or current) or "position"
    size: float = 0.0  # spike height
    count: int = 1  # spike, out_of_order, duplicate: how many
    std_s: float = 0.0  # clock_jitter: standard deviation of the added stamp noise
    delay_messages: int = 1  # out_of_order: how many places late

    def __post_init__(self) -> None:
        if self.duration_s < 0.0 or not np.isfinite(self.duration_s):
            raise ConfigurationError(f"duration_s: must be finite and >= 0, got {self.duration_s!r}")
        if self.kind in (SensorFaultKind.SPIKE, SensorFaultKind.STUCK) and (self.actuator is None or self.actuator < 1):
            raise ConfigurationError(f"actuator: a {self.kind.value} fault needs an actuator >= 1, got {self.actuator}")
        if self.signal not in ("effort", "position"):
            raise ConfigurationError(f"signal: must be 'effort' or 'position', got {self.signal!r}")
        if self.count < 1:
            raise ConfigurationError(f"count: must be >= 1, got {self.count}")
        if self.delay_messages < 1:
            raise ConfigurationError(f"delay_messages: must be >= 1, got {self.delay_messages}")
        if self.std_s < 0.0:
            raise ConfigurationError(f"std_s: must be >= 0, got {self.std_s}")

    @property
    def end_s(self) -> float:
        """End of the fault's interval (Unix time) [s]."""
        return self.start_s + self.duration_s


@dataclass(frozen=True, slots=True)
class InjectedFault:
    """Ground truth of one injected fault: what, when (Unix times of the first and last affected sample or
    message), which actuator (1-based, or None), which messages (sequence numbers), and the details."""

    kind: str
    start_s: float
    end_s: float
    actuator: int | None
    seqs: tuple[int, ...]
    detail: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able form."""
        return {
            "kind": self.kind,
            "start_s": self.start_s,
            "end_s": self.end_s,
            "actuator": self.actuator,
            "seqs": list(self.seqs),
            **self.detail,
        }


def _measured(batch: SampleBatch) -> tuple[str, Array]:
    if batch.effort is not None:
        return "effort", batch.effort
    return "current", batch.current  # type: ignore[return-value]  # exactly one is present (SampleBatch checks)


def _sample_index(batches: Sequence[SampleBatch]) -> tuple[Array, NDArray[np.int64], NDArray[np.int64]]:
    """(t (S,), batch position (S,), row in its batch (S,)) of every sample, in list order."""
    t = np.concatenate([b.t for b in batches]) if batches else np.zeros(0)
    pos = np.concatenate([np.full(b.n_samples, i) for i, b in enumerate(batches)]) if batches else np.zeros(0, int)
    row = np.concatenate([np.arange(b.n_samples) for b in batches]) if batches else np.zeros(0, int)
    return t, pos.astype(np.int64), row.astype(np.int64)


@dataclass(frozen=True, slots=True)
class _Clock:
    """The nominal sample grid ``t_k = start + k h``: which sample a stamp belongs to (stamp errors < h / 2)."""

    start_s: float
    step_s: float

    def index(self, t: Array) -> NDArray[np.int64]:
        return np.round((np.asarray(t) - self.start_s) / self.step_s).astype(np.int64)

    def inside(self, t: Array, fault: SensorFault) -> NDArray[np.bool_]:
        """Samples whose nominal instant lies in ``[start_s, end_s)`` (compared as sample indices, so a
        stamp's jitter or the rounding of a Unix time cannot move a sample across an interval's edge)."""
        k = self.index(t)
        first = math.ceil((fault.start_s - self.start_s) / self.step_s - 1e-6)
        end = math.ceil((fault.end_s - self.start_s) / self.step_s - 1e-6)
        return (k >= first) & (k < end)


def _check_actuator(fault: SensorFault, n: int) -> int:
    if fault.actuator is None or not 1 <= fault.actuator <= n:
        raise ConfigurationError(f"actuator: {fault.actuator} is not one of the batches' actuators 1..{n}")
    return fault.actuator - 1


def _apply_values(
    out: list[SampleBatch], fault: SensorFault, rng: np.random.Generator, clock: _Clock
) -> InjectedFault | list[InjectedFault] | None:
    """Change sample values or stamps in place in ``out`` (a list of new batches); returns the truth."""
    t, pos, row = _sample_index(out)
    inside = np.flatnonzero(clock.inside(t, fault))
    if inside.size == 0:
        return None
    changed: dict[int, dict[str, Array]] = {}

    def column(i: int, name: str) -> Array:
        fields = changed.setdefault(i, {})
        if name not in fields:
            fields[name] = np.array(getattr(out[i], name), dtype=float)  # writable copy
        return fields[name]

    record: InjectedFault | list[InjectedFault]
    if fault.kind is SensorFaultKind.SPIKE:
        j = _check_actuator(fault, out[0].n_actuators)
        picks = np.sort(rng.choice(inside, size=min(fault.count, inside.size), replace=False))
        signs = rng.choice([-1.0, 1.0], size=picks.size)
        records = []
        for k, sign in zip(picks, signs, strict=True):
            name, _ = _measured(out[pos[k]])
            column(int(pos[k]), name)[row[k], j] += sign * fault.size
            records.append(
                InjectedFault(
                    "spike",
                    float(t[k]),
                    float(t[k]),
                    j + 1,
                    (out[pos[k]].seq,),
                    {"signal": name, "size": float(sign * fault.size)},
                )
            )
        record = records
    elif fault.kind is SensorFaultKind.STUCK:
        j = _check_actuator(fault, out[0].n_actuators)
        first = inside[0]
        name = "q" if fault.signal == "position" else _measured(out[pos[first]])[0]
        value = float(getattr(out[pos[first]], name)[row[first], j])
        for k in inside:
            column(int(pos[k]), name)[row[k], j] = value
        seqs = tuple(sorted({out[p].seq for p in pos[inside]}))
        detail = {"signal": "position" if name == "q" else name, "value": value}
        record = InjectedFault("stuck", float(t[inside[0]]), float(t[inside[-1]]), j + 1, seqs, detail)
    else:  # clock jitter
        h = clock.step_s
        nominal = clock.start_s + clock.index(t[inside]) * h  # the true sample instants
        error = np.clip(t[inside] - nominal + rng.normal(size=inside.size) * fault.std_s,
                        -JITTER_CLIP_STEPS * h, JITTER_CLIP_STEPS * h)  # fmt: skip
        shift = nominal + error - t[inside]
        for k, s in zip(inside, shift, strict=True):
            column(int(pos[k]), "t")[row[k]] += s
        seqs = tuple(sorted({out[p].seq for p in pos[inside]}))
        detail = {"std_s": fault.std_s, "max_shift_s": float(np.max(np.abs(shift))), "clip_s": JITTER_CLIP_STEPS * h}
        record = InjectedFault("clock_jitter", float(t[inside[0]]), float(t[inside[-1]]), None, seqs, detail)
    for i, fields in changed.items():
        out[i] = dataclasses.replace(out[i], **fields)
    return record


def _message_starts(out: Sequence[SampleBatch]) -> Array:
    return np.array([float(b.t[0]) for b in out])


def inject_sensor_faults(
    batches: Sequence[SampleBatch],
    faults: Sequence[SensorFault],
    rng: np.random.Generator,
    *,
    sample_step_s: float,
    nominal_start_s: float,
) -> tuple[list[SampleBatch], list[InjectedFault]]:
    """The batches as they arrive after ``faults``, and the truth of what was injected.

    Parameters
    ----------
    batches : the messages in publishing order (consecutive sequence numbers, increasing stamps)
    faults : what to inject (see the module docstring); a fault whose interval holds no sample is skipped
    rng : source of every random choice (which samples, signs, noise); the same generator state gives the
        same result
    sample_step_s : the nominal sample period h [s] (clock jitter keeps stamps within +-0.49 h of nominal)
    nominal_start_s : the true instant of sample 0 of the stretch [s]; sample k belongs to ``nominal_start_s + k h``

    Returns
    -------
    (batches as delivered, injected faults in the order applied)

    Raises
    ------
    ConfigurationError
        if a spike or stuck fault names an actuator the batches do not have.
    """
    if sample_step_s <= 0.0:
        raise ConfigurationError(f"sample_step_s: must be positive, got {sample_step_s}")
    out = list(batches)
    truth: list[InjectedFault] = []
    if not out:
        return out, truth
    clock = _Clock(nominal_start_s, sample_step_s)
    for fault in (f for f in faults if f.kind in VALUE_KINDS):
        record = _apply_values(out, fault, rng, clock)
        if isinstance(record, list):
            truth.extend(record)
        elif record is not None:
            truth.append(record)
    for fault in (f for f in faults if f.kind is SensorFaultKind.DROPOUT):
        lost = clock.inside(_message_starts(out), fault)
        if lost.any():
            gone = [b for b, x in zip(out, lost, strict=True) if x]
            truth.append(
                InjectedFault(
                    "dropout",
                    float(gone[0].t[0]),
                    float(gone[-1].t[-1]),
                    None,
                    tuple(b.seq for b in gone),
                    {"n_messages": len(gone)},
                )
            )
            out = [b for b, x in zip(out, lost, strict=True) if not x]
    for fault in (f for f in faults if f.kind is SensorFaultKind.OUT_OF_ORDER):
        inside = np.flatnonzero(clock.inside(_message_starts(out), fault))
        inside = inside[inside < len(out) - 1]  # the last message has nothing to arrive after
        if inside.size == 0:
            continue
        chosen = rng.choice(inside, size=min(fault.count, inside.size), replace=False)
        for seq in sorted(out[i].seq for i in chosen):
            i = next(k for k, b in enumerate(out) if b.seq == seq)
            if i == len(out) - 1:
                continue  # moved to the end by an earlier late message: nothing to arrive after
            batch = out.pop(i)
            late = min(i + fault.delay_messages, len(out))
            out.insert(late, batch)
            truth.append(
                InjectedFault(
                    "out_of_order", float(batch.t[0]), float(batch.t[-1]), None, (seq,), {"delay_messages": late - i}
                )
            )
    for fault in (f for f in faults if f.kind is SensorFaultKind.DUPLICATE):
        inside = np.flatnonzero(clock.inside(_message_starts(out), fault))
        if inside.size == 0:
            continue
        chosen = rng.choice(inside, size=min(fault.count, inside.size), replace=False)
        for seq in sorted(out[i].seq for i in chosen):
            i = next(k for k, b in enumerate(out) if b.seq == seq)
            out.insert(i + 1, out[i])  # the same message again (batches are immutable)
            truth.append(InjectedFault("duplicate", float(out[i].t[0]), float(out[i].t[-1]), None, (seq,), {}))
    return out, truth
