"""``python -m simulators scenario``: a recording shadow's reader accepts, the truth file, errors, publishing."""

from __future__ import annotations

import json
import threading
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest

from shadow.analysis.recording import read_recording
from simulators.__main__ import main
from simulators.scenario import SECONDS_PER_DAY, TRUTH_FORMAT, load_scenario

SCENARIO = """
format = "shadow-scenario/1"
name = "command-test"
robot = "delta_packaging"
seed = 9
start = 2026-03-02T06:00:00Z
horizon_days = 3

[sampling]
windows = 3
window_s = 0.2

[[faults.sensor]]
kind = "duplicate"
windows = [1]

[[faults.sensor]]
kind = "dropout"
windows = [2]
offset_s = 0.05
duration_s = 0.02
"""


def test_command_writes_a_recording_the_reader_accepts(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "s.toml"
    path.write_text(SCENARIO)
    out, truth = tmp_path / "run.jsonl", tmp_path / "run.truth.json"
    assert main(["scenario", str(path), "--record", str(out), "--truth", str(truth)]) == 0
    captured = capsys.readouterr()
    assert "window 3/3" in captured.err
    assert "59 messages of 3 windows" in captured.out  # 3 x 20, one duplicate more, two lost
    sc = load_scenario(path)
    recording = read_recording(out, sc.description)
    assert recording.robot_id == sc.description.name
    doc = json.loads(truth.read_text())
    (duplicate,) = doc["windows"][1]["sensor_faults"]
    assert len(recording.batches) == 58  # the duplicate is skipped (its time does not follow)
    assert [s.line for s in recording.skipped] == [duplicate["seqs"][0] + 2]  # the line after the original
    assert recording.start_s == pytest.approx(sc.start_s, abs=1e-3)
    assert recording.end_s == pytest.approx(sc.start_s + 3 * SECONDS_PER_DAY, abs=2e-3)
    assert doc["format"] == TRUTH_FORMAT and doc["seed"] == 9 and len(doc["windows"]) == 3
    assert [f["kind"] for f in doc["windows"][2]["sensor_faults"]] == ["dropout"]
    assert doc["windows"][2]["sensor_faults"][0]["seqs"] == [45, 46]


def test_command_names_the_bad_key(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "bad.toml"
    path.write_text(SCENARIO.replace("window_s = 0.2", "window_s = 0.2\nwindow_ms = 200"))
    assert main(["scenario", str(path), "--record", str(tmp_path / "x.jsonl")]) == 2
    assert "sampling.window_ms: unknown key" in capsys.readouterr().err
    path.write_text(SCENARIO)
    assert main(["scenario", str(path)]) == 2
    assert "give --record FILE, --publish, or both" in capsys.readouterr().err


@pytest.mark.mosquitto
def test_command_publishes_to_the_broker(mosquitto_broker, tmp_path: Path) -> None:
    path = tmp_path / "s.toml"
    path.write_text(SCENARIO)
    topic = "shadow/v1/site-t/cell-t/+/samples"
    got: list[bytes] = []
    subscribed = threading.Event()
    sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="scenario-test-sub")
    sub.on_subscribe = lambda c, u, mid, rc, props: subscribed.set()
    sub.on_message = lambda c, u, msg: got.append(msg.payload)
    assert sub.connect(mosquitto_broker.host, mosquitto_broker.port) == mqtt.MQTT_ERR_SUCCESS
    sub.loop_start()
    try:
        sub.subscribe(topic, qos=1)
        assert subscribed.wait(10)
        broker = ["--host", mosquitto_broker.host, "--port", str(mosquitto_broker.port)]
        where = ["--site", "site-t", "--cell", "cell-t", "--truth", str(tmp_path / "t.json")]
        argv = ["scenario", str(path), "--publish", *broker, *where]
        assert main(argv) == 0
        for _ in range(100):
            if len(got) >= 59:
                break
            threading.Event().wait(0.1)
    finally:
        sub.loop_stop()
        sub.disconnect()
    assert len(got) == 59
