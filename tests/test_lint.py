"""The tree stays clean: ruff (tests and code) and mypy --strict (the package), as configured
in pyproject.toml.  Both come with the test extra; without them the tests skip, except under
CI (CI=true), where a missing tool fails them.

Alone: ``python -m ruff check daemon tests`` and ``python -m mypy daemon/shiftwatch``.
"""

from __future__ import annotations

import importlib.util
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def run_tool(module: str, *args: str) -> subprocess.CompletedProcess[str]:
    if importlib.util.find_spec(module) is None:
        message = f"{module} is not installed (the test extra installs it: pip install -e '.[test]')"
        if os.environ.get("CI") == "true":
            pytest.fail(message)
        pytest.skip(message)
    return subprocess.run([sys.executable, "-m", module, *args], cwd=ROOT, capture_output=True,
                          check=False, text=True, timeout=900)


def test_ruff_finds_nothing() -> None:
    res = run_tool("ruff", "check", "daemon", "tests")
    assert res.returncode == 0, f"ruff check daemon tests:\n{res.stdout}{res.stderr}"


def test_mypy_strict_finds_nothing() -> None:
    res = run_tool("mypy", "daemon/shiftwatch")
    assert res.returncode == 0, f"mypy daemon/shiftwatch:\n{res.stdout}{res.stderr}"
