"""The deployment files agree with the code and with each other, and the outside tools accept them.

Checked against outside references: the TOML files by ``shadow.config.parse_config`` (the service's own
reader), ``compose.yaml`` by PyYAML, the systemd unit by ``systemd-analyze verify`` and
``systemd-analyze security --offline`` (systemd's own checks, when systemd is installed), the ACL file by
``TopicLayout.mosquitto_acl`` and by running mosquitto on it (tests/deploy/test_broker_acl.py).
"""

from __future__ import annotations

import importlib.machinery
import importlib.util
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path
from types import ModuleType

import pytest
import sqlalchemy as sa
import yaml

from shadow.config import ServiceConfig, is_loopback, parse_config
from shadow.ingest.topics import TopicLayout
from shadow.ingest.wire import MAX_MESSAGE_BYTES
from shadow.robots.description import EXAMPLES_DIR
from shadow.store.repository import SqlStore
from tests.servers import PostgresServer

ROOT = Path(__file__).resolve().parents[2]
DEPLOY = ROOT / "deploy"
EXAMPLE = DEPLOY / "shadow.example.toml"
UNIT = DEPLOY / "systemd" / "shadow.service"
COMPOSE = DEPLOY / "compose.yaml"
MAKE_ACL = DEPLOY / "mosquitto" / "make-acl"
ACL = DEPLOY / "mosquitto" / "acl.example"
MOSQUITTO_CONF = DEPLOY / "mosquitto" / "mosquitto.conf"
CREDENTIALS_DIR = "/run/credentials/shadow.service"  # systemd's $CREDENTIALS_DIRECTORY of shadow.service


def parse_with_secret(text: str, secret_dir: str, tmp_path: Path) -> ServiceConfig:
    """parse_config on ``text`` after moving the password file from ``secret_dir`` into ``tmp_path``."""
    assert secret_dir in text
    (tmp_path / "mqtt-password").write_text("not-a-real-password\n")
    return parse_config(text.replace(secret_dir, str(tmp_path)), base_dir=Path("/etc/shadow"), source="example")


def unit_entries(text: str) -> dict[str, dict[str, list[str]]]:
    """A systemd unit file as section -> key -> values (keys may repeat), per systemd.syntax(7)."""
    sections: dict[str, dict[str, list[str]]] = {}
    current = None
    for raw in text.splitlines():
        line = raw.strip()
        if not line or line[0] in "#;":
            continue
        if line.startswith("[") and line.endswith("]"):
            current = sections.setdefault(line[1:-1], {})
            continue
        assert current is not None, f"{line!r} comes before any [section]"
        key, sep, value = line.partition("=")
        assert sep == "=", f"not a key=value line: {line!r}"
        current.setdefault(key.strip(), []).append(value.strip())
    return sections


def run_make_acl(*args: str) -> subprocess.CompletedProcess[str]:
    """make-acl as a program, the way an operator runs it."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run(
        [sys.executable, str(MAKE_ACL), *args], capture_output=True, text=True, env=env, timeout=60, check=False
    )


@pytest.fixture(scope="module")
def make_acl() -> ModuleType:
    """make-acl loaded in-process (it has no .py suffix), for the many small cases."""
    loader = importlib.machinery.SourceFileLoader("deploy_make_acl", str(MAKE_ACL))
    spec = importlib.util.spec_from_loader(loader.name, loader)
    assert spec is not None
    module = importlib.util.module_from_spec(spec)
    loader.exec_module(module)
    return module


def call_make_acl(module: ModuleType, capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    code = module.main(list(args))
    out, err = capsys.readouterr()
    return code, out, err


# --- shadow.example.toml -------------------------------------------------------------------------


def test_example_configuration_parses(tmp_path: Path) -> None:
    cfg = parse_with_secret(EXAMPLE.read_text(), CREDENTIALS_DIR, tmp_path)
    assert cfg.mqtt.password == "not-a-real-password"
    assert (cfg.mqtt.port, cfg.mqtt.username, cfg.mqtt.protocol) == (8883, "shadow", "5")
    assert cfg.mqtt.tls_ca_file == "/etc/shadow/shadow-ca.crt"  # TLS on, as the broker's 8883 listener needs
    assert cfg.database_url.startswith("postgresql://shadow@")
    assert not is_loopback(cfg.api_host) and len(cfg.api_token_digests) == 1
    assert [r.robot_id for r in cfg.robots] == ["northfield/line3/picker-1", "northfield/line4/hexa-2"]
    assert cfg.robots[0].description_path == Path("/etc/shadow/robots/delta_packaging.toml")
    assert cfg.robots[1].baseline_path is None


def test_example_descriptions_are_shipped_examples(tmp_path: Path) -> None:
    cfg = parse_with_secret(EXAMPLE.read_text(), CREDENTIALS_DIR, tmp_path)
    for robot in cfg.robots:  # the README copies them from shadow/examples
        assert (EXAMPLES_DIR / robot.description_path.name).is_file(), robot.description_path


def test_example_password_file_is_the_units_credential(tmp_path: Path) -> None:
    cfg_text = EXAMPLE.read_text()
    password_file = re.search(r'^password_file = "([^"]+)"', cfg_text, re.MULTILINE)
    assert password_file is not None
    credentials = dict(v.split(":", 1) for v in unit_entries(UNIT.read_text())["Service"]["LoadCredential"])
    directory, name = password_file.group(1).rsplit("/", 1)
    assert directory == CREDENTIALS_DIR and name in credentials


# --- ACL -----------------------------------------------------------------------------------------


def test_shipped_acl_is_make_acl_output() -> None:
    result = run_make_acl(str(EXAMPLE))
    assert result.returncode == 0, result.stderr
    assert result.stdout == ACL.read_text()


def test_make_acl_follows_topic_layout(tmp_path: Path) -> None:
    cfg = parse_with_secret(EXAMPLE.read_text(), CREDENTIALS_DIR, tmp_path)
    publishers = {f"ctl-{r.address.robot}": r.address for r in cfg.robots}
    expected = TopicLayout(cfg.topic_prefix).mosquitto_acl(publishers, service_user="shadow")
    shipped = ACL.read_text()
    body = "".join(line + "\n" for line in shipped.splitlines() if not line.startswith("#")).lstrip("\n")
    assert body.rstrip("\n") == expected.rstrip("\n")


def test_make_acl_custom_prefix_and_users(
    tmp_path: Path, make_acl: ModuleType, capsys: pytest.CaptureFixture[str]
) -> None:
    config = tmp_path / "plant.toml"
    config.write_text(
        '[mqtt]\ntopic_prefix = "acme/plant7/shadow"\nusername = "svc"\n'
        '[[robots]]\nsite = "s1"\ncell = "c1"\nrobot = "r1"\ndescription = "x.toml"\n'
        '[[robots]]\nsite = "s1"\ncell = "c2"\nrobot = "r1"\ndescription = "y.toml"\n'
    )
    code, out, err = call_make_acl(make_acl, capsys, str(config), "--user-format", "gw-{cell}-{robot}")
    assert code == 0, err
    assert "user svc\ntopic read acme/plant7/shadow/v1/#\n" in out
    assert "user gw-c2-r1\ntopic write acme/plant7/shadow/v1/s1/c2/r1/samples\n" in out


@pytest.mark.parametrize(
    ("text", "args", "message"),
    [
        ('[mqtt]\nusername = "svc"\n[[robots]]\nsite = "s"\ncell = "a"\nrobot = "r1"\n'
         '[[robots]]\nsite = "s"\ncell = "b"\nrobot = "r1"\n', [], "user 'ctl-r1' is already taken"),
        ('[[robots]]\nsite = "s"\ncell = "a"\nrobot = "r1"\n', [], "mqtt.username is not set"),
        ('[mqtt]\nusername = "svc"\n', [], "no \\[\\[robots\\]\\] entries"),
        ('[mqtt]\nusername = "svc"\n[[robots]]\nsite = "s"\ncell = "a/b"\nrobot = "r1"\n', [], "bad_topic: cell"),
        ('[mqtt]\nusername = "svc"\n[[robots]]\nsite = "s"\nrobot = "r1"\n', [], "robots\\[0\\]: missing cell"),
        ("[mqtt\n", [], "not valid TOML"),
    ],
)  # fmt: skip
def test_make_acl_refuses_bad_input(
    tmp_path: Path, make_acl: ModuleType, capsys: pytest.CaptureFixture[str], text: str, args: list[str], message: str
) -> None:
    config = tmp_path / "bad.toml"
    config.write_text(text)
    code, out, err = call_make_acl(make_acl, capsys, str(config), *args)
    assert code == 2
    assert out == ""
    assert re.search(message, err), err


# --- mosquitto.conf ------------------------------------------------------------------------------


def mosquitto_options(text: str) -> list[tuple[str, str]]:
    return [
        (line.split(" ", 1)[0], line.split(" ", 1)[1] if " " in line else "")
        for line in (raw.strip() for raw in text.splitlines())
        if line and not line.startswith("#")
    ]


def test_broker_configuration_choices() -> None:
    options = mosquitto_options(MOSQUITTO_CONF.read_text())
    first = {key: value for key, value in reversed(options)}
    assert first["allow_anonymous"] == "false"
    assert first["per_listener_settings"] == "false"  # one set of rules for every listener
    assert first["persistence"] == "true"
    assert int(first["max_inflight_messages"]) == 20  # RobotSubscription's inbox must hold the window
    assert int(first["max_queued_messages"]) > 0 and int(first["max_queued_bytes"]) > 0  # bounded memory
    # the wire format's 1 MiB message limit must fit in the broker's packet limit
    assert int(first["max_packet_size"]) > MAX_MESSAGE_BYTES
    listeners = [value for key, value in options if key == "listener"]
    assert listeners == ["1883 127.0.0.1", "8883"]
    tls_block = options[options.index(("listener", "8883")) :]
    assert {"certfile", "keyfile", "cafile"} <= {key for key, _ in tls_block}


# --- systemd unit --------------------------------------------------------------------------------


def test_unit_is_hardened() -> None:
    unit = unit_entries(UNIT.read_text())
    assert set(unit) == {"Unit", "Service", "Install"}
    service = {key: values[-1] for key, values in unit["Service"].items()}
    expected = {
        "DynamicUser": "yes",
        "ProtectSystem": "strict",
        "ProtectHome": "yes",
        "PrivateTmp": "yes",
        "NoNewPrivileges": "yes",
        "CapabilityBoundingSet": "",
        "StateDirectory": "shadow",
    }
    assert {key: service.get(key) for key in expected} == expected
    assert service["ExecStart"].split()[1:] == ["serve", "--config", "/etc/shadow/shadow.toml"]
    assert unit["Install"]["WantedBy"] == ["multi-user.target"]


def systemd_analyze() -> str:
    exe = shutil.which("systemd-analyze")
    if exe is None:
        pytest.skip("systemd-analyze is not installed (package systemd)")
    return exe


def runnable_unit(tmp_path: Path) -> Path:
    """The unit with ExecStart pointed at /bin/true, since shadow is not installed in /opt here."""
    text = UNIT.read_text()
    start = re.search(r"^ExecStart=(\S+)", text, re.MULTILINE)
    assert start is not None
    path = tmp_path / "shadow.service"
    path.write_text(text.replace(start.group(0), "ExecStart=/bin/true"))
    return path


def test_unit_passes_systemd_analyze_verify(tmp_path: Path) -> None:
    result = subprocess.run(
        [systemd_analyze(), "verify", str(runnable_unit(tmp_path))], capture_output=True, text=True, timeout=60
    )
    # verify reports unknown keys and bad values on stderr while still exiting 0, so both are checked
    assert result.returncode == 0 and result.stderr == "", result.stderr


def test_unit_exposure_is_low(tmp_path: Path) -> None:
    result = subprocess.run(
        [systemd_analyze(), "security", "--offline=yes", "--no-pager", str(runnable_unit(tmp_path))],
        capture_output=True,
        text=True,
        timeout=60,
    )
    found = re.search(r"Overall exposure level for shadow\.service: (\d+\.\d+)", result.stdout)
    assert found is not None, result.stdout + result.stderr
    # systemd's scale runs 0 (locked down) to 10 (unprotected); below 2.0 it rates "OK"
    assert float(found.group(1)) < 2.0, result.stdout


# --- compose.yaml --------------------------------------------------------------------------------


def test_compose_file_is_well_formed() -> None:
    doc = yaml.safe_load(COMPOSE.read_text())
    services = doc["services"]
    assert set(services) == {"broker", "database", "shadow"}
    published = {name: [str(p) for p in s.get("ports", [])] for name, s in services.items()}
    assert published == {"broker": ["8883:8883"], "database": [], "shadow": ["8470:8470"]}
    assert services["shadow"]["depends_on"]["database"]["condition"] == "service_healthy"
    named = set(doc.get("volumes", {}))
    for name, service in services.items():
        for volume in service.get("volumes", []):
            source, target = volume.split(":")[:2]
            if source.startswith("./"):
                assert target.startswith("/"), volume
            else:
                assert source in named, f"{name}: volume {source} is not declared"
        for secret in service.get("secrets", []):
            assert secret in doc["secrets"], f"{name}: secret {secret} is not declared"


def test_compose_mounts_match_the_broker_configuration() -> None:
    broker = yaml.safe_load(COMPOSE.read_text())["services"]["broker"]
    targets = {v.split(":")[1]: v.split(":")[0] for v in broker["volumes"]}
    options = dict(mosquitto_options(MOSQUITTO_CONF.read_text()))
    assert options["password_file"] in targets and options["acl_file"] in targets
    assert options["persistence_location"].rstrip("/") in targets
    assert Path(options["certfile"]).parent.as_posix() in targets
    config_source = next(src for dst, src in targets.items() if dst.endswith("mosquitto.conf"))
    assert (DEPLOY / config_source).resolve() == MOSQUITTO_CONF
    assert any(f"-c {dst}" in " ".join(broker["command"]) for dst in targets if dst.endswith("mosquitto.conf"))


def test_compose_inline_configuration_parses(tmp_path: Path) -> None:
    doc = yaml.safe_load(COMPOSE.read_text())
    shadow = doc["services"]["shadow"]
    target = shadow["configs"][0]["target"]
    cfg = parse_with_secret(doc["configs"][shadow["configs"][0]["source"]]["content"], "/run/secrets", tmp_path)
    assert target == shadow["command"][-1]
    assert (cfg.mqtt.host, cfg.mqtt.port) == ("broker", 8883)  # the broker's only listener reachable from outside
    assert cfg.database_url.startswith("postgresql://shadow@database:")
    assert "mqtt-password" in shadow["secrets"] and shadow["environment"]["PGPASSFILE"] == "/run/secrets/pgpass"


# --- postgresql.md -------------------------------------------------------------------------------


def sql_blocks(text: str) -> list[list[str]]:
    """The statements of each ```sql block, in order."""
    blocks = re.findall(r"```sql\n(.*?)```", text, re.DOTALL)
    return [[s.strip() for s in block.split(";\n") if s.strip()] for block in blocks]


@pytest.mark.postgres
def test_postgresql_notes_set_up_a_working_store(postgres_server: PostgresServer) -> None:
    suffix = f"_{os.getpid()}"
    # the test cluster's superuser is itself called "shadow", so every name of the notes gets a suffix
    rename = re.compile(r"\bshadow(_reader)?\b")
    blocks = [
        [rename.sub(lambda m: f"shadow{m.group(1) or ''}{suffix}", s).rstrip(";") for s in block]
        for block in sql_blocks((DEPLOY / "postgresql.md").read_text())
    ]
    assert len(blocks) == 3, "server set-up, database set-up, raw table tuning"
    role, reader, database = f"shadow{suffix}", f"shadow_reader{suffix}", f"shadow{suffix}"
    admin = sa.create_engine(postgres_server.url(), isolation_level="AUTOCOMMIT")
    admin_db = sa.create_engine(postgres_server.url(database), isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            for statement in blocks[0]:
                conn.execute(sa.text(statement))
        with admin_db.connect() as conn:
            for statement in blocks[1]:
                conn.execute(sa.text(statement))
        base = f"postgresql+psycopg://{{}}@{postgres_server.host}:{postgres_server.port}/{database}"
        store = SqlStore(base.format(role))
        try:
            store.register_robot("northfield/line3/picker-1", family="delta", n_actuators=3)
            with store.engine.begin() as conn:  # the tuning runs as the owner of the tables
                for statement in blocks[2]:
                    conn.execute(sa.text(statement))
        finally:
            store.close()
        with admin_db.connect() as conn:
            schemas = set(
                conn.execute(sa.text("SELECT DISTINCT schemaname FROM pg_tables WHERE tableowner = :r"), {"r": role})
                .scalars()
                .all()
            )
            options = conn.execute(
                sa.text(f"SELECT reloptions FROM pg_class WHERE oid = 'shadow{suffix}.raw_batches'::regclass")
            ).scalar_one()
        assert schemas == {f"shadow{suffix}"}
        assert "autovacuum_vacuum_scale_factor=0.02" in options
        reading = sa.create_engine(base.format(reader))
        try:
            with reading.connect() as conn:
                assert conn.execute(sa.text("SELECT robot_id FROM robots")).scalars().all() == [
                    "northfield/line3/picker-1"
                ]
                with pytest.raises(sa.exc.ProgrammingError, match="permission denied"):
                    conn.execute(sa.text("DELETE FROM robots"))
        finally:
            reading.dispose()
    finally:
        admin_db.dispose()
        with admin.connect() as conn:
            conn.execute(sa.text(f"DROP DATABASE IF EXISTS {database} WITH (FORCE)"))
            conn.execute(sa.text(f"DROP ROLE IF EXISTS {role}"))
            conn.execute(sa.text(f"DROP ROLE IF EXISTS {reader}"))
        admin.dispose()
