"""`shiftwatch replay` names the streams whose readings froze, and when (the real CLI in a subprocess).

A history of the invented Brackenfield plant: three fill weights at 1 Hz, 0.01 g readings
of 0.4 g noise.  head7's sensor freezes at its level, 500 g, from reading 1,500 to 2,100
and reads again after; head5's freezes at its last good value from reading 2,700 to the
end; head2 is sound.  A frozen reading near the level trips no test, so no record is
made, and before this change the replay said nothing at all of them (931425f: this test
failed there, the summary had no such line).

That each run is improbable is checked outside the project: two neighbouring readings
rounded to 0.01 are equal with probability P(|d| < 0.005), d ~ N(0, 2 s^2) (scipy.stats.norm),
and the run's probability that to the power of its repeats (neighbouring pairs taken as
independent: common practice).
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
from scipy import stats

from shiftwatch.core.timefmt import format_time

T0 = 1_772_431_200.0  # 2026-03-02T06:00:00Z
N = 3000
HEAD7 = "brackenfield/line2/filler/head7/fill"
HEAD5 = "brackenfield/line2/filler/head5/fill"
HEAD2 = "brackenfield/line2/filler/head2/fill"


def _histories() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(31)
    h = {name: np.round(500.0 + 0.4 * rng.standard_normal(N), 2) for name in (HEAD7, HEAD5, HEAD2)}
    h[HEAD7][1500:2100] = 500.0
    h[HEAD5][2700:] = h[HEAD5][2699]
    return h


def test_replay_names_the_streams_whose_readings_froze_and_when(cli, tmp_path: Path) -> None:
    h = _histories()
    for name in (HEAD7, HEAD5):
        s = float(np.std(h[name][:1400], ddof=1)) * math.sqrt(2)
        p1 = float(stats.norm.cdf(0.005, scale=s) - stats.norm.cdf(-0.005, scale=s))
        assert 5 * math.log10(p1) < -8  # six equal readings in a row: about 1e-10 under the noise
    path = tmp_path / "history.csv"
    with path.open("w") as f:
        f.write("time,stream,value\n")
        for i in range(N):
            for name, x in h.items():
                f.write(f"{format_time(T0 + i)},{name},{x[i]:.2f}\n")
    res = cli("replay", str(path), "--report", str(tmp_path / "report"), timeout=300)
    assert res.returncode == 0, res.stderr
    err = res.stderr
    summary = next(line for line in err.splitlines() if line.startswith("replayed "))
    assert "2 stream(s) whose readings repeated one value improbably long (2 time(s)" in summary, summary
    lines = [line for line in err.splitlines() if re.search(r"^\S+: \d+ readings repeat(ed)? one value", line)]
    assert len(lines) == 2, err
    l7 = next(line for line in lines if line.startswith(HEAD7))
    l5 = next(line for line in lines if line.startswith(HEAD5))
    # head7: 600 readings (its reading 1,499 may have read 500.00 too by chance) until reading 2,099
    m = re.search(r": (\d+) readings repeated one value, 500, from (\S+) to (\S+) ", l7)
    assert m is not None, l7
    assert int(m[1]) >= 600 and m[3] == format_time(T0 + 2099)
    assert m[2] in (format_time(T0 + 1500), format_time(T0 + 1499), format_time(T0 + 1498))
    assert "a stuck sensor is possible" in l7
    m = re.search(r": (\d+) readings repeat one value, ([\d.]+), from (\S+) to the end of the data", l5)
    assert m is not None, l5
    assert int(m[1]) >= 301 and float(m[2]) == h[HEAD5][-1]
    assert HEAD2 not in " ".join(lines)
    # no record is made of a frozen reading near the level
    assert HEAD7 not in res.stdout
    page = (tmp_path / "report" / "report.html").read_text()
    table = page[page.index('<h2 id="repeats">'):page.index('<h2 id="events">')]
    assert table.count("<tr data-stream=") == 2
    assert f'data-stream="{HEAD7}"' in table and f'data-stream="{HEAD5}"' in table
    assert "the end of the data" in table and format_time(T0 + 2099).replace("Z", "") in table.replace("Z", "")
    assert "a stuck sensor is possible" in table
