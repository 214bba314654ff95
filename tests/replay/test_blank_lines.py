"""Lines of spaces or tabs only, between rows and at the end of a file, in both CSV layouts.

Found by an outside trial of ``shiftwatch replay`` (2026-12-05): a long file skipped such a line
as blank, without a word, but a wide file reported it twice (``expected 5 columns, got 1; the
4 missing at the end are read as empty cells`` and ``time '   ' is not RFC 3339 ...``), counted
it as two unreadable rows and exited with status 1, though no reading was lost.

Reference: pandas ``read_csv`` (``skip_blank_lines=True``, its default, with the C and the
Python engine alike) skips a line of whitespace only in a wide file, and reads the same rows as
from the file without such lines; history.py's stdlib reading of the long file gives the
records.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest

from .history import (
    one_batch_records,
    printed_records,
    readings,
    stdlib_long,
    write_long,
    write_wide,
)

BLANKS = ("   ", "\t", " \t ")


def _with_blank_lines(src: Path, dst: Path, every: int, crlf: bool) -> Path:
    lines = src.read_text().splitlines()
    out = [lines[0]]
    for i, line in enumerate(lines[1:]):
        out.append(line)
        if i % every == every - 1:
            out.append(BLANKS[i % len(BLANKS)])
    out += ["  ", "\t"]  # trailing lines of whitespace, as a hand-edited export ends
    end = "\r\n" if crlf else "\n"
    dst.write_bytes((end.join(out) + end).encode())
    return dst


@pytest.mark.parametrize(("jobs", "crlf"), [("1", False), ("2", False), ("1", True)])
def test_a_line_of_whitespace_only_is_skipped_as_blank_in_either_layout(cli, tmp_path: Path, jobs: str,
                                                                        crlf: bool) -> None:
    data = readings(2500)
    wide = write_wide(tmp_path / "line2_wide.csv", data)
    long = write_long(tmp_path / "line2_long.csv", data)
    wide_blank = _with_blank_lines(wide, tmp_path / "line2_wide_blank.csv", 97, crlf)
    long_blank = _with_blank_lines(long, tmp_path / "line2_long_blank.csv", 389, crlf)
    # pandas reads the wide file with its whitespace lines as the one without them
    for engine in ("c", "python"):
        pd.testing.assert_frame_equal(pd.read_csv(wide_blank, engine=engine), pd.read_csv(wide, engine=engine))
    series, bad = stdlib_long(long)
    assert not bad
    want = one_batch_records(series)
    assert len(want) >= 4

    for path in (long_blank, wide_blank):
        got = cli("replay", "--jobs", jobs, str(path))
        assert got.returncode == 0, got.stderr[-2000:]
        assert "unreadable" not in got.stderr and "expected" not in got.stderr, got.stderr[-2000:]
        assert printed_records(got.stdout) == want, path.name
    fit = cli("fit", str(wide_blank), "--stream", next(iter(data)), "--json")
    fit_ref = cli("fit", str(wide), "--stream", next(iter(data)), "--json")
    assert fit.returncode == 0, fit.stderr[-2000:]
    assert fit.stdout == fit_ref.stdout and json.loads(fit.stdout)["n_before"] > 0
