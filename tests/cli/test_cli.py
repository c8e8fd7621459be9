"""The ``shadow`` command: help lists every command with one line, bad options fail clearly, the demo stops."""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from shadow.cli import build_parser, main
from tests.servers import free_loopback_port

COMMANDS = ("demo", "serve", "robot", "commission", "analyze", "report")


def run_cli(*args: str, timeout_s: float = 60) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "shadow", *args], capture_output=True, text=True, timeout=timeout_s, check=False
    )


def test_help_lists_each_command_with_one_line() -> None:
    result = run_cli("--help")
    assert result.returncode == 0
    lines = result.stdout.splitlines()
    for command in COMMANDS:
        rows = [line for line in lines if line.strip().startswith(command + " ")]
        assert len(rows) == 1, f"{command!r} should appear once in the command list:\n{result.stdout}"
        assert len(rows[0].split(None, 1)) == 2, f"{command!r} has no one-line help"
    assert "Advisory only" in result.stdout


def test_every_registered_command_has_help() -> None:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    names = {choice.dest for choice in sub._choices_actions}  # type: ignore[attr-defined]
    assert set(COMMANDS) <= names
    assert all(choice.help for choice in sub._choices_actions)  # type: ignore[attr-defined]


def test_unknown_option_fails_with_a_clear_error() -> None:
    result = run_cli("demo", "--no-such-option")
    assert result.returncode == 2
    assert "unrecognized arguments: --no-such-option" in result.stderr


def test_unknown_command_names_the_choices() -> None:
    result = run_cli("frobnicate")
    assert result.returncode == 2
    assert "invalid choice: 'frobnicate'" in result.stderr
    assert "demo" in result.stderr


def test_missing_command_is_an_error() -> None:
    with pytest.raises(SystemExit) as exc:
        main([])
    assert exc.value.code == 2


def test_demo_rejects_a_negative_duration() -> None:
    result = run_cli("demo", "--duration", "-1")
    assert result.returncode != 0
    assert "--duration must be > 0" in result.stderr


def test_demo_rejects_a_healthy_run_of_no_length() -> None:
    result = run_cli("demo", "--commission-s", "0")
    assert result.returncode != 0
    assert "--commission-s must be > 0" in result.stderr


@pytest.mark.mosquitto
@pytest.mark.slow
@pytest.mark.parametrize("broker", ["mosquitto", "embedded"])
def test_demo_commissions_follows_both_robots_and_stops(tmp_path: Path, broker: str) -> None:
    port = free_loopback_port()
    proc = subprocess.Popen(
        [sys.executable, "-m", "shadow", "demo", "--duration", "90", "--port", str(port), "--workdir", str(tmp_path),
         "--commission-s", "6", "--broker", broker],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    seen: dict[str, object] = {}
    try:
        deadline = time.monotonic() + 85
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                robots = httpx.get(f"http://127.0.0.1:{port}/api/v1/robots", timeout=2).json()["robots"]
            except (httpx.HTTPError, ValueError):
                time.sleep(1)
                continue
            seen = {r["robot_id"]: r["health"] for r in robots}
            if len(seen) == 2 and all(h is not None for h in seen.values()):
                break
            time.sleep(1)
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    assert set(seen) == {"demo-site/cell-1/picker-1", "demo-site/cell-1/aligner-1"}
    assert all(h is not None for h in seen.values()), seen  # both robots were assessed from the live stream
    assert "advisory only" in out and f"broker: {broker} on mqtt://127.0.0.1:" in out
    assert f"dashboard: http://127.0.0.1:{port}/" in out and "demo stopped" in out
    assert (tmp_path / "picker-1-baseline.json").exists() and (tmp_path / "aligner-1-baseline.json").exists()
