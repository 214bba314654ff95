"""Alert latency while the status page is open in 5 headless browsers, against none, in one run.

Usage, from the repository root with the package and its test extra installed, mosquitto,
chromium and chromium-driver available (tests/install-and-test.sh installs them)::

    python tests/bench/bench_status.py              # 2 triples of runs, about 6 minutes
    python tests/bench/bench_status.py --pairs 3    # more, a steadier median

Each run is bench_daemon.py's latency part (the real daemon, a private Mosquitto,
1,000 messages/s over 50 streams with scheduled steps; latency is from the
publication of the sample that completed a detection to the receipt of its
``detected`` record): once with no browser, once with 5 headless Chromium
windows on the daemon's status page (3 on the overview, 2 on the pages of
stepping streams, each refreshing itself every 5 s as it does for an
operator), and once with 5 plain HTTP pollers asking for the same JSON at the
same pace without drawing anything (the daemon's share of the cost, without
the browsers' own CPU), the three back to back, as triples.  Target: the median over the
triples of p99(with browsers) / p99(without) is at most 1.5, or the p99 with
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
import threading
import urllib.request
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

    def __init__(self, browsers: int, pollers: int = 0) -> None:
        super().__init__()
        self.n_browsers = browsers
        self.n_pollers = pollers
        self.drivers: list[Any] = []
        self.requests = 0
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []

    def start_daemon(self, broker: Any, prefix: str) -> tuple[Any, int, Path]:
        p, port, cfg = super().start_daemon(broker, prefix)
        if self.n_browsers:
            self.drivers = open_browsers(port, self.n_browsers, self.tmp)
        for k in range(self.n_pollers):
            t = threading.Thread(target=self._poll, args=(port, k), daemon=True)
            t.start()
            self._threads.append(t)
        return p, port, cfg

    def _poll(self, port: int, k: int) -> None:
        """What one open page asks for, without drawing: its files once, then its JSON every 5 s."""
        base = f"http://127.0.0.1:{port}"
        if k < 3:
            page, data = "/status", "/status.json?limit=500&q="
        else:
            name = quote(f"bench/{k - 3:05d}/v", safe="")
            page, data = f"/status/stream?name={name}", f"/status/stream.json?name={name}"
        urls = [page, "/status/assets/status.css", "/status/assets/status.js", "/status/assets/icon.svg"]
        while not self._stop.is_set():
            for u in urls:
                try:
                    with urllib.request.urlopen(base + u, timeout=10) as r:
                        r.read()
                    self.requests += 1
                except OSError:  # a stream's page answers 404 until the stream exists
                    self.requests += 1
            urls = [data]
            self._stop.wait(5.0)

    def close_browsers(self) -> None:
        self._stop.set()
        for t in self._threads:
            t.join(15)
        self._threads = []
        for d in self.drivers:
            try:
                self.requests += int(d.execute_script(
                    "return performance.getEntriesByType('resource').length"))
                d.quit()
            except Exception:  # noqa: BLE001, S110  clean-up goes on past a failed quit
                pass
        self.drivers = []


def one_run(browsers: int, rounds: int, pollers: int = 0) -> dict[str, Any]:
    bench = BrowserBench(browsers, pollers)
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
    ap.add_argument("--pairs", type=int, default=2,
                    help="triples of runs (no page, browsers, pollers)")
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
        polled = one_run(0, a.rounds, pollers=BROWSERS)
        q99, l99, p99 = (bench_daemon.pct(r["lat"], 0.99) for r in (quiet, loaded, polled))
        q50, l50, p50 = (bench_daemon.pct(r["lat"], 0.5) for r in (quiet, loaded, polled))
        rows.append((q50, q99, len(quiet["lat"]), l50, l99, len(loaded["lat"]), loaded["requests"],
                     p50, p99, len(polled["lat"]), polled["requests"],
                     l99 / q99 if q99 > 0 else float("inf"), p99 / q99 if q99 > 0 else float("inf")))
        print(f"triple {k + 1}: none p50 {q50:.1f} p99 {q99:.1f} ms; {BROWSERS} browsers p50 {l50:.1f} "
              f"p99 {l99:.1f} ms ({loaded['requests']} requests); {BROWSERS} pollers p50 {p50:.1f} p99 "
              f"{p99:.1f} ms ({polled['requests']} requests)", file=sys.stderr, flush=True)
    ratio = statistics.median(r[11] for r in rows)
    pratio = statistics.median(r[12] for r in rows)
    q99m = statistics.median(r[1] for r in rows)
    l99m = statistics.median(r[4] for r in rows)
    ok = all(r[2] >= 50 and r[5] >= 50 for r in rows) and (ratio <= TARGET_RATIO or l99m - q99m <= FLOOR_MS)
    print("| run | no page: p50 / p99 (alerts) | 5 browsers: p50 / p99 (alerts, requests) "
          "| 5 pollers: p50 / p99 (alerts, requests) | p99 ratio browsers / none | pollers / none |")
    print("|---|---|---|---|---|---|")
    for k, r in enumerate(rows, 1):
        print(f"| {k} | {r[0]:.1f} / {r[1]:.1f} ms ({r[2]}) | {r[3]:.1f} / {r[4]:.1f} ms ({r[5]}, {r[6]}) "
              f"| {r[7]:.1f} / {r[8]:.1f} ms ({r[9]}, {r[10]}) | {r[11]:.2f} | {r[12]:.2f} |")
    print(f"\nmedian p99 ratio, browsers / none {ratio:.2f} (target <= {TARGET_RATIO}, or p99 within "
          f"{FLOOR_MS:.0f} ms: {l99m:.1f} against {q99m:.1f} ms): {'ok' if ok else 'MISSED'}; "
          f"pollers / none {pratio:.2f}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
