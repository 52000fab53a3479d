"""Lint and type checks, run by the full test command like every other check (ruff; mypy under
the import name demaudit.*, through deploy/typecheck.sh)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
VENV_BIN = Path(sys.executable).parent


def run(command: list[str]) -> subprocess.CompletedProcess[str]:
    return subprocess.run(command, cwd=ROOT, capture_output=True, text=True, timeout=600)


def test_ruff_finds_nothing() -> None:
    done = run([str(VENV_BIN / "ruff"), "check", "service", "workers", "tests", "benchmarks"])
    assert done.returncode == 0, done.stdout + done.stderr


def test_mypy_finds_nothing() -> None:
    done = run(["bash", "deploy/typecheck.sh"])
    assert done.returncode == 0, done.stdout + done.stderr
