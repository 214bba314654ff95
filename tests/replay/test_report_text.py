"""``shiftwatch replay --report`` with the user's text and under interruption.

References: matplotlib's documentation, "Writing mathematical expressions"
(text between two ``$`` signs is parsed as mathtext unless the Text has
``parse_math=False``), and POSIX signals (SIGINT, SIGTERM): a report that is
interrupted leaves no temporary file behind.
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.report import StreamTrace, stream_figure

pytest.importorskip("matplotlib")

#: Names an outside tester used: the first three are not valid mathtext (the report
#: crashed), the last two are (they were drawn as math).
DOLLAR_NAMES = ("x $a_$", "tank_1 $\\frac$", "flow $\\frac{m^3$/h", "pump A$ B$", "cost $/h to $^")


def write_steps(path: Path, names: tuple[str, ...], rows: int = 300, step: float = 3.0) -> Path:
    """One reading a second per stream, a step of 3 after the middle (as gen_dollar.py)."""
    with open(path, "w", encoding="utf-8", newline="") as f:
        f.write("time,stream,value\n")
        for name in names:
            quoted = '"' + name.replace('"', '""') + '"'
            f.writelines(f"{1764800000 + i},{quoted},{10 + (i % 5) * 0.1 + (step if i > rows // 2 else 0):.2f}\n"
                         for i in range(rows))
    return path


def traced(name: str, rows: int = 300) -> StreamTrace:
    t = 1764800000.0 + np.arange(rows, dtype=np.float64)
    v = 10 + (np.arange(rows) % 5) * 0.1 + np.where(np.arange(rows) > rows // 2, 3.0, 0.0)
    trace = StreamTrace(name)
    trace.add_batch(t, v, StreamEngine(name).process(t, v))
    trace.close()
    return trace


def test_names_labels_and_units_with_dollar_signs_do_not_break_the_report(cli, tmp_path: Path) -> None:
    """A `$...$` in a stream's name, its configured label or unit crashed ``--report``
    (mathtext ParseSyntaxException in savefig; exit 1, no report.html).  matplotlib's
    "Writing mathematical expressions": text between `$` is mathtext unless parse_math=False."""
    data = write_steps(tmp_path / "dollar.csv", DOLLAR_NAMES + ("a",))
    cfg = tmp_path / "label.yaml"
    cfg.write_text('streams:\n  - topic: "a"\n    label: "x $a_$"\n    unit: "m$^3$"\n')
    out = tmp_path / "report"
    res = cli("replay", "--jobs", "1", "--config", str(cfg), "--report", str(out), str(data))
    assert res.returncode == 0, res.stderr[-2000:]
    assert "Traceback" not in res.stderr
    text = (out / "report.html").read_text(encoding="utf-8")
    for name in DOLLAR_NAMES:
        assert f"<h3>{name}</h3>" in text  # nothing in these names needs escaping in HTML
    assert "<h3>x $a_$ (a)</h3>" in text
    assert sorted(p.name for p in out.iterdir()) == ["report.html"]


@pytest.mark.parametrize("name", DOLLAR_NAMES)
def test_every_text_of_a_chart_is_drawn_as_written(name: str) -> None:
    """`pump A$ B$` was drawn as math (italic A, no dollars).  matplotlib's "Writing
    mathematical expressions": a Text with parse_math=False is drawn literally."""
    trace = traced(name)
    trace.label, trace.unit = name, "m$^3$"
    fig = stream_figure(trace)
    fig.canvas.draw()  # raised ParseSyntaxException for the names that are not valid mathtext
    from matplotlib.text import Text

    texts = [t for t in fig.findobj(Text) if t.get_text()]
    assert any(t.get_text().startswith(f"{name}: 300 samples") for t in texts)
    assert any(t.get_text() == f"{name} (m$^3$)" for t in texts)
    mathtext = [t.get_text() for t in texts if "$" in t.get_text() and t.get_parse_math()]
    assert mathtext == []


def test_a_name_the_font_cannot_draw_warns_nobody(cli, tmp_path: Path) -> None:
    """Control characters in a name made matplotlib print "UserWarning: Glyph 1 (...)
    missing from font(s)" on the terminal, once per character and chart."""
    data = write_steps(tmp_path / "ctl.csv", ("tank\x01\x02 level",))
    out = tmp_path / "report"
    res = cli("replay", "--jobs", "1", "--report", str(out), str(data))
    assert res.returncode == 0, res.stderr[-2000:]
    assert "Glyph" not in res.stderr and "Warning" not in res.stderr
    assert (out / "report.html").is_file()


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_report_interrupted_while_drawing_leaves_no_temporary_file(shiftwatch_cmd: list[str], tmp_path: Path,
                                                                     signum: int) -> None:
    """Killed while drawing (Ctrl-C, SIGTERM), the replay left ``.report-XXXX.html`` in the
    report directory.  POSIX: SIGTERM's default action ends the process without unwinding,
    so the report turns it into an exception while it writes, cleans up, and re-raises it."""
    data = write_steps(tmp_path / "many.csv", tuple(f"tank{k:03d}" for k in range(80)))
    out = tmp_path / "report"
    proc = subprocess.Popen(shiftwatch_cmd + ["replay", "--jobs", "1", "--out", os.devnull, "--report", str(out),
                                              str(data)], stderr=subprocess.PIPE, text=True, cwd=tmp_path)
    try:
        assert proc.stderr is not None
        for line in proc.stderr:  # the summary line comes when the replay is done, before the charts
            if line.startswith("replayed "):
                break
        deadline = time.monotonic() + 60
        while not list(out.glob(".report-*.html")) and time.monotonic() < deadline:
            time.sleep(0.02)
        assert list(out.glob(".report-*.html")), "the report's temporary file never appeared"
        time.sleep(0.5)  # a few charts in
        assert proc.poll() is None, "the report was done before the signal: draw more streams"
        proc.send_signal(signum)
        err = proc.stderr.read()
        rc = proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert rc in (-signum, 128 + signum), (rc, err[-2000:])
    assert "Traceback" not in err
    assert sorted(p.name for p in out.iterdir()) == []


def test_a_report_directory_is_empty_while_the_replay_runs(tmp_path: Path) -> None:
    """The early check that the directory can be written left its probe file there for the
    whole replay, where a kill at any moment would leave it."""
    from shiftwatch.report import ReplayReport

    report = ReplayReport(tmp_path / "report")
    assert list((tmp_path / "report").iterdir()) == []
    report.discard()


def test_a_report_of_many_streams_charts_those_with_events_first_and_lists_the_rest(cli, tmp_path: Path) -> None:
    """A report of 15,000 streams drew a chart for each (over 300 s, a file of hundreds of MB).
    ``--report-charts N`` caps the charts (default 200): streams with events first, then those
    with samples set aside, then the others, by name; every stream stays in the tables."""
    data = write_steps(tmp_path / "many.csv", tuple(f"a-quiet{k}" for k in range(6)), step=0.0)
    with open(data, "a", encoding="utf-8") as f:  # no step: quiet, but two readings out of order
        f.writelines(f"{1764800000 + i},m-late,{10 + (i % 5) * 0.1:.2f}\n" for i in range(300))
        f.write("1764800100,m-late,10.00\n1764800050,m-late,10.00\n")
    with_steps = write_steps(tmp_path / "steps.csv", ("z-step1", "z-step2"))
    out = tmp_path / "report"
    res = cli("replay", "--jobs", "1", "--report-charts", "3", "--report", str(out), str(data), str(with_steps))
    assert res.returncode in (0, 1), res.stderr[-2000:]
    assert "charts for 3 of 9 streams" in res.stderr
    text = (out / "report.html").read_text(encoding="utf-8")
    charted = re.findall(r'<section class="chart" id="s(\d+)"><h3>([^<]*)</h3>', text)
    assert [name for _, name in charted] == ["m-late", "z-step1", "z-step2"]
    assert "Charts for 3 of 9 streams" in text
    for k in range(6):  # no chart, but in the tables, without a link to a chart that is not there
        assert f"<td>a-quiet{k} <span class=\"nochart\">(no chart)</span></td>" in text
    links = set(re.findall(r'href="#(s\d+)"', text))
    assert links == {f"s{i}" for i, _ in charted}


def test_the_report_is_readable_as_the_umask_allows(shiftwatch_cmd: list[str], tmp_path: Path) -> None:
    """report.html came out mode 0600 (tempfile.mkstemp's temporary file, renamed), so a
    report written to a shared directory could not be opened by a colleague.  POSIX open(2):
    a new file gets the mode asked for less the umask, as any file the user writes."""
    data = write_steps(tmp_path / "one.csv", ("tank1",))
    out = tmp_path / "report"
    res = subprocess.run(["sh", "-c", 'umask 022 && exec "$@"', "sh", *shiftwatch_cmd, "replay", "--jobs", "1",
                          "--out", os.devnull, "--report", str(out), str(data)],
                         capture_output=True, text=True, timeout=120, check=False, cwd=tmp_path)
    assert res.returncode == 0, res.stderr[-2000:]
    assert (out / "report.html").stat().st_mode & 0o777 == 0o644


def test_report_charts_without_report_is_refused_before_the_replay(cli, tmp_path: Path) -> None:
    """``--report-charts N`` sets how many charts the report holds; given without
    ``--report DIR`` it was silently ignored (exit 0, no report), so a user who meant to get
    a report found none only after the replay.  Refused now, as a usage error, before any
    row is read (argparse's convention: exit 2 for a command line it cannot use)."""
    data = write_steps(tmp_path / "one.csv", ("tank1",))
    res = cli("replay", "--jobs", "1", "--report-charts", "3", str(data))
    assert res.returncode == 2, (res.returncode, res.stderr[-2000:])
    assert "--report-charts needs --report DIR" in res.stderr
    assert res.stdout == ""  # nothing replayed
