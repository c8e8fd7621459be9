"""Property tests of wire format v1 (hypothesis): round trips of generated batches, and both decoders fed
arbitrary bytes, arbitrary JSON and mutated valid messages never fail other than with a RejectedMessageError
carrying a reason; the sequence tracker's bookkeeping holds for arbitrary arrival orders."""

from __future__ import annotations

import json

import numpy as np
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from numpy.testing import assert_array_equal

from shadow.errors import RejectedMessageError
from shadow.ingest.wire import (
    BINARY_MAGIC,
    Dropped,
    Gap,
    PositionUnit,
    Released,
    SampleBatch,
    SequenceTracker,
    decode_binary,
    decode_json,
    decode_message,
    encode_binary,
    encode_json,
)
from shadow.robots.parameters import MeasuredQuantity

FUZZ = settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
ROBOT_IDS = st.from_regex(r"\A[A-Za-z0-9][A-Za-z0-9._-]{0,63}\Z")


@st.composite
def batches(draw: st.DrawFn, *, max_abs: float = 1e300) -> SampleBatch:
    n_samples = draw(st.integers(1, 12))
    n = draw(st.integers(1, 7))
    shape = (n_samples, n)
    values = st.floats(-max_abs, max_abs, allow_nan=False, allow_infinity=False, width=64)
    matrix = hnp.arrays(np.float64, shape, elements=values)
    t0 = draw(st.floats(0.0, 4.0e9, allow_nan=False))
    steps = draw(hnp.arrays(np.float64, (n_samples - 1,), elements=st.floats(1e-3, 10.0)))
    t = t0 + np.concatenate([[0.0], np.cumsum(steps)])
    assume(bool(np.all(np.diff(t) > 0)))
    kind = draw(st.sampled_from(MeasuredQuantity))
    measured = draw(matrix)
    return SampleBatch(
        robot_id=draw(ROBOT_IDS),
        seq=draw(st.integers(0, 2**64 - 1)),
        position_unit=draw(st.sampled_from(PositionUnit)),
        effort_kind=kind,
        t=t,
        q=draw(matrix),
        qd=draw(st.none() | matrix),
        effort=measured if kind is MeasuredQuantity.EFFORT else None,
        current=measured if kind is MeasuredQuantity.MOTOR_CURRENT else None,
        temperature_k=draw(st.none() | matrix),
        gripping=draw(st.none() | hnp.arrays(np.bool_, (n_samples,))),
    )


def same(a: SampleBatch, b: SampleBatch) -> None:
    assert (a.robot_id, a.seq, a.position_unit, a.effort_kind) == (b.robot_id, b.seq, b.position_unit, b.effort_kind)
    for name in ("t", "q", "qd", "effort", "current", "temperature_k", "gripping"):
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None) == (y is None), name
        if x is not None:
            assert_array_equal(x, y, err_msg=name)


@FUZZ
@given(batches())
def test_round_trip_json_and_binary_are_exact(batch):
    same(decode_message(encode_json(batch)), batch)
    same(decode_message(encode_binary(batch)), batch)


@FUZZ
@given(batches(max_abs=1e30))
def test_round_trip_float32_equals_rounding_to_float32(batch):
    decoded = decode_binary(encode_binary(batch, float32=True))
    assert_array_equal(decoded.t, batch.t)  # time stays float64
    for name in ("q", "qd", "effort", "current", "temperature_k"):
        x = getattr(batch, name)
        if x is not None:
            # IEEE 754 round-to-nearest to binary32 and back is what the float32 blocks carry
            assert_array_equal(getattr(decoded, name), x.astype(np.float32).astype(np.float64), err_msg=name)


def decodes_or_rejects(payload: bytes) -> None:
    """The only allowed failure is a RejectedMessageError with a code and a non-empty reason."""
    for decode in (decode_message, decode_json, decode_binary):
        try:
            result = decode(payload)
        except RejectedMessageError as exc:
            assert exc.reason_code and exc.reason_code.islower()
            assert exc.reason.strip()
        else:
            assert isinstance(result, SampleBatch)


@FUZZ
@given(st.binary(max_size=600))
def test_arbitrary_bytes(payload):
    decodes_or_rejects(payload)


@FUZZ
@given(st.binary(max_size=200))
def test_arbitrary_bytes_after_the_magic(tail):
    decodes_or_rejects(BINARY_MAGIC + tail)
    decodes_or_rejects(BINARY_MAGIC + b"\x01" + tail)


JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=8), inner, max_size=5),
    max_leaves=30,
)


@FUZZ
@given(JSON_VALUES)
def test_arbitrary_json(doc):
    decodes_or_rejects(json.dumps(doc).encode())


@FUZZ
@given(batches(), st.data())
def test_json_documents_with_a_field_replaced(batch, data):
    doc = json.loads(encode_json(batch))
    key = data.draw(st.sampled_from([*doc, "units", "extra"]))
    if key == "units":
        doc["units"][data.draw(st.sampled_from(list(doc["units"])))] = data.draw(JSON_VALUES)
    elif data.draw(st.booleans()):
        doc.pop(key, None)
    else:
        doc[key] = data.draw(JSON_VALUES)
    decodes_or_rejects(json.dumps(doc).encode())


@st.composite
def mutated(draw: st.DrawFn, payload: bytes) -> bytes:
    """Flip, overwrite, insert or delete a few bytes, or truncate."""
    out = bytearray(payload)
    for _ in range(draw(st.integers(1, 4))):
        op = draw(st.sampled_from(["flip", "set", "insert", "delete", "truncate"]))
        at = draw(st.integers(0, max(len(out) - 1, 0)))
        if op == "flip" and out:
            out[at] ^= 1 << draw(st.integers(0, 7))
        elif op == "set" and out:
            out[at] = draw(st.integers(0, 255))
        elif op == "insert":
            out[at:at] = draw(st.binary(min_size=1, max_size=9))
        elif op == "delete" and out:
            del out[at : at + draw(st.integers(1, 9))]
        elif op == "truncate":
            del out[at:]
    return bytes(out)


@FUZZ
@given(batches(), st.data())
def test_mutated_binary_messages(batch, data):
    try:
        payload = encode_binary(batch, float32=data.draw(st.booleans()))
    except RejectedMessageError:  # values beyond the float32 range
        payload = encode_binary(batch)
    decodes_or_rejects(data.draw(mutated(payload)))


@FUZZ
@given(batches(), st.data())
def test_mutated_json_messages(batch, data):
    decodes_or_rejects(data.draw(mutated(encode_json(batch))))


# ------------------------------------------------------------------------------------------------
# Sequence tracker bookkeeping


def stream_batch(seq: int) -> SampleBatch:
    t = 1_790_000_000.0 + 0.01 * seq + 1e-3 * np.arange(3)
    return SampleBatch(
        "delta-01", seq, PositionUnit.RAD, MeasuredQuantity.EFFORT, t, np.zeros((3, 3)), effort=np.zeros((3, 3))
    )


@FUZZ
@given(
    st.lists(st.integers(0, 30), min_size=1, max_size=60),
    st.integers(0, 5),
)
def test_tracker_accounts_for_every_seq_exactly_once(arrivals, window):
    tracker = SequenceTracker(reorder_window=window)
    events = [e for s in arrivals for e in tracker.push(stream_batch(s))]
    events += tracker.flush()
    released = [e.batch.seq for e in events if isinstance(e, Released)]
    gaps = [e for e in events if isinstance(e, Gap)]
    dropped = [e.seq for e in events if isinstance(e, Dropped)]
    assert released == sorted(set(released))  # in order, each at most once
    assert released[0] == arrivals[0]  # the first arrival starts the stream
    covered = sorted(released + [s for g in gaps for s in range(g.first_seq, g.last_seq + 1)])
    assert covered == list(range(arrivals[0], max(arrivals) + 1))  # released or reported missing, never both
    assert len(released) + len(dropped) == len(arrivals)  # every arrival is either passed on or dropped
    for g in gaps:
        assert g.after_t_s < g.before_t_s
