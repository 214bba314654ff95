"""The spellings of a number in a CSV value or epoch time, and which of them are numbers.

Python's ``float()`` takes more than a CSV or historian value is: digit separators
(``1_000``, PEP 515), digits of other scripts (``١٢``).  Replay took those as numbers.
References: pandas' ``read_csv`` and pyarrow's CSV reader, asked here for a float64
column (two CSV readers outside the project, which agree on every form below); the
daemon's own ``number`` decoder is held to the same answers where a payload and a
cell overlap.  The column-wise reader of clean chunks and the row-by-row reader are
held to each other on every form, long and wide, values and times.
Demo data: the invented Brackenfield plant.
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest

from shiftwatch import sources
from shiftwatch.decode import decode
from shiftwatch.replay import read_long_csv

STREAM = "brackenfield/filler3/fill_g"
T0 = 1772431200  # 2026-03-02T06:00:00Z

#: Forms pandas and pyarrow agree on (both read them as float64, or both refuse them).
FORMS = ["1_000", "1_0.5", "1__0", "_12", "12_", " 12 ", "12 ", "\t12", "nan", "NaN", "-nan", "inf", "-inf",
         "infinity", "Infinity", "0x10", "0b1", "0o7", "1e3", "1E+03", "+5", "-5", ".5", "5.", "-0", "1e400",
         "\u0661\u0662", "\uff11\uff12", "1.5e", "--1", "1.2.3", "12 g", "one", "1e3_0", "4_99.5e1"]


#: Spaces other than ASCII around a number: pandas and pyarrow refuse them; the daemon's decoder
#: takes them off a payload (str.strip), and replay follows the daemon (README says so).
UNICODE_SPACES = ["\u00a012\u00a0", "12\u2003", "\u300012"]


def _pandas(form: str) -> float | None:
    """pandas' float64 reading of the cell, or None when it refuses it."""
    try:
        v = pd.read_csv(io.StringIO(f'v\n"{form}"\n'), dtype={"v": "float64"})["v"].iloc[0]
    except ValueError:
        return None
    return float(v)


def _pyarrow(form: str) -> float | None:
    """pyarrow's float64 reading of the cell (a null for NaN, its default null spellings), or
    None when it refuses it."""
    opts = pacsv.ConvertOptions(column_types={"v": pa.float64()})
    try:
        cell = pacsv.read_csv(io.BytesIO(f'v\n"{form}"\n'.encode()), convert_options=opts).column(0)[0].as_py()
    except pa.ArrowInvalid:
        return None
    return math.nan if cell is None else float(cell)


def _same(a: float | None, b: float | None) -> bool:
    if a is None or b is None:
        return a is b
    return a == b or (math.isnan(a) and math.isnan(b))


@pytest.mark.parametrize("form", FORMS)
def test_the_references_agree_on_each_form(form: str) -> None:
    # The check of the check: the two readers agree, so each form has one answer.
    assert _same(_pandas(form), _pyarrow(form)), form


@pytest.mark.parametrize("form", UNICODE_SPACES)
def test_the_references_refuse_unicode_spaces_where_replay_follows_the_daemon(form: str) -> None:
    assert _pandas(form) is None and _pyarrow(form) is None
    assert decode(form.encode(), "number", now=0.0).readings[0].value == 12.0


def _long_file(path: Path, form: str, where: str) -> Path:
    """Five readings of one stream; the third has ``form`` as its value (or its epoch time)."""
    rows = []
    for i in range(5):
        t, v = f"{T0 + i}", f"{500 + i}.25"
        if i == 2:
            if where == "value":
                v = form
            else:
                t = form.replace("12", str(T0 + i)) if "12" in form else form
        rows.append(f"{t},{STREAM},{v}\n")
    path.write_text("time,stream,value\n" + "".join(rows), encoding="utf-8")
    return path


def _wide_file(path: Path, form: str) -> Path:
    rows = [f"{T0 + i},{500 + i}.25,{form if i == 2 else f'{70 + i}.5'}\n" for i in range(5)]
    path.write_text("time,filler3_fill_g,filler3_nozzle_temp\n" + "".join(rows), encoding="utf-8")
    return path


def _both_paths(path: Path) -> tuple[sources.Block | None, sources.Block]:
    """The column-wise reading of the file's one chunk (None where it hands the chunk on) and
    the row-by-row reading of the same bytes."""
    src = sources.open_source(str(path))
    data = path.read_bytes()[src.body_start:]
    pad = sources._PAD
    buf = bytearray(len(data) + 2 * pad)
    buf[pad:pad + len(data)] = data
    fast = sources._read_fast(src, buf, pad, pad + len(data), src.body_line, 0, None)
    fast_block = None if fast is None else sources.Block(0, 0, fast[0], [], fast[1], len(data))
    slow = sources._slow_rows(src, 0, sources._Lines(bytearray(data), 0, len(data), None), src.body_line, None, 0,
                              len(data))
    return fast_block, slow


def _parts(block: sources.Block) -> dict[str, tuple[list[float], list[float], list[int]]]:
    return {name: (t.tolist(), v.tolist(), p.tolist()) for name, t, v, p in block.parts}


def _equal_parts(a: sources.Block, b: sources.Block) -> bool:
    pa_, pb = _parts(a), _parts(b)
    if pa_.keys() != pb.keys():
        return False
    for k in pa_:
        ta, va, la = pa_[k]
        tb, vb, lb = pb[k]
        if ta != tb or la != lb or not np.array_equal(np.array(va), np.array(vb), equal_nan=True):
            return False
        # -0.0 and 0.0 compare equal: the sign must agree too
        if [math.copysign(1.0, x) for x in va] != [math.copysign(1.0, x) for x in vb]:
            return False
    return True


@pytest.mark.parametrize("form", FORMS + UNICODE_SPACES)
@pytest.mark.parametrize("layout", ["long value", "long time", "wide value"])
def test_the_column_wise_and_row_by_row_readers_agree_on_each_form(tmp_path: Path, form: str, layout: str) -> None:
    path = (_wide_file(tmp_path / "wide.csv", form) if layout == "wide value"
            else _long_file(tmp_path / "long.csv", form, layout.split()[1]))
    fast, slow = _both_paths(path)
    if slow.problems:
        # a chunk with a problem is never read column-wise: the row reader names its line
        assert fast is None, (form, _parts(fast))
    if fast is not None:
        assert fast.rows == slow.rows and fast.problems == slow.problems == []
        assert _equal_parts(fast, slow), (form, _parts(fast), _parts(slow))


@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("layout", ["long", "wide"])
def test_a_value_is_a_number_where_pandas_and_pyarrow_read_one(tmp_path: Path, form: str, layout: str) -> None:
    path = _wide_file(tmp_path / "wide.csv", form) if layout == "wide" else _long_file(tmp_path / "long.csv", form,
                                                                                       "value")
    expected = _pandas(form)
    read = read_long_csv([path])
    name = "filler3_nozzle_temp" if layout == "wide" else STREAM
    series = read.streams[name]
    lines = [int(p) & ((1 << sources.PLACE_BITS) - 1) for p in series.places]
    if expected is None:
        # a bad value: named by file and line, counted, its row skipped, the rest read
        column = "filler3_nozzle_temp: " if layout == "wide" else ""
        assert read.problems == [f"{path}:4: {column}value {form!r} is not a number"], read.problems
        assert lines == [2, 3, 5, 6]
    else:
        assert read.problems == [] and lines == [2, 3, 4, 5, 6]
        assert _same(float(series.values[2]), expected), (form, series.values[2], expected)


@pytest.mark.parametrize("form", [f for f in FORMS if "12" in f or f[:1].isdigit() or f[:1] in "+-_."])
def test_an_epoch_time_is_a_number_where_pandas_and_pyarrow_read_one(tmp_path: Path, form: str) -> None:
    path = _long_file(tmp_path / "long.csv", form, "time")
    text = form.replace("12", str(T0 + 2)) if "12" in form else form
    expected = _pandas(text)
    read = read_long_csv([path])
    lines = [int(p) & ((1 << sources.PLACE_BITS) - 1) for p in read.streams[STREAM].places]
    if expected is None or not math.isfinite(expected) or expected > sources.TIME_MAX:
        assert len(read.problems) == 1 and read.problems[0].startswith(f"{path}:4: time {text!r} "), read.problems
        assert lines == [2, 3, 5, 6]
    else:
        assert read.problems == [] and lines == [2, 3, 4, 5, 6]
        assert float(read.streams[STREAM].times[2]) == expected


@pytest.mark.parametrize("form", FORMS + UNICODE_SPACES)
def test_replay_reads_a_value_as_the_daemon_reads_a_number_payload(tmp_path: Path, form: str) -> None:
    # Where a message payload and a CSV value overlap (the text of one number), the daemon and
    # replay take the same text as a number, and set aside the same NaN and infinities (the
    # daemon as a decoding problem, replay as the engine's reason of the same name).
    got = decode(form.encode(), "number", now=0.0)
    read = read_long_csv([_long_file(tmp_path / "long.csv", form, "value")])
    values = read.streams[STREAM].values
    if got.readings:
        assert read.problems == [] and float(values[2]) == got.readings[0].value
    elif got.problems[0].reason in ("nan", "infinite"):
        v = float(values[2])
        assert read.problems == [] and (math.isnan(v) if got.problems[0].reason == "nan" else math.isinf(v))
    else:
        assert got.problems[0].reason == "not_a_number"
        assert read.problems == [f"{tmp_path / 'long.csv'}:4: value {form!r} is not a number"]


def test_replay_names_a_value_with_digit_separators_and_replays_the_rest(cli, tmp_path: Path) -> None:
    # The real command line: the row is skipped and counted, the others replayed, exit 1
    # (README: "some rows or values were bad; the good ones were processed").
    path = tmp_path / "filler3.csv"
    rows = [f"{T0 + i},{STREAM},{500 + (i % 7) * 0.1:.2f}\n" for i in range(200)]
    rows[57] = f"{T0 + 57},{STREAM},1_000\n"
    rows[120] = f"{T0 + 120},{STREAM},4_99.5\n"
    path.write_text("time,stream,value\n" + "".join(rows), encoding="utf-8")
    res = cli("replay", "--jobs", "1", str(path))
    assert res.returncode == 1, res.stderr
    lines = res.stderr.splitlines()
    assert lines[:2] == [f"{path}:59: value '1_000' is not a number", f"{path}:122: value '4_99.5' is not a number"]
    assert lines[-1].startswith("replayed 200 rows in 1 stream(s)") and lines[-1].endswith(
        "; 2 unreadable row(s) or cell(s) skipped"), lines[-1]
