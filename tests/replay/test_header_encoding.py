"""A wide CSV whose header is not valid UTF-8 (a tag name in Windows-1252) says so, as a long one does.

Found by an outside trial of ``shiftwatch replay`` (2026-12-05): a historian export saved in
Windows-1252, its tag names carrying a unit (``torque N\\xb7m``), replayed in the wide layout
with the degree sign replaced by U+FFFD in every record's ``stream``, without a word and with
exit status 0; the same name in a long file's rows gave the note ``FILE: the file is not valid
UTF-8; unreadable characters were replaced`` and exit status 1.

References: pandas ``read_csv(..., encoding_errors="replace")`` for the names and readings the
file holds (the stdlib codec's replacement, U+FFFD per invalid byte: Python's documentation of
``bytes.decode``), and history.py's stdlib reading of the same readings for the records.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest

from .history import one_batch_records, printed_records, readings, write_long, write_wide

TORQUE = "brackenfield/line2/capper/torque"
CP1252_NAME = "brackenfield/line2/capper/torque N\xb7m"  # as Windows-1252 writes it: one byte 0xb7


@pytest.mark.parametrize("jobs", ["1", "2"])
def test_a_wide_header_not_in_utf8_gets_the_note_a_long_file_gets(cli, tmp_path: Path, jobs: str) -> None:
    data = readings(2000)
    wide_utf8 = write_wide(tmp_path / "utf8_wide.csv", data)
    long_utf8 = write_long(tmp_path / "utf8_long.csv", data)
    wide = tmp_path / "cp1252_wide.csv"
    wide.write_bytes(wide_utf8.read_text().replace(TORQUE, CP1252_NAME).encode("cp1252"))
    long = tmp_path / "cp1252_long.csv"
    long.write_bytes(long_utf8.read_text().replace(TORQUE, CP1252_NAME).encode("cp1252"))
    replaced = CP1252_NAME.encode("cp1252").decode("utf-8", errors="replace")
    assert replaced == "brackenfield/line2/capper/torque N\ufffdm"
    frame = pd.read_csv(wide, encoding_errors="replace")
    assert replaced in frame.columns and len(frame) == 2000

    want = one_batch_records({(replaced if k == TORQUE else k): v for k, v in data.items()})
    assert any(json.loads(r)["stream"] == replaced for r in want)
    for path in (long, wide):
        got = cli("replay", "--jobs", jobs, str(path))
        assert got.returncode == 1, got.stderr[-2000:]
        assert f"{path}: the file is not valid UTF-8; unreadable characters were replaced" in got.stderr
        assert "; 1 file(s) not valid UTF-8 (characters replaced)" in got.stderr
        assert printed_records(got.stdout) == want, path.name
