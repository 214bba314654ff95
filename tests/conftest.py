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


#: Files that take minutes, longest first (seconds with three workers on two cores,
#: 2026-12-05).  They are handed out first, so that with the README's test command's
#: workers (pytest-xdist, whole files to a worker) none of them starts near the end and
#: makes the run's tail.  The order of tests within a file stays as written.
LONG_FILES = (
    "tests/daemon/test_shard_handover_stalls.py",  # about 310 s: three reshards with a late owner
    "tests/daemon/test_shards.py",  # about 250 s: kills, a server down, 3 to 4 and back
    "tests/daemon/test_shard_reshard_faults.py",  # about 120 s
    "tests/daemon/test_shard_server_outage.py",  # about 115 s: a NATS server down 34 s, one not ready
    "tests/daemon/test_daemon_process.py",  # about 110 s: the demo's runs
    "tests/test_lint.py",  # about 100 s: mypy --strict
    "tests/daemon/test_floor.py",  # about 90 s
    "tests/replay/test_streaming.py",  # about 70 s
)


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    root = Path(str(config.rootpath))
    rank = {name: k for k, name in enumerate(LONG_FILES)}

    def place(item: pytest.Item) -> int:
        try:
            name = Path(str(item.path)).relative_to(root).as_posix()
        except ValueError:
            return len(LONG_FILES)
        return rank.get(name, len(LONG_FILES))

    items.sort(key=place)  # stable: the rest keep their order


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


def _stderr_on_terminal(args: list[str], cwd: Path | None = None, timeout: float = 120.0) -> tuple[int, str]:
    """Run ``args`` with stderr on a pseudo-terminal of 120 columns (as an operator's
    shell gives it, so progress bars are drawn); its exit status and everything it wrote
    there."""
    import fcntl
    import pty
    import struct
    import termios

    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 120, 0, 0))
    try:
        proc = subprocess.Popen(args, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=slave, cwd=cwd)
        os.close(slave)
        chunks = []
        while True:
            try:
                data = os.read(master, 65536)
            except OSError:  # EIO: the child closed the terminal
                break
            if not data:
                break
            chunks.append(data)
        code = proc.wait(timeout=timeout)
    finally:
        os.close(master)
    return code, b"".join(chunks).decode("utf-8", "replace")


@pytest.fixture
def stderr_on_terminal():
    """:func:`_stderr_on_terminal`: a command run with stderr on a pseudo-terminal."""
    return _stderr_on_terminal


CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"
CHROMIUM_SETUP_HINT = ("the README's test command (sh tests/install-and-test.sh) installs them: "
                       "apt-get update && apt-get install -y chromium chromium-driver")


@pytest.fixture
def chromium(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    """Start headless Chromium under Selenium: ``chromium(flags, logging_prefs)`` returns a
    driver (its profile fresh in tmp_path; Selenium Manager fetches nothing); every driver
    started is quit at teardown.  Missing Chromium or ChromeDriver fails the test."""
    drivers = []

    def start(flags: tuple[str, ...], logging_prefs: dict[str, str]):
        missing = [p for p in (CHROMIUM, CHROMEDRIVER) if not os.access(p, os.X_OK)]
        if missing:
            pytest.fail(f"cannot run the browser test: {', '.join(missing)} not installed; "
                        f"{CHROMIUM_SETUP_HINT}")
        try:
            from selenium import webdriver
            from selenium.webdriver.chrome.options import Options
            from selenium.webdriver.chrome.service import Service
        except ImportError as exc:
            pytest.fail(f"cannot run the browser test: {exc}; pip install -e '.[test]' installs selenium")
        monkeypatch.setenv("SE_OFFLINE", "true")  # Selenium Manager must fetch nothing
        opts = Options()
        opts.binary_location = CHROMIUM
        for flag in flags:
            opts.add_argument(flag)
        opts.add_argument(f"--user-data-dir={tmp_path / f'chromium-profile-{len(drivers)}'}")
        opts.set_capability("goog:loggingPrefs", logging_prefs)
        service = Service(CHROMEDRIVER, log_output=str(tmp_path / f"chromedriver-{len(drivers)}.log"))
        driver = webdriver.Chrome(service=service, options=opts)
        driver.set_page_load_timeout(60)
        drivers.append(driver)
        return driver

    yield start
    for d in drivers:
        d.quit()
