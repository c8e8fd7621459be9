"""Sensor and transport faults on wire batches: each kind lands where declared, and the truth says so."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from shadow.errors import ConfigurationError
from shadow.ingest.wire import Gap, PositionUnit, Released, SampleBatch, SequenceTracker
from shadow.robots.parameters import MeasuredQuantity
from simulators.sensor_faults import JITTER_CLIP_STEPS, SensorFault, SensorFaultKind, inject_sensor_faults

H = 1e-3  # sample step [s]
T0 = 1_780_000_000.0  # nominal start [s]
PER = 10  # samples per message
N_MSG = 20


def _batches(rng: np.random.Generator) -> list[SampleBatch]:
    n = N_MSG * PER
    t = T0 + np.arange(n) * H + rng.uniform(-0.3, 0.3, n) * H  # jitter well inside the +-0.49 h band
    q = np.cumsum(rng.normal(size=(n, 3)), axis=0) * 1e-3
    effort = rng.normal(size=(n, 3))
    return [
        SampleBatch(
            "r1",
            100 + k,
            PositionUnit.RAD,
            MeasuredQuantity.EFFORT,
            t[s : s + PER],
            q[s : s + PER],
            effort=effort[s : s + PER],
        )
        for k, s in enumerate(range(0, n, PER))
    ]


def _stack(batches: list[SampleBatch], name: str) -> np.ndarray:
    return np.concatenate([getattr(b, name) for b in batches])


def _nominal_inside(fault: SensorFault) -> np.ndarray:
    """Samples whose nominal instant T0 + k H lies in the fault's interval (by index)."""
    k = np.arange(N_MSG * PER)
    first, end = round((fault.start_s - T0) / H), round((fault.end_s - T0) / H)
    return (k >= first) & (k < end)


def _fault(kind: SensorFaultKind, start: float, duration: float, **kw: object) -> SensorFault:
    return SensorFault(kind, T0 + start, duration, **kw)  # type: ignore[arg-type]


def test_transform_is_pure_and_seeded(rng: np.random.Generator) -> None:
    batches = _batches(rng)
    before = [(b.seq, b.t.copy(), b.effort.copy()) for b in batches]  # type: ignore[union-attr]
    faults = [
        _fault(SensorFaultKind.SPIKE, 0.0, 0.2, actuator=2, size=5.0, count=4),
        _fault(SensorFaultKind.CLOCK_JITTER, 0.05, 0.1, std_s=2e-4),
        _fault(SensorFaultKind.DROPOUT, 0.1, 0.02),
        _fault(SensorFaultKind.DUPLICATE, 0.0, 0.2, count=2),
        _fault(SensorFaultKind.OUT_OF_ORDER, 0.0, 0.2, count=2, delay_messages=2),
    ]
    a, ta = inject_sensor_faults(batches, faults, np.random.default_rng(5), sample_step_s=H, nominal_start_s=T0)
    b, tb = inject_sensor_faults(batches, faults, np.random.default_rng(5), sample_step_s=H, nominal_start_s=T0)
    c, _ = inject_sensor_faults(batches, faults, np.random.default_rng(6), sample_step_s=H, nominal_start_s=T0)
    assert [x.seq for x in a] == [x.seq for x in b]
    assert_array_equal(_stack(a, "t"), _stack(b, "t"))
    assert_array_equal(_stack(a, "effort"), _stack(b, "effort"))
    assert [f.to_dict() for f in ta] == [f.to_dict() for f in tb]
    assert not np.array_equal(_stack(a, "effort"), _stack(c, "effort"))  # another seed, other spikes
    for batch, (seq, t, effort) in zip(batches, before, strict=True):  # inputs untouched
        assert batch.seq == seq
        assert_array_equal(batch.t, t)
        assert_array_equal(batch.effort, effort)  # type: ignore[arg-type]


def test_spikes_are_single_samples_on_the_declared_actuator(rng: np.random.Generator) -> None:
    batches = _batches(rng)
    fault = _fault(SensorFaultKind.SPIKE, 0.05, 0.1, actuator=3, size=7.5, count=5)
    out, truth = inject_sensor_faults(batches, [fault], rng, sample_step_s=H, nominal_start_s=T0)
    diff = _stack(out, "effort") - _stack(batches, "effort")
    changed = np.argwhere(diff != 0.0)
    assert changed.shape == (5, 2)
    assert set(changed[:, 1]) == {2}  # actuator 3, column 2
    assert_allclose(np.abs(diff[changed[:, 0], 2]), np.full(5, 7.5), rtol=1e-12)
    t = _stack(batches, "t")
    assert np.all(_nominal_inside(fault)[changed[:, 0]])
    assert [f.kind for f in truth] == ["spike"] * 5
    assert sorted(f.start_s for f in truth) == sorted(t[changed[:, 0]].tolist())
    seq_of_sample = np.repeat([b.seq for b in batches], PER)
    assert sorted(f.seqs[0] for f in truth) == sorted(seq_of_sample[changed[:, 0]].tolist())
    assert {f.actuator for f in truth} == {3}


@pytest.mark.parametrize(("signal", "field"), [("position", "q"), ("effort", "effort")])
def test_stuck_reading_holds_its_first_value(rng: np.random.Generator, signal: str, field: str) -> None:
    batches = _batches(rng)
    fault = _fault(SensorFaultKind.STUCK, 0.033, 0.05, actuator=1, signal=signal)
    out, truth = inject_sensor_faults(batches, [fault], rng, sample_step_s=H, nominal_start_s=T0)
    t = _stack(batches, "t")
    inside = _nominal_inside(fault)
    assert inside.sum() == 50
    new, old = _stack(out, field), _stack(batches, field)
    first = np.flatnonzero(inside)[0]
    assert_array_equal(new[inside, 0], np.full(inside.sum(), old[first, 0]))
    assert_array_equal(new[~inside], old[~inside])
    assert_array_equal(new[:, 1:], old[:, 1:])
    (record,) = truth
    assert (record.kind, record.actuator, record.detail["signal"]) == ("stuck", 1, signal)
    assert record.start_s == t[first] and record.end_s == t[inside][-1]


def test_clock_jitter_moves_stamps_inside_the_band_and_keeps_their_order(rng: np.random.Generator) -> None:
    batches = _batches(rng)
    fault = _fault(SensorFaultKind.CLOCK_JITTER, 0.05, 0.1, std_s=5e-4)  # half a step: the clip is reached
    out, truth = inject_sensor_faults(batches, [fault], rng, sample_step_s=H, nominal_start_s=T0)
    t_old, t_new = _stack(batches, "t"), _stack(out, "t")
    inside = _nominal_inside(fault)
    assert np.mean(t_new[inside] != t_old[inside]) > 0.9  # a shift below the stamp's resolution (0.24 us) is lost
    assert_array_equal(t_new[~inside], t_old[~inside])
    nominal = T0 + np.arange(t_old.size) * H
    assert np.max(np.abs(t_new - nominal)) <= JITTER_CLIP_STEPS * H * (1 + 1e-9)
    assert np.all(np.diff(t_new) > 0.0)
    (record,) = truth
    assert record.detail["max_shift_s"] == pytest.approx(np.max(np.abs(t_new - t_old)))
    assert record.seqs == tuple(range(105, 115))  # samples 50 .. 149


def test_dropout_removes_the_messages_that_start_in_it(rng: np.random.Generator) -> None:
    batches = _batches(rng)
    fault = _fault(SensorFaultKind.DROPOUT, 0.045, 0.03)  # messages 5, 6 and 7 start inside (at 50, 60, 70 ms)
    out, truth = inject_sensor_faults(batches, [fault], rng, sample_step_s=H, nominal_start_s=T0)
    assert [b.seq for b in out] == [b.seq for b in batches if b.seq not in (105, 106, 107)]
    (record,) = truth
    assert record.seqs == (105, 106, 107)
    tracker = SequenceTracker(reorder_window=2)
    events = [e for b in out for e in tracker.push(b)] + list(tracker.flush())
    gaps = [e for e in events if isinstance(e, Gap)]
    assert [(g.first_seq, g.last_seq) for g in gaps] == [(105, 107)]


def test_duplicates_and_late_messages_are_undone_by_the_sequence_tracker(rng: np.random.Generator) -> None:
    batches = _batches(rng)
    faults = [
        _fault(SensorFaultKind.OUT_OF_ORDER, 0.0, 0.1, count=2, delay_messages=3),
        _fault(SensorFaultKind.DUPLICATE, 0.1, 0.1, count=3),
    ]
    out, truth = inject_sensor_faults(batches, faults, rng, sample_step_s=H, nominal_start_s=T0)
    assert len(out) == N_MSG + 3
    late = [f for f in truth if f.kind == "out_of_order"]
    dups = [f for f in truth if f.kind == "duplicate"]
    assert len(late) == 2 and len(dups) == 3
    order = [b.seq for b in out]
    for f in dups:
        i = order.index(f.seqs[0])
        assert order[i + 1] == f.seqs[0]  # the copy follows the original
        assert order.count(f.seqs[0]) == 2
    assert order != sorted(order)
    tracker = SequenceTracker(reorder_window=4)
    released = [e.batch.seq for b in out for e in tracker.push(b) if isinstance(e, Released)]
    released += [e.batch.seq for e in tracker.flush() if isinstance(e, Released)]
    assert released == [b.seq for b in batches]


def test_a_fault_on_a_missing_actuator_is_refused(rng: np.random.Generator) -> None:
    fault = _fault(SensorFaultKind.SPIKE, 0.0, 0.1, actuator=4, size=1.0)
    with pytest.raises(ConfigurationError, match="actuator: 4 is not one of the batches' actuators 1..3"):
        inject_sensor_faults(_batches(rng), [fault], rng, sample_step_s=H, nominal_start_s=T0)
    with pytest.raises(ConfigurationError, match="actuator: a spike fault needs an actuator"):
        SensorFault(SensorFaultKind.SPIKE, T0, 0.1)
