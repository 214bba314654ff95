"""A shift a new stream's warm-up found but could not report leaves a trace in `replay`.

With 30 samples of its first level a 1-sigma step cannot be told from noise at the
plant's false-alarm rate (README, "How it decides", item 1): no record.  The samples
before it are set aside as ``warmup_shift``; the replay's summary counts them with the
other samples set aside, they are real readings, not bad input, so no problem line
and exit status 0.  The series: numpy's default_rng(0), 1,500 iid samples, a step of
1 at sample 30 (the Brackenfield filler 4 fill weight, invented for this test).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np


def test_a_shift_the_warm_up_could_not_report_is_counted_in_the_summary(cli, tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    x = 10.0 + rng.standard_normal(1500)
    x[30:] += 1.0
    t0 = 1_788_000_000
    path = tmp_path / "filler4.csv"
    path.write_text("time,stream,value\n" + "".join(
        f"{t0 + i},brackenfield/filler4/weight,{v:.4f}\n" for i, v in enumerate(x.tolist())))
    res = cli("replay", str(path))
    assert res.returncode == 0, res.stderr
    assert [json.loads(line) for line in res.stdout.splitlines()] == []
    summary = res.stderr.strip().splitlines()[-1]
    assert "samples set aside: warmup_shift 31" in summary, res.stderr
    assert "filler4.csv:" not in res.stderr  # no problem line: nothing in the file was bad
