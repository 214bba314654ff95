"""Alert latency while the status page is open in 5 headless browsers, against none, in one run.

Usage, from the repository root with the package and its test extra installed, mosquitto,
chromium and chromium-driver available (tests/install-and-test.sh installs them)::

    python tests/bench/bench_status.py              # 2 pairs of runs, about 4 minutes
    python tests/bench/bench_status.py --pairs 3    # more pairs, a steadier median

Each run is bench_daemon.py's latency part (the real daemon, a private Mosquitto,
1,000 messages/s over 50 streams with scheduled steps; latency is from the
publication of the sample that completed a detection to the receipt of its
``detected`` record): once with no browser, once with 5 headless Chromium
windows on the daemon's status page (3 on the overview, 2 on the pages of
stepping streams, each refreshing itself every 5 s as it does for an
operator), the two back to back, as pairs.  Target: the median over the
pairs of p99(with browsers) / p99(without) is at most 1.5, or the p99 with
browsers is within 10 ms of the one without (on a quiet machine both are a
few milliseconds, where a ratio says nothing).  The browsers run on the same
2-core machine as the daemon, so their own CPU is part of what is measured;
on the floor they run on other machines.

The script prints one table and exits 0 only when the target is met.
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import sys
from pathlib import Path
from typing import Any
from urllib.parse import quote

sys.path.insert(0, str(Path(__file__).resolve().parent))

import bench_daemon  # this directory's module, found through the path above

TARGET_RATIO = 1.5
FLOOR_MS = 10.0
BROWSERS = 5
CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"
# The browser test's flags (tests/daemon/test_status_page.py): headless, nothing to fetch.
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-dev-shm-usage", "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1",
         "--proxy-server=http://127.0.0.1:9", "--window-size=1280,900")


def open_browsers(port: int, n: int, profiles: Path) -> list[Any]:
    from selenium import webdriver
    from selenium.webdriver.chrome.options import Options
    from selenium.webdriver.chrome.service import Service

    os.environ["SE_OFFLINE"] = "true"
    base = f"http://127.0.0.1:{port}"
    pages = [f"{base}/status"] * 3 + [f"{base}/status/stream?name={quote(f'bench/{i:05d}/v', safe='')}"
                                      for i in range(2)]
    drivers = []
    for k in range(n):
        opts = Options()
        opts.binary_location = CHROMIUM
        for flag in FLAGS:
            opts.add_argument(flag)
        opts.add_argument(f"--user-data-dir={profiles / f'profile-{k}'}")
        d = webdriver.Chrome(service=Service(CHROMEDRIVER), options=opts)
        d.get(pages[k % len(pages)])
        drivers.append(d)
    return drivers


class BrowserBench(bench_daemon.Bench):
    """bench_daemon's Bench, with browsers opened on the status page of each daemon it starts."""

    def __init__(self, browsers: int) -> None:
        super().__init__()
        self.n_browsers = browsers
        self.drivers: list[Any] = []
        self.requests = 0

    def start_daemon(self, broker: Any, prefix: str) -> tuple[Any, int, Path]:
        p, port, cfg = super().start_daemon(broker, prefix)
        if self.n_browsers:
            self.drivers = open_browsers(port, self.n_browsers, self.tmp)
        return p, port, cfg

    def close_browsers(self) -> None:
        for d in self.drivers:
            try:
                self.requests += int(d.execute_script(
                    "return performance.getEntriesByType('resource').length"))
                d.quit()
            except Exception:  # noqa: BLE001, S110  clean-up goes on past a failed quit
                pass
        self.drivers = []


def one_run(browsers: int, rounds: int) -> dict[str, Any]:
    bench = BrowserBench(browsers)
    try:
        r = bench_daemon.latency(bench, rounds)
        bench.close_browsers()
        r["requests"] = bench.requests
        return r
    finally:
        bench.close_browsers()
        bench.close()


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pairs", type=int, default=2, help="pairs of runs (without, with browsers)")
    ap.add_argument("--rounds", type=int, default=3, help="step rounds per run (10 s each)")
    a = ap.parse_args()
    for exe in (CHROMIUM, CHROMEDRIVER):
        if not os.access(exe, os.X_OK):
            print(f"{exe} is missing: apt-get install chromium chromium-driver", file=sys.stderr)
            return 2
    if shutil.which("mosquitto") is None and not Path("/usr/sbin/mosquitto").exists():
        print("mosquitto is missing: apt-get install mosquitto", file=sys.stderr)
        return 2
    rows = []
    for k in range(a.pairs):
        quiet = one_run(0, a.rounds)
        loaded = one_run(BROWSERS, a.rounds)
        q99, l99 = bench_daemon.pct(quiet["lat"], 0.99), bench_daemon.pct(loaded["lat"], 0.99)
        q50, l50 = bench_daemon.pct(quiet["lat"], 0.5), bench_daemon.pct(loaded["lat"], 0.5)
        rows.append((q50, q99, len(quiet["lat"]), l50, l99, len(loaded["lat"]), loaded["requests"],
                     l99 / q99 if q99 > 0 else float("inf")))
        print(f"pair {k + 1}: without p50 {q50:.1f} p99 {q99:.1f} ms ({len(quiet['lat'])} alerts); "
              f"with {BROWSERS} browsers p50 {l50:.1f} p99 {l99:.1f} ms ({len(loaded['lat'])} alerts, "
              f"{loaded['requests']} page requests); ratio {rows[-1][-1]:.2f}", file=sys.stderr, flush=True)
    ratio = statistics.median(r[-1] for r in rows)
    q99m = statistics.median(r[1] for r in rows)
    l99m = statistics.median(r[4] for r in rows)
    ok = all(r[2] >= 50 and r[5] >= 50 for r in rows) and (ratio <= TARGET_RATIO or l99m - q99m <= FLOOR_MS)
    print("| pair | no browser p50 / p99 (alerts) | 5 browsers p50 / p99 (alerts, page requests) | p99 ratio |")
    print("|---|---|---|---|")
    for k, r in enumerate(rows, 1):
        print(f"| {k} | {r[0]:.1f} / {r[1]:.1f} ms ({r[2]}) | {r[3]:.1f} / {r[4]:.1f} ms ({r[5]}, {r[6]}) "
              f"| {r[7]:.2f} |")
    print(f"\nmedian p99 ratio {ratio:.2f} (target <= {TARGET_RATIO}, or p99 within {FLOOR_MS:.0f} ms: "
          f"{l99m:.1f} against {q99m:.1f} ms): {'ok' if ok else 'MISSED'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
