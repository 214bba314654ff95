"""Shared test helpers."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest


def shiftwatch_command() -> list[str]:
    """The installed console script when present, else the module entry point."""
    exe = shutil.which("shiftwatch", path=str(Path(sys.executable).parent) + os.pathsep + os.environ.get("PATH", ""))
    return [exe] if exe else [sys.executable, "-m", "shiftwatch"]


@pytest.fixture(scope="session")
def shiftwatch_cmd() -> list[str]:
    return shiftwatch_command()


@pytest.fixture
def cli(tmp_path: Path):
    """Run the real command line in a subprocess; returns the CompletedProcess."""

    def run(*args: str, timeout: float = 120.0,
            env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
        return subprocess.run(shiftwatch_command() + list(args), capture_output=True, check=False,
                              text=True, timeout=timeout, cwd=tmp_path, env=env)

    return run
