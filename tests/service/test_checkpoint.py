"""Checkpoint packing: the monitors' real state round-trips exactly; older (npz) checkpoints still resume."""

from __future__ import annotations

import io
import json

import numpy as np
import pytest

from shadow.errors import ShadowError
from shadow.ingest.wire import TrackerState
from shadow.monitoring import RobotMonitor, default_settings
from shadow.robots.description import example_paths, load_description
from shadow.service import CHECKPOINT_MAGIC, pack_checkpoint, unpack_checkpoint


def monitor_state(family: str) -> dict[str, np.ndarray]:
    path = next(p for p in example_paths() if family in p.name)
    description = load_description(path)
    monitor = RobotMonitor("kestrel/cp/r1", description, None, default_settings(description, sample_rate_hz=1000.0))
    return monitor.save_state()


def assert_same_state(got: dict[str, np.ndarray], want: dict[str, np.ndarray]) -> None:
    assert list(got) == list(want)
    for name, value in want.items():
        value = np.asarray(value)
        assert got[name].dtype == value.dtype and got[name].shape == value.shape, name
        np.testing.assert_array_equal(got[name], value, err_msg=name)  # NaN equals NaN here


@pytest.mark.parametrize("family", ["delta", "hexapod"])
def test_a_monitors_state_round_trips_with_dtypes_and_shapes(family: str) -> None:
    state = monitor_state(family)
    assert any(np.asarray(v).ndim == 0 for v in state.values())  # scalars stay scalars (0-d)
    sequence = TrackerState(robot_id="r1", next_seq=42, last_t_s=1.8e9 + 0.125)
    data = pack_checkpoint(state, sequence)
    assert data.startswith(CHECKPOINT_MAGIC)
    got, seq = unpack_checkpoint(data)
    assert_same_state(got, state)
    assert seq.to_dict() == sequence.to_dict()
    assert all(a.flags.writeable for a in got.values())  # not views of the stored bytes


def test_a_format_1_checkpoint_of_an_older_version_still_resumes() -> None:
    state = monitor_state("delta")
    sequence = TrackerState(robot_id="r1", next_seq=7, last_t_s=12.5)
    meta = json.dumps({"format": 1, "sequence": sequence.to_dict()})  # what the previous version wrote
    buffer = io.BytesIO()
    np.savez(buffer, __meta__=np.frombuffer(meta.encode(), dtype=np.uint8), **state)
    got, seq = unpack_checkpoint(buffer.getvalue())
    assert_same_state(got, state)
    assert seq.next_seq == 7 and seq.last_t_s == 12.5


def test_damaged_or_foreign_checkpoints_are_refused_never_reset() -> None:
    data = pack_checkpoint({"a": np.arange(4.0)}, TrackerState())
    with pytest.raises(ShadowError, match="unknown leading bytes"):
        unpack_checkpoint(b"garbage" + data)
    with pytest.raises(ShadowError, match="'a' is damaged"):
        unpack_checkpoint(data[:-8])
    with pytest.raises(ShadowError, match="bytes after the last array"):
        unpack_checkpoint(data + b"\0")
    with pytest.raises(ShadowError, match="dtype object"):
        pack_checkpoint({"a": np.array([None])}, TrackerState())
