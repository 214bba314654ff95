"""The replay report without a browser: its envelope, its overlays, its memory
and the ``--report`` option of the real command line.

The browser's view of the same report is in test_report_browser.py.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.timefmt import parse_time
from shiftwatch.replay import read_long_csv
from shiftwatch.report import (
    REPORT_FILE,
    Envelope,
    StreamTrace,
    band_range,
    stream_figure,
    zoom_range,
)

if TYPE_CHECKING:
    from conftest import PlantCsv


def read_records(text: str) -> list[dict]:
    return [json.loads(line) for line in text.splitlines() if line.strip()]


def trace_of(plant: PlantCsv, stream: str, **options: int) -> StreamTrace:
    """The stream's trace, fed batch by batch from its own engine."""
    s = read_long_csv([plant.path]).streams[stream]
    t, v = np.asarray(s.times), np.asarray(s.values)
    eng = StreamEngine(stream)
    trace = StreamTrace(stream, **options)
    for a in range(0, t.shape[0], 700):
        trace.add_batch(t[a:a + 700], v[a:a + 700], eng.process(t[a:a + 700], v[a:a + 700]))
    trace.close()
    return trace


# ------------------------------------------------------------ the envelope
def test_envelope_extremes_and_means_match_pandas_per_bin() -> None:
    # Reference: pandas' groupby over the same bins (an outside implementation
    # of per-group min, max and mean).
    rng = np.random.default_rng(5)
    n = 250_000
    t = 1_772_431_200.0 + np.cumsum(rng.uniform(0.5, 1.5, n))
    v = 500.0 + 0.6 * rng.standard_normal(n)
    v[rng.integers(0, n, 40)] += 9.0  # a few spikes, which the envelope must keep
    env = Envelope(max_bins=800)
    a = 0
    while a < n:  # batches of uneven size
        b = min(n, a + int(rng.integers(1, 9000)))
        env.add(t[a:b], v[a:b])
        a = b
    assert env.binned and env.count == n
    x, lo, hi, mean = env.points()
    assert x.shape[0] <= 800
    idx = np.floor((t - env.origin) / env.width).astype(np.int64)
    ref = pd.Series(v).groupby(idx).agg(["min", "max", "mean"])
    got = ~np.isnan(lo)
    assert np.flatnonzero(got).tolist() == ref.index.tolist()
    assert np.array_equal(lo[got], ref["min"].to_numpy())
    assert np.array_equal(hi[got], ref["max"].to_numpy())
    assert np.allclose(mean[got], ref["mean"].to_numpy(), rtol=0, atol=1e-9)
    assert np.allclose(x[got], env.origin + (ref.index.to_numpy() + 0.5) * env.width)
    assert lo[got].min() == v.min() and hi[got].max() == v.max()


def test_envelope_keeps_few_samples_as_they_are() -> None:
    env = Envelope(max_bins=1000)
    t = np.arange(600.0)
    env.add(t, t * 2)
    x, lo, hi, mean = env.points()
    assert not env.binned
    assert x.tolist() == t.tolist() and lo.tolist() == hi.tolist() == mean.tolist() == (t * 2).tolist()
    with pytest.raises(ValueError, match="even number"):
        Envelope(max_bins=7)


def test_report_memory_does_not_grow_with_the_replay() -> None:
    # A week of 1 Hz samples with a step a day costs the trace what two hours do.
    def run(n: int) -> StreamTrace:
        rng = np.random.default_rng(9)
        t = 1_772_431_200.0 + np.arange(n, dtype=np.float64)
        v = 182.0 + 0.5 * rng.standard_normal(n)
        for k in range(7200, n, 86_400):
            v[k:] += 1.0 if (k // 86_400) % 2 == 0 else -1.0
        eng = StreamEngine("brackenfield/line2/oven/senml/zone3_temp")
        trace = StreamTrace(eng.stream)
        peak = 0
        for a in range(0, n, 4096):
            trace.add_batch(t[a:a + 4096], v[a:a + 4096], eng.process(t[a:a + 4096], v[a:a + 4096]))
            peak = max(peak, trace.nbytes)
        trace.close()
        trace.peak = peak  # type: ignore[attr-defined]
        return trace

    short, week = run(14_400), run(604_800)
    # The level alternates: every other step goes back, so it is "returned".
    assert len([e for e in week.events() if e.outcome in ("confirmed", "returned")]) >= 7
    bound = (32 * 1000 + 16 * (2400 + 4096) + 3 * 16 * (2400 + 4096) + 16 * 500)
    assert week.peak <= bound  # type: ignore[attr-defined]
    assert week.envelope.nbytes == short.envelope.nbytes


# ------------------------------------------------------------- the overlays
def test_chart_draws_each_event_at_its_records_exact_values(plant_csv: PlantCsv) -> None:
    stream = "brackenfield/line2/filler/head3/fill"  # the blip: a dismissed event
    trace = trace_of(plant_csv, stream)
    events = trace.events()
    assert [e.outcome for e in events] == ["dismissed"]
    fig = stream_figure(trace)
    main = fig.axes[0]
    r = events[0].final
    dt = trace.envelope.interval
    low, high = band_range(r, dt)
    # the band: its polygon's x extent, in matplotlib date numbers (days)
    spans = [p for p in main.patches if p.get_hatch() == "///"]
    assert len(spans) == 1
    span = spans[0]
    if hasattr(span, "get_width"):  # a Rectangle (matplotlib 3.9 and later)
        x0, x1 = span.get_x(), span.get_x() + span.get_width()
    else:  # a Polygon
        x0, x1 = min(span.get_xy()[:, 0]), max(span.get_xy()[:, 0])
    assert x0 == low / 86400.0 and x1 == pytest.approx(high / 86400.0, rel=1e-15)
    assert low < r.shift_at_low <= r.shift_at <= r.shift_at_high < high
    # the detection line
    vlines = [ln for ln in main.lines if list(ln.get_xdata()) == [r.detected_at / 86400.0] * 2]
    assert len(vlines) == 1 and vlines[0].get_linestyle() == "--"
    # the two fitted levels, grey and dashed for a dismissed event
    levels = sorted((seg[0][1], seg[1][1]) for c in main.collections if hasattr(c, "get_segments")
                    for seg in c.get_segments())
    assert (r.level_before, r.level_before) in levels and (r.level_after, r.level_after) in levels
    # the zoomed panel holds the raw samples around the event, every one of them
    lo, hi = zoom_range(r)
    s = read_long_csv([plant_csv.path]).streams[stream]
    t = np.asarray(s.times)
    zt, _ = trace.zooms[r.id]
    assert zt.tolist() == t[(t >= lo) & (t <= hi)].tolist()
    assert len(fig.axes) == 2


def test_spikes_are_marked_where_the_engine_set_them_aside(plant_csv: PlantCsv) -> None:
    stream = "brackenfield/line2/filler/head2/fill"
    trace = trace_of(plant_csv, stream)
    s = read_long_csv([plant_csv.path]).streams[stream]
    eng = StreamEngine(stream)
    res = eng.process(np.asarray(s.times), np.asarray(s.values))  # one batch: every position known
    spikes = sorted(float(s.times[r.position]) for r in res.rejected if r.reason == "spike")
    assert spikes and trace.spike_times == spikes and trace.spikes_total == len(spikes)
    times = s.times.tolist()  # the series holds arrays
    assert trace.spike_values == [s.values[times.index(x)] for x in spikes]


# ----------------------------------------------------- the real command line
def test_replay_report_writes_one_html_file_that_matches_the_records(cli, plant_csv: PlantCsv,
                                                                     tmp_path: Path) -> None:
    plain = cli("replay", str(plant_csv.path))
    out = tmp_path / "reports" / "line2"  # created, parents too
    res = cli("replay", "--out", str(tmp_path / "a.jsonl"), "--report", str(out), str(plant_csv.path))
    assert res.returncode == 0, res.stderr
    assert (tmp_path / "a.jsonl").read_text() == plain.stdout  # the report changes no record
    assert f"report written to {out / 'report.html'}" in res.stderr
    assert sorted(p.name for p in out.iterdir()) == ["report.html"]  # no temporary file left
    text = (out / "report.html").read_text()
    assert text.count('<img src="data:image/png;base64,') == len(plant_csv.streams)
    assert "http://" not in text and "https://" not in text
    # Quiet when stderr is not a terminal: no progress bar.
    assert "\r" not in res.stderr and "%|" not in res.stderr

    # Each event's row carries the final record's delta_sigma and the delay
    # detected_at - shift_at, both as printed in the JSON lines.
    final = {r["id"]: r for r in read_records(plain.stdout)}
    rows = {m[2]: (m[1], m[3]) for m in re.finditer(r'<tr class="event (\w+)" data-id="(\w+)">(.*?)</tr>', text)}
    assert set(rows) == set(final)
    for rid, r in final.items():
        outcome, row = rows[rid]
        assert outcome == ("open" if r["phase"] == "detected" else r["phase"])
        assert f'data-sigma="{r["delta_sigma"]:.3f}"' in row
        delay = parse_time(r["detected_at"]) - parse_time(r["shift_at"])
        assert f'data-delay="{delay:.3f}"' in row
    assert sorted(r["phase"] for r in final.values()) == ["confirmed"] * 3 + ["detected", "dismissed"]


def test_replay_shows_a_progress_bar_on_a_terminal(shiftwatch_cmd: list[str], write_plant: Callable[..., Any],
                                                   tmp_path: Path, stderr_on_terminal: Any) -> None:
    # A long replay (5 streams x 24,000 samples) with stderr on a pseudo-terminal.
    plant = write_plant(tmp_path / "long.csv", n=24_000)
    code, seen = stderr_on_terminal(shiftwatch_cmd + ["replay", "--out", str(tmp_path / "a.jsonl"), str(plant.path)],
                                    cwd=tmp_path)
    assert code == 0, seen[-500:]
    assert "replay:" in seen and f"/{plant.path.stat().st_size / 1e6:.2f}M [" in seen and "B/s]" in seen, seen[-500:]
    assert "replayed 120000 rows in 5 stream(s)" in seen


def test_replay_report_names_a_directory_it_cannot_write(cli, plant_csv: PlantCsv, tmp_path: Path) -> None:
    blocker = tmp_path / "a-file"
    blocker.write_text("not a directory\n")
    res = cli("replay", "--report", str(blocker / "report"), str(plant_csv.path))
    assert res.returncode == 2
    assert res.stderr.startswith(f"shiftwatch: --report {blocker / 'report'}: cannot write there: ")
    assert res.stdout == ""  # refused before replaying anything


def test_replay_report_given_an_existing_file_says_it_is_a_file_not_a_directory(cli, plant_csv: PlantCsv,
                                                                               tmp_path: Path) -> None:
    # Found by an outside tester: `--report afile` said "cannot write there: File exists" (EEXIST
    # from mkdir(2)), which does not say why.  --report names a directory (README); a regular file
    # is named as such, before anything is replayed, and left as it was.
    afile = tmp_path / "afile"
    afile.write_text("an earlier report\n")
    res = cli("replay", "--report", str(afile), str(plant_csv.path))
    assert res.returncode == 2 and "Traceback" not in res.stderr
    assert res.stderr == (f"shiftwatch: --report {afile}: is a file, not a directory; --report names the "
                          f"directory that gets {REPORT_FILE}\n"), res.stderr
    assert res.stdout == "" and afile.read_text() == "an earlier report\n"


def test_replay_report_refuses_a_report_html_that_is_a_directory_before_replaying(cli, plant_csv: PlantCsv,
                                                                                  tmp_path: Path) -> None:
    # A writable directory whose report.html is a directory was found out only when the
    # finished report was renamed there, after the whole replay (found by an outside trial).
    (tmp_path / "out" / "report.html").mkdir(parents=True)
    res = cli("replay", "--report", str(tmp_path / "out"), str(plant_csv.path))
    assert res.returncode == 2 and "Traceback" not in res.stderr
    assert res.stderr == f"shiftwatch: --report {tmp_path / 'out'}: cannot write report.html: it is a directory\n"
    assert res.stdout == ""  # refused before replaying anything
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["report.html"]


def test_a_stream_name_of_half_a_megabyte_is_drawn_shortened_and_kept_whole_elsewhere(cli, tmp_path: Path) -> None:
    # A broken export can make a field of any length; a stream name of 500,000 characters took
    # the report 37 s and 400 MB (matplotlib laying out the whole name as the chart's title),
    # one of 5,000,000 characters more than two minutes (found by an outside trial). The
    # chart draws the name's start and its length; the records and the tables keep it whole.
    # (No time is asserted: the chart's title is what the fix changes.)
    name = "tank_" + "x" * 500_000
    t = 1772431200.0 + np.arange(600, dtype=float)
    v = 10 + (np.arange(600) % 7) * 0.1 + np.where(np.arange(600) >= 400, 3.0, 0.0)
    eng = StreamEngine(name)
    trace = StreamTrace(name)
    trace.unit, trace.label = "kg" * 200, "level " * 100
    trace.add_batch(t, v, eng.process(t, v))
    trace.close()
    fig = stream_figure(trace)
    title = fig.axes[0].get_title(loc="left")
    assert title.startswith(name[:119] + "\u2026 (500,005 characters): 600 samples"), title[:300]
    assert len(title) < 300 and len(fig.axes[0].get_ylabel()) < 300
    path = tmp_path / "long-name.csv"
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{1772431200 + i},{name},{10 + (i % 7) * 0.1 + (3 if i >= 400 else 0):.2f}\n"
                     for i in range(600))
    res = cli("replay", "--report", str(tmp_path / "r"), str(path))
    assert res.returncode == 0 and "Traceback" not in res.stderr, res.stderr[-2000:]
    assert f'"stream": "{name}"' in res.stdout
    assert name in (tmp_path / "r" / "report.html").read_text()


def test_replay_report_without_matplotlib_says_what_to_install(plant_csv: PlantCsv, tmp_path: Path) -> None:
    # The real CLI in a subprocess where importing matplotlib fails.
    code = ("import sys; sys.modules['matplotlib'] = None\n"
            "from shiftwatch.cli import main\n"
            f"sys.exit(main(['replay', '--report', {str(tmp_path / 'r')!r}, {str(plant_csv.path)!r}]))\n")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=False)
    assert res.returncode == 2
    assert "--report needs matplotlib" in res.stderr and "pip install 'shiftwatch[report]'" in res.stderr
    assert "Traceback" not in res.stderr


def test_the_daemon_and_the_cli_do_not_import_matplotlib_or_tqdm() -> None:
    code = ("import sys, shiftwatch.cli, shiftwatch.daemon, shiftwatch.replay, shiftwatch.report\n"
            "print(sorted({m.split('.')[0] for m in sys.modules} & {'matplotlib', 'tqdm', 'selenium'}))\n")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=False)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "[]"


# ------------------------------------------- what the reader of a chart sees
def test_the_chart_names_the_reading_its_unit_and_zone_and_draws_a_confirmed_level_to_the_end(
        plant_csv: PlantCsv) -> None:
    # The first-hour report: the y-axis said "value" with --config and a unit, the times were
    # UTC only, and the level after a confirmed step was a stub on a long chart.
    stream = "brackenfield/line2/filler/head2/fill"  # one confirmed step, nothing after it
    trace = trace_of(plant_csv, stream)
    trace.unit, trace.label, trace.time_zone = "g", "fill weight on filler head2", "Europe/Berlin"
    events = trace.events()
    assert [e.outcome for e in events] == ["confirmed"]
    fig = stream_figure(trace)
    main = fig.axes[0]
    assert main.get_ylabel() == "fill weight on filler head2 (g)"
    assert main.get_xlabel() == "time (Europe/Berlin)"
    assert str(main.xaxis.get_major_formatter()._locator.tz) == "Europe/Berlin"
    r = events[0].final
    after = [seg for c in main.collections if hasattr(c, "get_segments") for seg in c.get_segments()
             if seg[0][1] == r.level_after]
    assert len(after) == 1
    (x0, _), (x1, _) = after[0]
    assert x0 == r.shift_at / 86400.0
    assert x1 == trace.envelope.last_time / 86400.0 > r.as_of / 86400.0  # to the last sample


def test_replay_report_with_a_config_uses_its_labels_units_and_time_zone(cli, plant_csv: PlantCsv,
                                                                         tmp_path: Path) -> None:
    cfg = tmp_path / "line2.yaml"
    cfg.write_text("streams:\n  - topic: brackenfield/line2/filler/+/fill\n    unit: g\n"
                   "    label: fill weight on filler {1}\n"
                   "display: {time_zone: Europe/Berlin}\n")
    out = tmp_path / "report"
    res = cli("replay", "--config", str(cfg), "--report", str(out), str(plant_csv.path))
    assert res.returncode == 0, res.stderr
    text = (out / "report.html").read_text()
    assert "Times are shown in Europe/Berlin (the alert records hold them in UTC)" in text
    assert "<th>shift at (Europe/Berlin)</th>" in text and "<th>detected at (Europe/Berlin)</th>" in text
    assert "<h3>fill weight on filler head2 (brackenfield/line2/filler/head2/fill)</h3>" in text
    conf = next(r for r in read_records(res.stdout) if r["phase"] == "confirmed"
                and r["stream"] == "brackenfield/line2/filler/head2/fill")
    # 2026-03-02 in Berlin is CET, UTC+1: the table shows the record's UTC time an hour on.
    from shiftwatch.display import stamp

    assert stamp(parse_time(conf["shift_at"]), "Europe/Berlin").endswith("+01:00")
    assert f"<td>{stamp(parse_time(conf['shift_at']), 'Europe/Berlin')}</td>" in text
