"""Wire format v1: round trips, the documented binary layout, every rejection path, plausibility limits,
the JSON Schema, and the sequence tracker."""

from __future__ import annotations

import json
import math
import pickle
import struct
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from shadow.errors import DecodeError, DescriptionError, RejectedMessageError, ShapeError
from shadow.ingest.wire import (
    BINARY_MAGIC,
    MAX_MESSAGE_BYTES,
    DropKind,
    Dropped,
    Gap,
    PlausibilityLimits,
    PositionUnit,
    Released,
    Restart,
    SampleBatch,
    SequenceTracker,
    TrackerState,
    check_plausible,
    decode_binary,
    decode_json,
    decode_message,
    encode_binary,
    encode_json,
    load_json_schema,
    track_flush,
    track_step,
)
from shadow.robots.parameters import DeltaParameters, Drive, HexapodParameters, MeasuredQuantity

T0 = 1_790_000_000.0  # 2026-09-21, an arbitrary Unix time in seconds
SIGNALS = ("t", "q", "qd", "effort", "current", "temperature_k", "gripping")


def make_batch(
    rng: np.random.Generator,
    n_samples: int = 10,
    n_actuators: int = 3,
    *,
    seq: int = 0,
    t0: float = T0,
    kind: MeasuredQuantity = MeasuredQuantity.EFFORT,
    unit: PositionUnit = PositionUnit.RAD,
    optional: bool = True,
    robot_id: str = "delta-01",
) -> SampleBatch:
    """A batch at 1 kHz with small random values (inside the test limits below)."""
    shape = (n_samples, n_actuators)
    measured = rng.uniform(-5.0, 5.0, shape)
    return SampleBatch(
        robot_id=robot_id,
        seq=seq,
        position_unit=unit,
        effort_kind=kind,
        t=t0 + 1e-3 * np.arange(n_samples),
        q=rng.uniform(-0.5, 0.5, shape),
        qd=rng.normal(size=shape) if optional else None,
        effort=measured if kind is MeasuredQuantity.EFFORT else None,
        current=measured if kind is MeasuredQuantity.MOTOR_CURRENT else None,
        temperature_k=rng.uniform(290.0, 340.0, shape) if optional else None,
        gripping=rng.random(n_samples) > 0.5 if optional else None,
    )


def assert_same_batch(a: SampleBatch, b: SampleBatch, *, rtol: float = 0.0) -> None:
    assert (a.robot_id, a.seq, a.position_unit, a.effort_kind, a.schema_version) == (
        b.robot_id,
        b.seq,
        b.position_unit,
        b.effort_kind,
        b.schema_version,
    )
    for name in SIGNALS:
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None) == (y is None), name
        if x is not None:
            assert x.shape == y.shape, name
            if rtol == 0.0 or name in ("t", "gripping"):
                assert_array_equal(x, y, err_msg=name)
            else:
                assert_allclose(x, y, rtol=rtol, atol=0.0, err_msg=name)


def json_doc(batch: SampleBatch) -> dict:
    return json.loads(encode_json(batch))


def dumps(doc: dict) -> bytes:
    return json.dumps(doc).encode()


# ------------------------------------------------------------------------------------------------
# Round trips


@pytest.mark.parametrize("n_samples", [1, 3, 6, 500])
@pytest.mark.parametrize("kind", list(MeasuredQuantity))
@pytest.mark.parametrize("unit", list(PositionUnit))
def test_round_trip_both_encodings(rng, n_samples, kind, unit):
    batch = make_batch(rng, n_samples, 6 if unit is PositionUnit.M else 3, kind=kind, unit=unit, seq=2**64 - 1)
    assert_same_batch(decode_json(encode_json(batch)), batch)
    assert_same_batch(decode_binary(encode_binary(batch)), batch)
    assert_same_batch(decode_message(encode_json(batch)), batch)
    assert_same_batch(decode_message(encode_binary(batch)), batch)
    # float32 blocks keep about 7 significant digits: IEEE 754 binary32 has a 24-bit significand, 2**-24 = 6e-8
    assert_same_batch(decode_binary(encode_binary(batch, float32=True)), batch, rtol=2.0**-24)


def test_round_trip_without_optional_signals(rng):
    batch = make_batch(rng, 4, optional=False)
    for decoded in (decode_json(encode_json(batch)), decode_binary(encode_binary(batch))):
        assert decoded.qd is None and decoded.temperature_k is None and decoded.gripping is None
        assert_same_batch(decoded, batch)


def test_float32_encoding_refuses_values_it_cannot_hold(rng):
    batch = make_batch(rng, 3)
    big = np.array(batch.effort)
    big[1, 1] = 1e39  # float32 max is about 3.4e38 (IEEE 754 binary32)
    with pytest.raises(RejectedMessageError, match="effort: a value exceeds the float32 range"):
        encode_binary(replace(batch, effort=big), float32=True)
    assert decode_binary(encode_binary(replace(batch, effort=big))).effort[1, 1] == 1e39


def test_decoded_arrays_are_read_only_float64(rng):
    for decoded in (decode_json(encode_json(make_batch(rng))), decode_binary(encode_binary(make_batch(rng)))):
        for name in ("t", "q", "qd", "effort", "temperature_k"):
            a = getattr(decoded, name)
            assert a.dtype == np.float64 and not a.flags.writeable
        assert decoded.gripping.dtype == np.bool_
        with pytest.raises(ValueError, match="read-only"):
            decoded.q[0, 0] = 1.0


def test_decoders_accept_bytearray_and_memoryview(rng):
    batch = make_batch(rng, 3)
    for payload in (encode_json(batch), encode_binary(batch)):
        assert_same_batch(decode_message(bytearray(payload)), batch)
        assert_same_batch(decode_message(memoryview(payload)), batch)


def test_measured_is_the_present_block(rng):
    b = make_batch(rng, 3, kind=MeasuredQuantity.MOTOR_CURRENT)
    assert b.measured is b.current
    assert make_batch(rng, 3).measured is not None


# ------------------------------------------------------------------------------------------------
# The binary layout of docs/wire-format.md, built by hand with struct.pack


def test_binary_layout_from_the_documentation():
    t = [T0, T0 + 0.001]
    q = [[0.1, -0.2, 0.3], [0.11, -0.21, 0.31]]
    qd = [[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]]
    tau = [[10.0, 11.0, 12.0], [13.0, 14.0, 15.0]]
    temp = [[300.0, 301.0, 302.0], [303.0, 304.0, 305.0]]
    rid = b"delta-01"
    flags = 0x01 | 0x02 | 0x04  # velocity, temperature, gripping; effort; rad; float64
    head = b"SHB\x1a" + struct.pack("<BBHIQB", 1, flags, 3, 2, 42, len(rid)) + rid
    assert len(head) == 29
    head += b"\x00" * 3  # padded to 32, a multiple of 8
    body = struct.pack("<2d", *t)
    for block in (q, qd, tau, temp):  # order: position, velocity, effort/current, temperature
        body += struct.pack("<6d", *(v for row in block for v in row))
    body += bytes([1, 0])
    payload = head + body
    assert len(payload) == 32 + 2 * 8 + 4 * 2 * 3 * 8 + 2
    batch = decode_binary(payload)
    assert (batch.robot_id, batch.seq, batch.n_samples, batch.n_actuators) == ("delta-01", 42, 2, 3)
    assert batch.effort_kind is MeasuredQuantity.EFFORT and batch.position_unit is PositionUnit.RAD
    assert_array_equal(batch.t, t)
    assert_array_equal(batch.q, q)
    assert_array_equal(batch.qd, qd)
    assert_array_equal(batch.effort, tau)
    assert_array_equal(batch.temperature_k, temp)
    assert_array_equal(batch.gripping, [True, False])
    assert encode_binary(batch) == payload


def test_binary_layout_float32_currents_linear():
    rid = b"hexa-7"
    flags = 0x08 | 0x10 | 0x20  # motor current, linear (m), float32; no optional blocks
    head = b"SHB\x1a" + struct.pack("<BBHIQB", 1, flags, 6, 1, 7, len(rid)) + rid
    head += b"\x00" * (32 - len(head))
    q = [0.50, 0.51, 0.52, 0.53, 0.54, 0.55]
    amps = [1.5, -2.25, 0.5, 0.0, 3.0, -1.0]  # exactly representable in float32
    payload = head + struct.pack("<d", T0) + struct.pack("<6f", *q) + struct.pack("<6f", *amps)
    batch = decode_binary(payload)
    assert batch.position_unit is PositionUnit.M and batch.effort_kind is MeasuredQuantity.MOTOR_CURRENT
    assert batch.effort is None and batch.qd is None
    assert_allclose(batch.q[0], q, rtol=2.0**-24)
    assert_array_equal(batch.current[0], amps)
    assert encode_binary(batch, float32=True) == payload


def test_magic_cannot_start_a_json_text():
    # RFC 8259: a JSON text starts with optional whitespace then a value; 0x1a is neither
    assert BINARY_MAGIC[3] == 0x1A and not BINARY_MAGIC.decode("ascii").strip().startswith(("{", "["))


# ------------------------------------------------------------------------------------------------
# JSON rejections (each names the field)


def reject_json(doc_or_bytes, match: str, code: str, **kwargs) -> None:
    payload = doc_or_bytes if isinstance(doc_or_bytes, bytes) else dumps(doc_or_bytes)
    with pytest.raises(RejectedMessageError, match=match) as info:
        decode_json(payload, **kwargs)
    assert info.value.reason_code == code
    assert isinstance(info.value, DecodeError) and info.value.reason


def test_json_rejects_degrees_with_a_clear_reason(rng):
    doc = json_doc(make_batch(rng))
    doc["units"]["position"] = "deg"
    reject_json(doc, r"units\.position: 'deg' is not allowed; positions are in 'rad' \(rotary\) or 'm'", "bad_unit")


@pytest.mark.parametrize(
    ("key", "value", "match"),
    [
        ("velocity", "deg/s", r"units\.velocity: 'deg/s' is not allowed; the format requires 'rad/s'"),
        ("effort", "N", r"units\.effort: 'N' is not allowed; the format requires 'N.m'"),
        ("temperature", "Cel", r"units\.temperature: 'Cel' is not allowed; the format requires 'K'"),
        ("time", "ms", r"units\.time: 'ms' is not allowed; the format requires 's'"),
        ("current", "A", r"units\.current: no such signal in this message"),
    ],
)
def test_json_rejects_wrong_units(rng, key, value, match):
    doc = json_doc(make_batch(rng))
    doc["units"][key] = value
    reject_json(doc, match, "bad_unit")


def test_json_rejects_missing_unit_and_non_object_units(rng):
    doc = json_doc(make_batch(rng))
    del doc["units"]["velocity"]
    reject_json(doc, r"units\.velocity: missing; the format requires 'rad/s'", "bad_unit")
    doc["units"] = "SI"
    reject_json(doc, "units: expected an object", "bad_field")


def test_json_linear_units_are_metres(rng):
    batch = make_batch(rng, 2, 6, unit=PositionUnit.M)
    doc = json_doc(batch)
    assert doc["units"] == {"time": "s", "position": "m", "velocity": "m/s", "effort": "N", "temperature": "K"}
    doc["units"]["effort"] = "N.m"
    reject_json(doc, r"units\.effort: 'N.m' is not allowed; the format requires 'N'", "bad_unit")


def test_json_size_limit_is_checked_before_parsing():
    reject_json(b"{" * (MAX_MESSAGE_BYTES + 1), "exceeds the limit of 1048576 bytes", "too_large")
    reject_json(b'{"version": 1}', "exceeds the limit of 10 bytes", "too_large", max_bytes=10)


@pytest.mark.parametrize(
    ("payload", "match", "code"),
    [
        (b"", "empty message", "empty"),
        (b"\xff\xfe{}", "not UTF-8", "bad_json"),
        (b'{"version": 1', "not valid JSON", "bad_json"),
        (b"[1, 2]", "expected a JSON object, got list", "bad_json"),
        (b"[" * 100_000, "not valid JSON", "bad_json"),
    ],
)
def test_json_rejects_malformed_payloads(payload, match, code):
    reject_json(payload, match, code)


def test_rejects_non_bytes_payload():
    with pytest.raises(RejectedMessageError, match="payload: expected bytes, got str"):
        decode_message("{}")  # type: ignore[arg-type]
    with pytest.raises(RejectedMessageError, match="payload: a memoryview must be C-contiguous"):
        decode_message(memoryview(b"{}{}")[::2])


@pytest.mark.parametrize(
    ("mutate", "match", "code"),
    [
        (lambda d: d.pop("seq"), "seq: required field missing", "bad_field"),
        (lambda d: d.update(velocities=[[0.0]]), "velocities: unknown field", "bad_field"),
        (lambda d: d.update(version=2), "version: 2 is not supported", "bad_version"),
        (lambda d: d.update(version=True), "version: True is not supported", "bad_version"),
        (lambda d: d.update(seq=-1), r"seq: -1 is not an integer in \[0, 2\*\*64 - 1\]", "bad_seq"),
        (lambda d: d.update(seq=2**64), "seq: 18446744073709551616 is not an integer", "bad_seq"),
        (lambda d: d.update(seq=True), "seq: True is not an integer", "bad_seq"),
        (lambda d: d.update(seq=3.0), "seq: 3.0 is not an integer", "bad_seq"),
        (lambda d: d.update(robot="cell/7"), "robot: 'cell/7' must be 1-64 of", "bad_robot_id"),
        (lambda d: d.update(robot="+"), "robot: '\\+' must be 1-64 of", "bad_robot_id"),
        (lambda d: d.update(robot="r" * 65), "robot: 'r+' must be 1-64 of", "bad_robot_id"),
        (lambda d: d.update(robot=7), "robot: 7 must be 1-64 of", "bad_robot_id"),
        (lambda d: d.update(effort_kind="torque"), "effort_kind: 'torque' must be 'effort' or", "bad_field"),
        (lambda d: d.update(time="now"), "time: expected a list of N numbers", "bad_field"),
        (lambda d: d.update(time=[T0, "x", T0 + 1]), "time: expected a list of N numbers", "bad_field"),
        (lambda d: d.update(time=[], position=[]), "time: a batch needs at least one sample, got 0", "bad_shape"),
        (lambda d: d.update(time=[T0, T0 + 1.0]), r"position: expected shape \(2, n\), got \(3, 3\)", "bad_shape"),
        (lambda d: d["position"].__setitem__(0, [0.0, 0.0]), "position: not an array of numbers", "bad_field"),
        (lambda d: d["position"].__setitem__(0, 0.5), "position: expected a list of N rows", "bad_field"),
        (lambda d: d["position"][0].__setitem__(1, "1.5"), "position: every element must be a number", "bad_field"),
        (lambda d: d["position"][0].__setitem__(1, True), "position: every element must be a number", "bad_field"),
        (lambda d: d["position"][0].__setitem__(1, None), "position: every element must be a number", "bad_field"),
        (lambda d: d["position"][0].__setitem__(1, 10**400), "position: not an array of numbers", "bad_field"),
        (lambda d: d.update(position=[[], [], []]), r"position: 0 actuators, expected 1 to 64", "bad_shape"),
        (lambda d: d.update(effort=[[0.0] * 3] * 2), r"effort: expected shape \(3, 3\), got \(2, 3\)", "bad_shape"),
        (lambda d: d.update(temperature=[[300.0] * 2] * 3), r"temperature: expected shape \(3, 3\)", "bad_shape"),
        (lambda d: d.pop("effort"), "effort: required when effort_kind is 'effort'", "bad_field"),
        (
            lambda d: (d.update(current=d["effort"]), d["units"].update(current="A")),
            "current: not allowed when effort_kind is 'effort'",
            "bad_field",
        ),
        (lambda d: d.update(time=[T0, T0, T0 + 1]), r"time: not strictly increasing at sample 1", "time_order"),
        (lambda d: d.update(time=[T0, T0 + 2, T0 + 1]), "time: not strictly increasing at sample 2", "time_order"),
        (lambda d: d.update(gripping=[1, 0, 1]), "gripping: expected a list of N booleans", "bad_field"),
        (lambda d: d.update(gripping=None), "gripping: null is not allowed", "bad_field"),
        (lambda d: d.update(gripping=[True]), r"gripping: expected shape \(3,\), got \(1,\)", "bad_shape"),
        (lambda d: d.update(gripping=[]), r"gripping: expected shape \(3,\), got \(0,\)", "bad_shape"),
    ],
)
def test_json_rejections(rng, mutate, match, code):
    doc = json_doc(make_batch(rng, 3))
    mutate(doc)
    reject_json(doc, match, code)


def test_json_rejects_nan_and_infinity_constants(rng):
    text = encode_json(make_batch(rng, 3)).decode()
    first = text.index('"position":[[') + len('"position":[[')
    end = text.index(",", first)
    for constant in ("NaN", "Infinity", "-Infinity"):
        reject_json(
            (text[:first] + constant + text[end:]).encode(), f"JSON constant {constant} is not allowed", "non_finite"
        )
    # a literal that overflows float64 parses to inf (Python json), and is caught by the finiteness check
    reject_json(
        (text[:first] + "1e400" + text[end:]).encode(),
        r"position: non-finite value inf at index \(0, 0\)",
        "non_finite",
    )


def test_json_accepts_extension_fields_and_integers(rng):
    doc = json_doc(make_batch(rng, 3))
    doc["x-gateway"] = {"firmware": "1.2"}
    doc["position"] = [[0, 1, -1]] * 3
    batch = decode_json(dumps(doc))
    assert batch.q.dtype == np.float64
    assert_array_equal(batch.q, [[0.0, 1.0, -1.0]] * 3)


def test_expected_actuator_count(rng):
    payloads = (encode_json(make_batch(rng, 2)), encode_binary(make_batch(rng, 2)))
    for payload in payloads:
        assert decode_message(payload, n_actuators=3).n_actuators == 3
        with pytest.raises(RejectedMessageError, match="position: 3 actuators, expected 6") as info:
            decode_message(payload, n_actuators=6)
        assert info.value.reason_code == "bad_shape"


# ------------------------------------------------------------------------------------------------
# Binary rejections


def binary_parts(rng, **kwargs) -> bytearray:
    return bytearray(encode_binary(make_batch(rng, 3, **kwargs)))


def reject_binary(payload, match: str, code: str) -> None:
    with pytest.raises(RejectedMessageError, match=match) as info:
        decode_binary(bytes(payload))
    assert info.value.reason_code == code


def test_binary_rejections_header(rng):
    good = binary_parts(rng)
    reject_binary(b"", "empty message", "empty")
    reject_binary(good[:20], "header: 20 bytes, a binary message needs at least 21", "truncated")
    reject_binary(b"SHB\x1b" + good[4:], r"magic: b'SHB\\x1b' is not", "bad_magic")
    bad = good.copy()
    bad[4] = 2
    reject_binary(bad, "version: 2 is not supported", "bad_version")
    bad = good.copy()
    bad[5] |= 0x40
    reject_binary(bad, "flags: reserved bits set in 0x47", "bad_flags")
    for n, match in ((0, "n_actuators: 0, expected 1 to 64"), (65, "n_actuators: 65, expected 1 to 64")):
        bad = good.copy()
        struct.pack_into("<H", bad, 6, n)
        reject_binary(bad, match, "bad_shape")
    bad = good.copy()
    struct.pack_into("<I", bad, 8, 0)
    reject_binary(bad, "n_samples: a batch needs at least one sample, got 0", "bad_shape")
    for length in (0, 65):
        bad = good.copy()
        bad[20] = length
        reject_binary(bad, f"robot_id_length: {length}, expected 1 to 64", "bad_robot_id")


def test_binary_rejections_length(rng):
    good = binary_parts(rng)
    reject_binary(
        good[:-1], rf"length: {len(good) - 1} bytes, header \(n=3, N=3, flags=0x07\) implies {len(good)}", "truncated"
    )
    reject_binary(good + b"\x00", rf"length: {len(good) + 1} bytes, .* implies {len(good)}", "bad_length")
    bad = good.copy()
    struct.pack_into("<I", bad, 8, 2**32 - 1)  # a huge N must not allocate anything
    reject_binary(bad, "length: .* implies", "truncated")
    bad = good.copy()
    bad[5] &= ~0x01  # claim there is no velocity block: the length no longer matches
    reject_binary(bad, "length: .* implies", "bad_length")


def test_binary_rejections_robot_id_and_padding(rng):
    good = binary_parts(rng)  # "delta-01": 21 + 8 = 29 bytes, padded to 32
    bad = good.copy()
    bad[30] = 1
    reject_binary(bad, "padding: bytes after the robot id must be zero", "bad_padding")
    bad = good.copy()
    bad[21] = 0xC3
    reject_binary(bad, "robot: .* is not ASCII", "bad_robot_id")
    bad = good.copy()
    bad[21:23] = b"+/"
    reject_binary(bad, r"robot: '\+/lta-01' must be 1-64 of", "bad_robot_id")


def test_binary_rejections_values(rng):
    batch = make_batch(rng, 3)
    good = bytearray(encode_binary(batch))
    t_at, q_at = 32, 32 + 3 * 8
    bad = good.copy()
    struct.pack_into("<d", bad, q_at + 8 * 4, math.nan)  # q[1, 1]
    reject_binary(bad, r"position: non-finite value nan at index \(1, 1\)", "non_finite")
    bad = good.copy()
    struct.pack_into("<d", bad, t_at + 8, T0 - 1.0)  # t[1] < t[0]
    reject_binary(bad, "time: not strictly increasing at sample 1", "time_order")
    bad = good.copy()
    bad[-2] = 2
    reject_binary(bad, "gripping: byte 2 at sample 1, expected 0 or 1", "bad_field")


def test_decode_message_dispatches_on_magic(rng):
    with pytest.raises(RejectedMessageError, match="not valid JSON"):
        decode_message(b"SHB\x1b" + bytes(40))
    with pytest.raises(RejectedMessageError, match="version: 0 is not supported"):
        decode_message(BINARY_MAGIC + bytes(40))


# ------------------------------------------------------------------------------------------------
# Plausibility against a robot description (invented demo robot)


def demo_drive(rated: float, *, lead_m: float | None = None) -> Drive:
    return Drive(
        rotor_inertia_kg_m2=1.2e-4,
        gear_ratio=20.0,
        efficiency=0.9,
        torque_constant_nm_per_a=0.6,
        current_loop_bandwidth_hz=800.0,
        rated_effort=rated,
        screw_lead_m=lead_m,
    )


def demo_delta() -> DeltaParameters:
    return DeltaParameters(
        base_radius_m=0.2,
        platform_radius_m=0.05,
        upper_arm_length_m=0.35,
        forearm_length_m=0.8,
        first_leg_azimuth_rad=0.0,
        upper_arm_mass_kg=1.5,
        upper_arm_com_m=0.15,
        upper_arm_inertia_kg_m2=0.05,
        forearm_mass_kg=0.4,
        platform_mass_kg=0.6,
        drives=(demo_drive(60.0), demo_drive(60.0), demo_drive(60.0)),
        joint_lower_rad=np.full(3, -0.6),
        joint_upper_rad=np.full(3, 1.4),
    )


def demo_hexapod() -> HexapodParameters:
    angles = np.deg2rad([0, 60, 120, 180, 240, 300])
    ring = np.stack([np.cos(angles), np.sin(angles), np.zeros(6)], axis=1)
    drive = demo_drive(2000.0, lead_m=0.005)
    return HexapodParameters(
        base_joints_m=0.5 * ring,
        platform_joints_m=0.3 * ring,
        lower_leg_mass_kg=2.0,
        lower_leg_com_m=0.1,
        lower_leg_inertia_kg_m2=0.02,
        upper_leg_mass_kg=1.0,
        upper_leg_com_m=0.1,
        upper_leg_inertia_kg_m2=0.01,
        platform_mass_kg=20.0,
        platform_com_m=np.zeros(3),
        platform_inertia_kg_m2=np.eye(3),
        drives=(drive,) * 6,
        leg_lower_m=0.45,
        leg_upper_m=0.75,
        home_position_m=np.array([0.0, 0.0, 0.6]),
    )


def test_rated_currents_follow_the_transmission_laws():
    # motor torque T = k_t i (permanent-magnet motor); gearbox: joint torque = n T (ideal, efficiency ignored)
    delta = PlausibilityLimits.for_delta(demo_delta())
    assert_allclose(delta.rated_current_a, 60.0 / (20.0 * 0.6), rtol=1e-15)
    # ideal screw, work balance over one screw turn: F h = 2 pi T_screw with T_screw = n T (principle of virtual work)
    hexa = PlausibilityLimits.for_hexapod(demo_hexapod())
    motor_torque = 2000.0 * 0.005 / (2.0 * math.pi * 20.0)
    assert_allclose(hexa.rated_current_a, motor_torque / 0.6, rtol=1e-15)
    assert hexa.position_unit is PositionUnit.M and hexa.n_actuators == 6
    assert_array_equal(hexa.position_lower, 0.45)


def test_hexapod_limits_need_a_screw_lead():
    params = demo_hexapod()
    broken = HexapodParameters(
        **{**{f: getattr(params, f) for f in params.__slots__}, "drives": (demo_drive(1.0),) * 6}
    )
    with pytest.raises(DescriptionError, match=r"drives\[0\].screw_lead_m: required for a hexapod"):
        PlausibilityLimits.for_hexapod(broken)


def test_limits_check_their_shapes():
    base = PlausibilityLimits.for_delta(demo_delta())
    fields = {f: getattr(base, f) for f in base.__slots__}
    with pytest.raises(ShapeError, match=r"rated_effort: expected shape \(3,\), got \(2,\)"):
        PlausibilityLimits(**{**fields, "rated_effort": np.ones(2)})
    with pytest.raises(ShapeError, match=r"position_lower: expected shape \(1,\), got \(\)"):
        PlausibilityLimits(**{**fields, "position_lower": 0.0})


def plausible_batch(rng, **kwargs) -> SampleBatch:
    return make_batch(rng, 6, **kwargs)


def replace(batch: SampleBatch, **changes) -> SampleBatch:
    fields = {name: getattr(batch, name) for name in SampleBatch.__slots__}
    fields.update(changes)
    return SampleBatch(**fields)


def test_plausible_batch_passes(rng):
    limits = PlausibilityLimits.for_delta(demo_delta())
    check_plausible(plausible_batch(rng), limits)
    check_plausible(plausible_batch(rng, kind=MeasuredQuantity.MOTOR_CURRENT), limits)
    decode_message(encode_binary(plausible_batch(rng)), limits=limits, n_actuators=3)


@pytest.mark.parametrize(
    ("field", "index", "value", "inside", "match"),
    [
        ("q", (2, 1), 1.46, 1.449, r"position: 1.46 rad at sample 2, actuator 1 is outside \[-0.65, 1.45\] rad"),
        ("q", (0, 0), -0.66, -0.649, r"position: -0.66 rad at sample 0, actuator 0 is outside \[-0.65, 1.45\] rad"),
        ("effort", (4, 2), -180.5, -179.9, r"effort: -180.5 N.m at sample 4, actuator 2 is outside \[-180, 180\] N.m"),
        (
            "temperature_k",
            (1, 0),
            199.0,
            200.1,
            r"temperature: 199.0 K at sample 1, actuator 0 is outside \[200, 450\]",
        ),
        (
            "temperature_k",
            (5, 2),
            451.0,
            449.9,
            r"temperature: 451.0 K at sample 5, actuator 2 is outside \[200, 450\]",
        ),
    ],
)
def test_implausible_values(rng, field, index, value, inside, match):
    # limits of the demo delta: joints [-0.6, 1.4] rad + 0.05 margin, 3 x 60 N m rated, 200-450 K
    limits = PlausibilityLimits.for_delta(demo_delta())
    batch = plausible_batch(rng)
    a = np.array(getattr(batch, field))
    a[index] = value
    with pytest.raises(RejectedMessageError, match=match) as info:
        check_plausible(replace(batch, **{field: a}), limits)
    assert info.value.reason_code == "implausible"
    a[index] = inside  # the same batch with the value just inside the limit passes
    check_plausible(replace(batch, **{field: a}), limits)


def test_implausible_current_velocity_and_time(rng):
    base = PlausibilityLimits.for_delta(demo_delta())  # rated current 5 A, so the cap is 15 A
    batch = plausible_batch(rng, kind=MeasuredQuantity.MOTOR_CURRENT)
    amps = np.array(batch.current)
    amps[3, 1] = 15.5
    with pytest.raises(RejectedMessageError, match=r"current: 15.5 A at sample 3, actuator 1 is outside \[-15, 15\] A"):
        check_plausible(replace(batch, current=amps), base)
    limits = PlausibilityLimits(**{**{f: getattr(base, f) for f in base.__slots__}, "velocity_limit": np.full(3, 2.0)})
    qd = np.zeros((6, 3))
    qd[0, 2] = -2.5
    with pytest.raises(
        RejectedMessageError, match=r"velocity: -2.5 rad/s at sample 0, actuator 2 is outside \[-2, 2\]"
    ):
        check_plausible(replace(batch, qd=qd), limits)
    with pytest.raises(RejectedMessageError, match="time: 1000.0 s is before 946684800.0 s; times are seconds since"):
        check_plausible(make_batch(rng, 3, t0=1000.0), base)
    late = PlausibilityLimits(**{**{f: getattr(base, f) for f in base.__slots__}, "latest_time_s": T0})
    with pytest.raises(RejectedMessageError, match="time: .* s is after the latest accepted"):
        check_plausible(make_batch(rng, 3), late)


def test_implausible_unit_and_count(rng):
    delta = PlausibilityLimits.for_delta(demo_delta())
    with pytest.raises(RejectedMessageError, match="units.position: 'm', but this robot's positions are in 'rad'"):
        check_plausible(make_batch(rng, 2, unit=PositionUnit.M), delta)
    with pytest.raises(RejectedMessageError, match="position: 6 actuators, this robot has 3"):
        check_plausible(make_batch(rng, 2, 6), delta)


# ------------------------------------------------------------------------------------------------
# JSON Schema (draft 2020-12, validated with the jsonschema library)


@pytest.fixture(scope="module")
def validator() -> jsonschema.Draft202012Validator:
    schema = load_json_schema()
    jsonschema.Draft202012Validator.check_schema(schema)  # the schema itself is valid draft 2020-12
    return jsonschema.Draft202012Validator(schema)


@pytest.mark.parametrize("kind", list(MeasuredQuantity))
@pytest.mark.parametrize("unit", list(PositionUnit))
@pytest.mark.parametrize("optional", [True, False])
def test_schema_accepts_encoder_output(rng, validator, kind, unit, optional):
    doc = json_doc(make_batch(rng, 5, 3 if unit is PositionUnit.RAD else 6, kind=kind, unit=unit, optional=optional))
    assert list(validator.iter_errors(doc)) == []


@pytest.mark.parametrize(
    "mutate",
    [
        lambda d: d["units"].update(position="deg"),
        lambda d: d["units"].update(velocity="m/s"),
        lambda d: d["units"].update(temperature="Cel"),
        lambda d: d["units"].pop("velocity"),
        lambda d: d["units"].update(current="A"),
        lambda d: d.pop("effort"),
        lambda d: d.update(current=d["effort"]),
        lambda d: d.update(effort_kind="torque"),
        lambda d: d.update(version=2),
        lambda d: d.update(seq=-1),
        lambda d: d.update(seq=2**64),
        lambda d: d.update(robot="a/b"),
        lambda d: d.update(velocities=[]),
        lambda d: d.update(time=[]),
        lambda d: d["position"][0].__setitem__(0, "0.1"),
        lambda d: d.update(gripping=[0, 1, 0, 1, 0]),
        lambda d: d.pop("time"),
    ],
)
def test_schema_and_decoder_reject_invalid_examples(rng, validator, mutate):
    doc = json_doc(make_batch(rng, 5))
    mutate(doc)
    assert not validator.is_valid(doc)
    with pytest.raises(RejectedMessageError):
        decode_json(dumps(doc))


# ------------------------------------------------------------------------------------------------
# Sequence tracker


def batch_at(rng, seq: int, *, t0: float | None = None) -> SampleBatch:
    """Batch ``seq`` of a 10-sample, 1 kHz stream: samples at T0 + 0.01 seq + 0.001 k."""
    return make_batch(rng, 10, seq=seq, t0=T0 + 0.01 * seq if t0 is None else t0, optional=False)


def released_seqs(events) -> list[int]:
    return [e.batch.seq for e in events if isinstance(e, Released)]


def test_tracker_in_order_and_duplicates(rng):
    tracker = SequenceTracker(reorder_window=2)
    assert released_seqs(tracker.push(batch_at(rng, 5))) == [5]  # the first batch may start anywhere
    assert released_seqs(tracker.push(batch_at(rng, 6))) == [6]
    assert tracker.push(batch_at(rng, 6)) == (Dropped(6, DropKind.DUPLICATE),)
    assert tracker.push(batch_at(rng, 4)) == (Dropped(4, DropKind.DUPLICATE),)
    assert tracker.state.next_seq == 7


def test_tracker_reorders_within_window(rng):
    tracker = SequenceTracker(reorder_window=2)
    tracker.push(batch_at(rng, 0))
    assert tracker.push(batch_at(rng, 2)) == ()  # held, waiting for 1
    assert tracker.push(batch_at(rng, 2)) == (Dropped(2, DropKind.DUPLICATE),)
    assert tracker.push(batch_at(rng, 3)) == ()
    assert released_seqs(tracker.push(batch_at(rng, 1))) == [1, 2, 3]


def test_tracker_gap_reports_the_unmonitored_interval(rng):
    tracker = SequenceTracker(reorder_window=2)
    tracker.push(batch_at(rng, 0))
    assert tracker.push(batch_at(rng, 3)) == ()  # 3 - 1 <= 2: wait for 1
    events = tracker.push(batch_at(rng, 4))  # 4 - 1 > 2: give up on 1 and 2
    gap = events[0]
    assert isinstance(gap, Gap) and (gap.first_seq, gap.last_seq, gap.n_missing) == (1, 2, 2)
    assert_allclose(gap.after_t_s, T0 + 0.009, rtol=0, atol=1e-9)  # last sample of batch 0
    assert_allclose(gap.before_t_s, T0 + 0.03, rtol=0, atol=1e-9)  # first sample of batch 3
    assert released_seqs(events) == [3, 4]
    assert released_seqs(tracker.push(batch_at(rng, 5))) == [5]
    assert tracker.push(batch_at(rng, 2)) == (Dropped(2, DropKind.LATE),)


def test_tracker_window_zero_declares_gaps_at_once(rng):
    tracker = SequenceTracker(reorder_window=0)
    tracker.push(batch_at(rng, 0))
    events = tracker.push(batch_at(rng, 2))
    assert isinstance(events[0], Gap) and events[0].first_seq == 1 and released_seqs(events) == [2]


def test_tracker_restart(rng):
    tracker = SequenceTracker(reorder_window=3)
    for s in (100, 101, 103):
        tracker.push(batch_at(rng, s))
    events = tracker.push(batch_at(rng, 0, t0=T0 + 5.0))  # seq reset, newer samples: the sender restarted
    assert isinstance(events[0], Gap) and (events[0].first_seq, events[0].last_seq) == (102, 102)
    assert released_seqs(events) == [103, 0]
    restart = events[2]
    assert isinstance(restart, Restart) and (restart.previous_seq, restart.new_seq) == (103, 0)
    assert_allclose([restart.after_t_s, restart.before_t_s], [T0 + 1.039, T0 + 5.0], rtol=0, atol=1e-9)
    assert released_seqs(tracker.push(batch_at(rng, 1, t0=T0 + 5.01))) == [1]


def test_tracker_drops_time_overlap(rng):
    tracker = SequenceTracker()
    tracker.push(batch_at(rng, 0))
    assert tracker.push(batch_at(rng, 1, t0=T0 + 0.005)) == (Dropped(1, DropKind.TIME_OVERLAP),)
    assert released_seqs(tracker.push(batch_at(rng, 2))) == [2]


def test_tracker_flush_and_robot_mismatch(rng):
    tracker = SequenceTracker(reorder_window=5)
    tracker.push(batch_at(rng, 0))
    tracker.push(batch_at(rng, 2))
    tracker.push(batch_at(rng, 4))
    events = tracker.flush()
    assert [type(e) for e in events] == [Gap, Released, Gap, Released]
    assert tracker.state.held == () and tracker.state.next_seq == 5
    assert track_flush(tracker.state)[1] == ()
    with pytest.raises(RejectedMessageError, match="robot: 'delta-02' given to the tracker of 'delta-01'"):
        tracker.push(make_batch(rng, 2, robot_id="delta-02", seq=5, t0=T0 + 1))
    with pytest.raises(ValueError, match="reorder_window: -1 must be >= 0"):
        SequenceTracker(reorder_window=-1)


def event_key(event) -> tuple:
    if isinstance(event, Released):
        b = event.batch
        return ("released", b.seq, b.t.tobytes(), b.q.tobytes(), b.effort.tobytes())
    return (type(event).__name__, event)


def arrival_order(rng) -> list[int]:
    seqs = [s for s in range(40) if s not in (7, 8, 21)] + [3, 12]  # losses and duplicates
    order = np.array(seqs)
    order[10:16] = order[10:16][::-1]  # a local reordering
    return [int(s) for s in order]


def test_tracker_save_restore_is_exact(rng):
    stream = [batch_at(rng, s) for s in arrival_order(rng)]
    whole = SequenceTracker(reorder_window=3)
    reference = [event_key(e) for b in stream for e in whole.push(b)]
    part = SequenceTracker(reorder_window=3)
    got = []
    for i, b in enumerate(stream):
        if i % 7 == 3:  # save and restore through JSON text every few messages
            text = json.dumps(part.state.to_dict())
            part = SequenceTracker(reorder_window=3, state=TrackerState.from_dict(json.loads(text)))
        got.extend(event_key(e) for e in part.push(b))
    assert got == reference


def test_tracker_wrapper_matches_step_function(rng):
    stream = [batch_at(rng, s) for s in arrival_order(rng)]
    tracker = SequenceTracker(reorder_window=2)
    state = TrackerState()
    for b in stream:
        state, events = track_step(state, b, reorder_window=2)
        assert [event_key(e) for e in tracker.push(b)] == [event_key(e) for e in events]
    assert tracker.state.to_dict() == state.to_dict()


def test_documented_json_example_decodes_and_validates(validator):
    text = (Path(__file__).resolve().parents[2] / "docs" / "wire-format.md").read_text(encoding="utf-8")
    example = text.split("```json\n", 1)[1].split("```", 1)[0]
    batch = decode_json(example.encode())
    assert validator.is_valid(json.loads(example))
    assert (batch.robot_id, batch.seq, batch.n_samples, batch.n_actuators) == ("delta-01", 42, 2, 3)
    assert_array_equal(batch.gripping, [False, True])
    # the documented binary example is this batch: 146 bytes, as the table's length formula gives
    assert len(encode_binary(batch)) == 32 + 8 * 2 + 2 * 8 * 2 * 3 + 2 == 146


def test_rejection_keeps_its_code_through_pickle():
    error = pickle.loads(pickle.dumps(RejectedMessageError("bad_unit", "units.position: 'deg' is not allowed")))
    assert (error.reason_code, error.reason, str(error)) == (
        "bad_unit",
        "units.position: 'deg' is not allowed",
        "bad_unit: units.position: 'deg' is not allowed",
    )
