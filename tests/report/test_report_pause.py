"""The replay report's events table names a pause in the readings where a step's
interval begins, as the record (``gap_from``) and its summary do.

A new user's trial (2026-12-05): a Brackenfield filler, read once a second, stopped for
half an hour and came back 2 g higher.  The records named the pause ("the first reading
after 30 min without readings, since ..."), the report's events table showed only
"07:10:00 to 07:10:00 (90%)", as if the step's time were known to the second.  The truth
is the data's construction: every reading before the stop at 500 g, every one after it
2 g higher, so the step came during the stop.  Demo data, normal noise from a fixed state.
"""

from __future__ import annotations

import html
import json
import re
from pathlib import Path

import numpy as np

from shiftwatch.core.timefmt import format_time

STREAM = "brackenfield/line3/filler/head4/fill"


def replay_report(cli, tmp_path: Path, name: str, t: np.ndarray, x: np.ndarray) -> str:
    """The report page of ``shiftwatch replay --report`` (a subprocess) on a long CSV of one
    stream (``t``, ``x``); its records in ``tmp_path / "r.jsonl"``."""
    data = tmp_path / name
    with open(data, "w", encoding="utf-8") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{ti:.0f},{STREAM},{v!r}\n" for ti, v in zip(t.tolist(), x.tolist(), strict=True))
    res = cli("replay", "--jobs", "1", "--report", str(tmp_path / "report"), "--out", str(tmp_path / "r.jsonl"),
              str(data))
    assert res.returncode == 0, res.stderr[-2000:]
    return (tmp_path / "report" / "report.html").read_text(encoding="utf-8")


def test_the_events_table_names_the_pause_before_a_step(cli, tmp_path: Path) -> None:
    rng = np.random.default_rng(20261205)
    x = 500.0 + 0.5 * rng.standard_normal(2400)
    x[1200:] += 2.0
    t = 1_796_000_000.0 + np.arange(2400.0)
    t[1200:] += 1800.0
    page = replay_report(cli, tmp_path, "stop.csv", t, x)
    rows = [html.unescape(re.sub(r"<[^>]+>", " ", r))
            for r in re.findall(r'<tr class="event .*?</tr>', page, re.DOTALL)]
    assert len(rows) == 1, rows
    assert f"the first reading after 30 min without readings, since {format_time(t[1199])}" in rows[0], rows[0]


def test_the_streams_table_counts_every_outcome_so_a_row_adds_up(cli, tmp_path: Path) -> None:
    # The same trial: a filler's fill weight went up 2 g for a minute and came back
    # (confirmed, then returned), and later stepped up across the stop (confirmed).  The
    # Streams table read "events 3, confirmed 2, dismissed 0, open 0": the returned step was
    # in no column, and the row did not add up.  Truth: the records' own phases.
    rng = np.random.default_rng(20261205)
    x = 500.0 + 0.5 * rng.standard_normal(4200)
    x[1500:1560] += 2.0
    x[2400:] += 1.2
    t = 1_796_000_000.0 + np.arange(4200.0)
    t[2400:] += 1800.0
    page = replay_report(cli, tmp_path, "excursion.csv", t, x)
    phases = [json.loads(line)["phase"] for line in (tmp_path / "r.jsonl").read_text().splitlines()]
    finals = [p for p in phases if p != "detected"]
    assert "returned" in finals, phases
    table = re.search(r'<table class="streams">.*?</table>', page, re.DOTALL)
    assert table is not None
    head = [html.unescape(c) for c in re.findall(r"<th>(.*?)</th>", table.group(0).split("</thead>")[0])]
    assert head == ["stream", "samples", "rejected", "events", "confirmed", "returned", "dismissed",
                    "undecided", "open"], head
    body = table.group(0).split("<tbody>")[1].split("</tbody>")[0]
    cells = [re.sub(r"<[^>]+>", "", c).replace(",", "") for c in re.findall(r"<td[^>]*>(.*?)</td>", body)]
    row = dict(zip(head, cells, strict=True))
    assert int(row["events"]) == len(phases) - len(finals) == 3, row
    for outcome in ("confirmed", "returned", "dismissed", "undecided"):
        assert int(row[outcome]) == finals.count(outcome), (outcome, row, finals)
    assert sum(int(row[k]) for k in head[4:]) == int(row["events"]), row
