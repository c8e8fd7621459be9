"""The [pool] settings and ``--worker``: checked when read; with SQLite the service stays a single worker."""

from __future__ import annotations

from pathlib import Path

import pytest

from shadow.cli import main
from shadow.config import parse_config
from shadow.errors import ConfigurationError
from shadow.pool.balance import plan_round, target_share

ROOT = Path(__file__).resolve().parents[2]
DESCRIPTION = ROOT / "shadow/examples/delta_packaging.toml"
ROBOT = f'[[robots]]\nsite = "kestrel"\ncell = "c"\nrobot = "r1"\ndescription = "{DESCRIPTION}"\n'


def test_pool_settings_are_read_and_default() -> None:
    cfg = parse_config(
        '[database]\nurl = "postgresql://shadow@127.0.0.1/shadow"\n[pool]\nworker = "cell3-a"\nlease_s = 6\n'
        "heartbeat_s = 1.5\n",
        base_dir=ROOT,
    )
    assert (cfg.worker, cfg.lease_s, cfg.heartbeat_s, cfg.pooled) == ("cell3-a", 6.0, 1.5, True)
    default = parse_config("", base_dir=ROOT)
    assert (default.worker, default.lease_s, default.heartbeat_s, default.pooled) == (None, 10.0, 2.0, False)


@pytest.mark.parametrize(
    ("pool", "message"),
    [
        ('worker = "two words"', "pool.worker: 'two words' is not a worker name"),
        ('worker = ""', "pool.worker: '' is not a worker name"),
        ("lease_s = 0", "pool.lease_s: must be a number > 0, got 0"),
        ('lease_s = "10"', "pool.lease_s: must be a number > 0"),
        ("lease_s = 4\nheartbeat_s = 3", "pool.heartbeat_s: must be at most lease_s / 2 = 2.0, got 3"),
        ("lease = 4", r"pool: unknown key\(s\) \['lease'\]"),
    ],
)
def test_bad_pool_settings_name_the_key(pool: str, message: str) -> None:
    with pytest.raises(ConfigurationError, match=message):
        parse_config(f"[pool]\n{pool}\n", base_dir=ROOT, source="pool.toml")


def test_sqlite_refuses_a_worker_name(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    config = tmp_path / "one.toml"
    config.write_text(f'[database]\nurl = "sqlite:///{tmp_path / "s.db"}"\n\n{ROBOT}')
    assert main(["serve", "--config", str(config), "--worker", "w1", "--no-api", "--duration", "0"]) == 2
    assert "--worker: a worker pool needs a PostgreSQL store" in capsys.readouterr().err
    assert not (tmp_path / "s.db").exists()  # refused before anything was built


@pytest.mark.parametrize(("n_robots", "n_workers"), [(12, 1), (12, 3), (12, 5), (7, 3), (1, 4), (300, 7)])
def test_shares_cover_every_robot_and_differ_by_at_most_one_round(n_robots: int, n_workers: int) -> None:
    share = target_share(n_robots, n_workers)
    assert share * n_workers >= n_robots > (share - 1) * n_workers  # the ceiling, and no larger
    # workers filling up in turn from nothing end with every robot held and nobody above the share
    held: list[list[str]] = [[] for _ in range(n_workers)]
    free = [f"r{i:03d}" for i in range(n_robots)]
    for w in range(n_workers):
        plan = plan_round(held[w], n_robots=n_robots, n_live_workers=n_workers)
        assert plan.release == ()
        held[w], free = free[: plan.claim], free[plan.claim :]
    assert not free and max(len(h) for h in held) <= share


def test_share_needs_a_live_worker() -> None:
    with pytest.raises(ConfigurationError, match="n_live_workers: must be >= 1"):
        target_share(3, 0)
