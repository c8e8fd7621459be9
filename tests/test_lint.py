"""The tree stays ruff-clean (rules in pyproject.toml), so style problems fail the suite, not a review."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def ruff() -> list[str]:
    exe = shutil.which("ruff", path=str(Path(sys.executable).parent)) or shutil.which("ruff")
    assert exe is not None, "ruff is part of the test extra: pip install -e '.[test]'"
    return [exe]


def test_ruff_check_is_clean() -> None:
    result = subprocess.run([*ruff(), "check", "--no-cache", "."], cwd=ROOT, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr


def test_ruff_format_is_clean() -> None:
    result = subprocess.run([*ruff(), "format", "--check", "--no-cache", "."], cwd=ROOT, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr
