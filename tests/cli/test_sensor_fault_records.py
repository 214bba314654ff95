"""Every place that shows records says a stuck sensor or a spread change, not a step in sigmas.

The real ``shiftwatch replay`` (with ``--report``) in a subprocess on a history of
three streams at the Brackenfield plant (an invented site): a fill weight whose
sensor freezes at 0 g (a fallback value), a capper torque whose noise grows
threefold with no change of level, and a fill weight with a real 2-sigma step. The
status board (the page's JSON and ``shiftwatch status``'s table) is fed the same
engines' records.

That each fault is real is checked outside the project: scipy.stats.levene
(Brown-Forsythe) and bartlett for the spread; for the frozen run, its probability
under the noise before it, two neighbouring readings rounded to 0.01 being equal
with probability P(|d| < 0.005), d ~ N(0, 2 s^2) (scipy.stats.norm), to the power
of the repeats (neighbouring pairs taken as independent: common practice).
Before 2026-12-05 the frozen sensor's records read "stepped down 500 g (1.2e+03
sigma)" in the summary, the status table and the report, and the torque's spread
gave confirmed and returned "steps" (all of this file failed on f6e6b79).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
from scipy import stats

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.records import ADVISORY
from shiftwatch.core.timefmt import format_time
from shiftwatch.metrics import Metrics, StreamStats
from shiftwatch.status import StatusBoard, format_table

T0 = 1_772_431_200.0  # 2026-03-02T06:00:00Z
N, F = 2400, 1200
FILL = "brackenfield/line2/filler/head7/fill"
TORQUE = "brackenfield/line2/capper/head3/torque"
STEP = "brackenfield/line2/filler/head2/fill"


def histories() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(44)
    fill = np.round(500.0 + 0.4 * rng.standard_normal(N), 2)
    fill[F:] = 0.0
    e = rng.standard_normal(N)
    torque = 2.4 + 0.05 * e
    torque[F:] = 2.4 + 0.15 * e[F:]
    torque = np.round(torque, 4)
    step = np.round(500.0 + 0.4 * rng.standard_normal(N), 2)
    step[F:] += 0.8
    return {FILL: fill, TORQUE: torque, STEP: step}


def check_faults_are_real(h: dict[str, np.ndarray]) -> None:
    a, b = h[TORQUE][F - 300:F], h[TORQUE][F:F + 300]
    assert stats.levene(a, b, center="median").pvalue < 1e-10
    assert stats.bartlett(a, b).pvalue < 1e-10
    s = float(np.std(h[FILL][F - 400:F], ddof=1))
    p1 = stats.norm.cdf(0.005, scale=s * math.sqrt(2)) - stats.norm.cdf(-0.005, scale=s * math.sqrt(2))
    assert (N - F - 1) * math.log10(p1) < -100


def test_replay_records_its_summary_and_its_report_name_the_two_faults(cli, tmp_path: Path) -> None:
    h = histories()
    check_faults_are_real(h)
    path = tmp_path / "line2.csv"
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        for i in range(N):
            f.writelines(f"{format_time(T0 + i)},{name},{float(x[i])!r}\n" for name, x in h.items())
    res = cli("replay", "--report", str(tmp_path / "report"), str(path), timeout=300)
    assert res.returncode == 0, res.stderr
    recs = [json.loads(line) for line in res.stdout.splitlines() if line.strip()]
    by = {name: [r for r in recs if r["stream"] == name] for name in h}

    fill = by[FILL]
    assert [r["phase"] for r in fill] == ["detected", "confirmed"]
    conf = fill[-1]
    assert conf["repeated_value"] == 0.0 and conf["repeated_count"] >= 0.9 * conf["repeated_of"]
    assert "a stuck sensor is possible" in conf["summary"] and "sigma" not in conf["summary"], conf["summary"]
    assert conf["advisory"] == ADVISORY

    torque = by[TORQUE]
    assert not any(r["phase"] in ("confirmed", "returned") for r in torque), [r["phase"] for r in torque]
    spread = [r for r in torque if "spread_ratio" in r]
    assert spread and spread[0]["phase"] == "undecided"
    assert 2.0 <= spread[0]["spread_ratio"] <= 4.5
    assert "the noise's spread grew" in spread[0]["summary"] and "a loose sensor or a worn part" in spread[0]["summary"]
    assert sum(r["phase"] == "detected" for r in torque) <= 2

    step = by[STEP]
    assert [r["phase"] for r in step] == ["detected", "confirmed"]
    assert "repeated_value" not in step[-1] and "spread_ratio" not in step[-1]
    assert " sigma) at " in step[-1]["summary"]

    html = (tmp_path / "report" / "report.html").read_text()
    assert "one value repeated" in html
    assert f"spread x{spread[0]['spread_ratio']:.2g}" in html


def test_the_status_page_and_table_show_the_fault_in_place_of_sigmas() -> None:
    h = histories()
    check_faults_are_real(h)
    t = T0 + np.arange(float(N))
    m = Metrics()
    engines = {name: StreamEngine(name, unit=("N m" if name == TORQUE else "g")) for name in h}
    recs = {}
    for name, eng in engines.items():
        recs[name] = []
        for i in range(0, N, 100):
            recs[name] += eng.process(t[i:i + 100], h[name][i:i + 100]).records
        m.update_stream(name, StreamStats.from_engine(eng))
    board = StatusBoard(m.streams)
    for name in h:
        for r in recs[name]:
            board.record(r)
    doc = board.overview()
    last = {s["stream"]: s["last_event"] for s in doc["streams"]}
    assert last[FILL]["repeated_value"] == 0.0
    assert last[FILL]["size_text"] == f"{recs[FILL][-1].delta:+.3g} g (one value repeated)"
    torque_last = recs[TORQUE][-1]
    if torque_last.spread_ratio is not None:  # the torque's last event is the spread's
        assert last[TORQUE]["size_text"].endswith(f"(spread x{torque_last.spread_ratio:.2g})")
    named = [r for r in recs[TORQUE] if r.spread_ratio is not None]
    assert named
    assert last[STEP]["size_text"].endswith(" sigma)")
    table = format_table(doc, width=200)
    assert "(one value repeated)" in table and "sigma)" in table
    page = board.stream(TORQUE)
    assert page is not None
    sizes = [r["size_text"] for e in page["events"] for r in e["records"] if r.get("spread_ratio") is not None]
    assert sizes and all("spread x" in s and "sigma" not in s for s in sizes), sizes
