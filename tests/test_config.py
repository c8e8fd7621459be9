"""The service configuration file: defaults, paths relative to the file, clear errors, secrets kept out."""

from __future__ import annotations

from pathlib import Path

import pytest

from shadow.api.security import token_digest
from shadow.config import is_loopback, load_config, parse_config
from shadow.errors import ConfigurationError


def parse(text: str, base: Path = Path("/etc/shadow")) -> object:
    return parse_config(text, base_dir=base, source="test.toml")


def test_defaults_are_loopback_and_sqlite() -> None:
    cfg = parse_config("", base_dir=Path("/srv"))
    assert cfg.mqtt.host == "127.0.0.1" and cfg.api_host == "127.0.0.1"
    assert cfg.database_url == "sqlite:////srv/shadow.db"
    assert cfg.robots == ()


def test_robots_and_paths_relative_to_the_file(tmp_path: Path) -> None:
    (tmp_path / "secret").write_text("hunter2\n")
    path = tmp_path / "shadow.toml"
    path.write_text(
        """
[mqtt]
host = "127.0.0.1"
port = 1884
username = "shadow"
password_file = "secret"
protocol = "3.1.1"
[database]
url = "postgresql://shadow@127.0.0.1/shadow"
[[robots]]
site = "northfield"
cell = "line3"
robot = "picker-1"
description = "robots/picker.toml"
baseline = "/var/lib/shadow/picker-1.json"
"""
    )
    cfg = load_config(path)
    assert cfg.mqtt.password == "hunter2" and "hunter2" not in repr(cfg)
    assert cfg.mqtt.protocol == "3.1.1" and cfg.mqtt.port == 1884
    assert cfg.database_url.startswith("postgresql://")
    (robot,) = cfg.robots
    assert robot.robot_id == "northfield/line3/picker-1"
    assert robot.description_path == tmp_path / "robots/picker.toml"
    assert robot.baseline_path == Path("/var/lib/shadow/picker-1.json")


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("[mqtt]\nhots = 'x'", r"mqtt: unknown key\(s\) \['hots'\]"),
        ("[mqtt]\nport = 0", "mqtt.port: must be 1..65535"),
        ("[[robots]]\nsite = 'a'\ncell = 'b'\nrobot = 'c'", r"robots\[0\].description: missing"),
        ("[[robots]]\nsite = 'a/b'\ncell = 'b'\nrobot = 'c'\ndescription = 'x'", "site: 'a/b' must be"),
        ("[database]\nraw_retention_s = -1", "raw_retention_s: must be >= 0"),
        ("[api]\nhost = '0.0.0.0'", "bearer tokens are required"),
        ("[api]\ntoken_digests = ['abc']", "sha256:<64 hex digits>"),
        ("[mqtt]\npassword_file = 'nope'", "mqtt.password_file: cannot read"),
        ("x = ", "not valid TOML"),
    ],
)
def test_errors_name_the_key(text: str, message: str) -> None:
    with pytest.raises(ConfigurationError, match=message):
        parse(text)


def test_remote_binding_with_tokens_is_accepted() -> None:
    cfg = parse(f"[api]\nhost = '0.0.0.0'\ntoken_digests = ['{token_digest('t0ken')}']")
    assert cfg.api_token_digests == (token_digest("t0ken"),)  # type: ignore[attr-defined]


def test_twice_listed_robot_is_refused() -> None:
    entry = "[[robots]]\nsite = 'a'\ncell = 'b'\nrobot = 'c'\ndescription = 'x'\n"
    with pytest.raises(ConfigurationError, match="listed twice"):
        parse(entry + entry)


def test_loopback_detection() -> None:
    assert is_loopback("127.0.0.1") and is_loopback("::1") and is_loopback("127.3.2.1") and is_loopback("localhost")
    assert not is_loopback("0.0.0.0") and not is_loopback("10.0.0.1") and not is_loopback("example.org")
