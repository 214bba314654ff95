"""The replay report in a real browser: Debian's headless Chromium opens it from disk.

The report is written by the real command line in a subprocess, then loaded
over ``file://`` with every host name unresolvable and a proxy that is not
there, so anything that reached for the network would fail and say so on the
console.  The test checks that each chart decoded, that nothing came from
anywhere but the file itself, that the console stayed free of errors, and
keeps a screenshot of the whole page at tests/artifacts/report.png.

Chromium and its driver come from the README's test command (apt packages
``chromium`` and ``chromium-driver``).  When they are missing the test
fails; it never skips.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pytest

if TYPE_CHECKING:
    from conftest import PlantCsv

ARTIFACTS = Path(__file__).resolve().parents[1] / "artifacts"
SCREENSHOT = ARTIFACTS / "report.png"

# Flags for a headless Chromium run as root with nothing to fetch (common practice
# for Chromium in containers); the profile directory is fresh per test.
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-dev-shm-usage", "--host-resolver-rules=MAP * ~NOTFOUND",
         "--proxy-server=http://127.0.0.1:9", "--window-size=1280,900")

UNIT_CONFIG = """\
streams:
  - topic: brackenfield/line2/filler/+/fill
    unit: g
  - topic: brackenfield/line2/oven/senml/+
    unit: Cel
  - topic: brackenfield/line2/capper/torque
    unit: N m
"""


@pytest.fixture
def browser(chromium: Any) -> Any:
    # The browser's console.
    return chromium(FLAGS, {"browser": "ALL"})


def test_report_renders_in_headless_chromium(browser: Any, cli: Any, plant_csv: PlantCsv,
                                            tmp_path: Path) -> None:
    from selenium.webdriver.support.ui import WebDriverWait

    cfg = tmp_path / "units.yaml"
    cfg.write_text(UNIT_CONFIG)
    out = tmp_path / "report"
    res = cli("replay", "--config", str(cfg), "--out", str(tmp_path / "alerts.jsonl"),
              "--report", str(out), str(plant_csv.path))
    assert res.returncode == 0, res.stderr
    records = [json.loads(line) for line in (tmp_path / "alerts.jsonl").read_text().splitlines()]
    final = {r["id"]: r for r in records}

    browser.get((out / "report.html").as_uri())
    WebDriverWait(browser, 60).until(lambda d: d.execute_script(
        "return document.readyState === 'complete' && Array.from(document.images).every(i => i.complete)"))

    # Every chart decoded: one <img> per stream, each with its natural size.
    images = browser.execute_script(
        "return Array.from(document.images).map(i => ({w: i.naturalWidth, h: i.naturalHeight, "
        "attr: [i.getAttribute('width'), i.getAttribute('height')].map(Number), "
        "src: i.src.slice(0, 22), stream: i.closest('section').querySelector('h3').textContent}))")
    assert [i["stream"] for i in images] == plant_csv.streams
    for img in images:
        assert img["src"] == "data:image/png;base64,"
        assert img["w"] == 1152 and img["h"] > 300, img  # 12 inches wide at 96 dpi
        assert [img["w"], img["h"]] == img["attr"]  # the size the report declared

    # Nothing was fetched but the file itself and its data: URIs.
    fetched = browser.execute_script("return performance.getEntriesByType('resource').map(e => e.name)")
    assert all(name.startswith(("data:", "file:")) for name in fetched), fetched

    # The totals the page shows are those of the replay.
    totals = browser.execute_script(
        "const o = {}; document.querySelectorAll('[data-total]').forEach("
        "e => o[e.dataset.total] = Number(e.textContent.replace(/,/g, ''))); return o")
    phases = [r["phase"] for r in final.values()]
    assert totals == {"streams": 5, "samples": plant_csv.rows, "rejected samples": _spikes(res.stderr),
                      "unreadable rows or cells": 0, "events": len(final), "confirmed": phases.count("confirmed"),
                      "returned": phases.count("returned"), "dismissed": phases.count("dismissed"),
                      "undecided": phases.count("undecided"), "open": phases.count("detected")}
    assert totals["confirmed"] == 3 and totals["dismissed"] == 1 and totals["open"] == 1
    steps = browser.execute_script(
        "return Array.from(document.querySelectorAll('tr.event')).map(r => "
        "[r.dataset.id, r.cells[4].textContent, Number(r.cells[5].dataset.sigma)])")
    assert {row[0] for row in steps} == set(final)
    for rid, text, sigma in steps:
        assert sigma == final[rid]["delta_sigma"]
        assert text.endswith(" " + final[rid]["unit"])

    # The console: first prove it is captured, then that the report wrote nothing to it.
    report_log = browser.get_log("browser")
    browser.execute_script("console.error('shiftwatch-probe')")
    probe = browser.get_log("browser")
    assert any("shiftwatch-probe" in e["message"] and e["level"] == "SEVERE" for e in probe), probe
    assert [e for e in report_log if e["level"] in ("SEVERE", "WARNING")] == []

    # The screenshot: the whole page, kept as a test artifact.
    height = browser.execute_script("return document.documentElement.scrollHeight")
    browser.set_window_size(1280, min(int(height) + 120, 16000))
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    assert browser.save_screenshot(str(SCREENSHOT))
    from PIL import Image

    with Image.open(SCREENSHOT) as shot:
        pixels = np.asarray(shot.convert("RGB"), dtype=np.int16)
    assert pixels.shape[1] == 1280 and pixels.shape[0] >= 5 * 374
    # The event colours made it to the screen: confirmed magenta, open purple (report.py's colours).
    for colour in ("#c51b7d", "#6a3d9a"):
        rgb = np.array([int(colour[i:i + 2], 16) for i in (1, 3, 5)])
        assert int((np.abs(pixels - rgb).sum(axis=2) < 30).sum()) > 20, colour


def _spikes(stderr: str) -> int:
    """The count of samples set aside, from the replay's summary line."""
    line = next(ln for ln in stderr.splitlines() if ln.startswith("replayed "))
    return sum(int(part.split()[-1]) for part in line.split("samples set aside: ")[1].split(", "))
