"""The layout keeps data flowing one way: the numerical core imports no adapter and touches no I/O.

Core packages (shadow.robots, shadow.estimation, shadow.detection) may import numpy, scipy, the
standard library's pure modules and each other - never shadow.ingest/store/api/cli, never
simulators, never a module that reaches a clock, the environment, a file or a socket.
Only the description loader reads a file (the robot description), so it alone may use pathlib/tomllib.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CORE = ("robots", "estimation", "detection")
ADAPTER_PREFIXES = ("shadow.ingest", "shadow.store", "shadow.api", "shadow.cli", "shadow.service", "simulators")
IO_MODULES = {
    "asyncio", "datetime", "http", "logging", "os", "paho", "requests", "shutil", "socket", "sqlalchemy",
    "sqlite3", "subprocess", "sys", "threading", "time", "urllib", "uvicorn", "fastapi", "random", "pathlib",
    "tomllib", "io", "pickle", "json",
}  # fmt: skip
FILE_READERS = {"shadow/robots/description.py": {"pathlib", "tomllib"}}


def imported_modules(path: Path) -> set[str]:
    """Top-level and dotted names a module imports (absolute imports only are used in shadow)."""
    tree = ast.parse(path.read_text(), filename=str(path))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                pytest.fail(f"{path}: relative import; use absolute imports")
            names.add(node.module or "")
    return names


def core_files() -> list[Path]:
    return sorted(p for pkg in CORE for p in (ROOT / "shadow" / pkg).rglob("*.py"))


def test_core_exists() -> None:
    assert len(core_files()) >= len(CORE)


@pytest.mark.parametrize("path", core_files(), ids=lambda p: str(p.relative_to(ROOT)))
def test_core_imports_no_adapter_and_no_io(path: Path) -> None:
    rel = str(path.relative_to(ROOT))
    allowed_io = FILE_READERS.get(rel, set())
    for name in imported_modules(path):
        assert not name.startswith(ADAPTER_PREFIXES), f"{rel} imports adapter {name}"
        top = name.split(".")[0]
        assert top not in IO_MODULES - allowed_io, f"{rel} imports I/O module {name}"


def test_shadow_never_imports_simulators() -> None:
    for path in sorted((ROOT / "shadow").rglob("*.py")):
        for name in imported_modules(path):
            assert not name.startswith("simulators"), f"{path.relative_to(ROOT)} imports {name}"
