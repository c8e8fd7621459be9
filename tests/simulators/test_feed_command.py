"""``python -m simulators record``: the fault shares the demo turns down, and their bad values."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from simulators.__main__ import main


def record(tmp_path: Path, name: str, *options: str) -> list[dict]:
    out = tmp_path / f"{name}.jsonl"
    args = ["record", "--family", "delta", "--duration", "4", "--seed", "5", "--start", "1800000000", "--out", str(out)]
    assert main([*args, *options]) == 0
    return json.loads(Path(str(out) + ".truth.json").read_text())["windows"]


@pytest.mark.slow
def test_the_fault_shares_set_how_often_impacts_and_bad_picks_come(tmp_path: Path) -> None:
    every = record(tmp_path, "every", "--impact-fraction", "1", "--pick-fault-fraction", "0.25")
    none = record(tmp_path, "none", "--impact-fraction", "0", "--pick-fault-fraction", "0")
    assert len(every) >= 2 and len(none) >= 2
    assert all(w["impact_start_s"] is not None for w in every)
    assert all(w["impact_start_s"] is None for w in none)
    masses = [m for w in every for m in w["work_piece_masses_kg"]]
    # a quarter of the cycles lift nothing, a quarter two pieces
    assert 0.0 in masses and any(m > 0.0 for m in masses)
    assert all(m > 0.0 for w in none for m in w["work_piece_masses_kg"])


@pytest.mark.parametrize("option", ["--impact-fraction", "--pick-fault-fraction"])
def test_a_share_outside_zero_to_one_is_refused_by_name(
    tmp_path: Path, option: str, capsys: pytest.CaptureFixture[str]
) -> None:
    args = ["record", "--family", "delta", "--duration", "1", "--out", str(tmp_path / "x.jsonl"), option, "1.5"]
    assert main(args) == 2
    assert f"{option}: must be within 0..1, got 1.5" in capsys.readouterr().err
    assert not (tmp_path / "x.jsonl").exists()
