"""The sample journal: rounds read back bit for bit, only on top of their own snapshot,
and a torn or damaged tail never read."""

from __future__ import annotations

import logging
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from shiftwatch.journal import JOURNAL_NAME, Journal, JournalGroup


def group(name: str, n: int, seed: int = 0, unit: str | None = "g") -> JournalGroup:
    rng = np.random.default_rng(seed)
    t = 1_790_000_000.0 + np.arange(float(n))
    return JournalGroup(name, unit, t, rng.standard_normal(n), t + rng.random(n))


def same(a: list[list[JournalGroup]], b: list[list[JournalGroup]]) -> bool:
    return len(a) == len(b) and all(
        len(ra) == len(rb) and all(
            ga.stream == gb.stream and ga.unit == gb.unit and all(
                np.array_equal(x, y, equal_nan=True) for x, y in zip(ga[2:], gb[2:])) for ga, gb in zip(ra, rb))
        for ra, rb in zip(a, b))


def test_rounds_come_back_bit_for_bit(tmp_path: Path) -> None:
    j = Journal(tmp_path)
    assert j.open("snap-1") == []
    rounds = [[group("line1/fill", 5, 1), group("line1/\u00e9t\u00e9", 1, 2, unit=None)],
              [group("line1/fill", 300, 3)], [group("empty", 0)]]
    rounds[0][0].values[2] = np.nan
    for r in rounds:
        j.append(r)
    j.close()
    assert same(Journal(tmp_path).open("snap-1"), rounds)


def test_appending_goes_on_after_reopening(tmp_path: Path) -> None:
    j = Journal(tmp_path)
    j.open("s")
    j.append([group("a", 3)])
    j.close()
    j2 = Journal(tmp_path)
    assert len(j2.open("s")) == 1
    j2.append([group("b", 2)])
    j2.close()
    assert [r[0].stream for r in Journal(tmp_path).open("s")] == ["a", "b"]


def test_another_snapshots_journal_is_discarded(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.INFO)
    j = Journal(tmp_path)
    j.open("old")
    j.append([group("a", 3)])
    j.close()
    assert Journal(tmp_path).open("new") == []
    assert "belongs to another snapshot" in caplog.text
    # ... and the journal now belongs to "new".
    assert Journal(tmp_path).open("new") == []
    assert Journal(tmp_path).open("old") == []


@pytest.mark.parametrize("cut", [1, 7, 12, 40])
def test_a_torn_tail_is_cut_off(tmp_path: Path, cut: int, caplog: pytest.LogCaptureFixture) -> None:
    j = Journal(tmp_path)
    j.open("s")
    j.append([group("a", 3)])
    j.append([group("b", 4)])
    j.close()
    path = tmp_path / JOURNAL_NAME
    data = path.read_bytes()
    path.write_bytes(data[:-cut])
    j2 = Journal(tmp_path)
    assert [r[0].stream for r in j2.open("s")] == ["a"]
    assert "discarded" in caplog.text
    j2.append([group("c", 1)])  # appended after the good prefix, not after the torn bytes
    j2.close()
    assert [r[0].stream for r in Journal(tmp_path).open("s")] == ["a", "c"]


def test_a_damaged_record_ends_the_journal(tmp_path: Path) -> None:
    j = Journal(tmp_path)
    j.open("s")
    for name in ("a", "b", "c"):
        j.append([group(name, 3)])
    j.close()
    path = tmp_path / JOURNAL_NAME
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF  # a flipped byte in the middle round: its checksum fails
    path.write_bytes(bytes(data))
    assert [r[0].stream for r in Journal(tmp_path).open("s")] == ["a"]


def test_garbage_is_not_a_journal(tmp_path: Path) -> None:
    (tmp_path / JOURNAL_NAME).write_bytes(os.urandom(500))
    assert Journal(tmp_path).open("s") == []


def test_size_limit_and_failed_appends_close_the_journal(tmp_path: Path) -> None:
    j = Journal(tmp_path, max_bytes=2000)
    j.open("s")
    j.append([group("a", 10)])
    with pytest.raises(OSError, match="limit"):
        j.append([group("a", 100)])
    assert not j.is_open
    with pytest.raises(OSError, match="not open"):
        j.append([group("a", 1)])
    j.restart("t")  # a new snapshot starts a new one
    j.append([group("b", 1)])
    j.close()
    assert [r[0].stream for r in Journal(tmp_path).open("t")] == ["b"]


def test_rounds_survive_sigkill_without_fsync(tmp_path: Path) -> None:
    # A process appends rounds and is killed; every appended round is read back.
    code = (
        "import os, signal, sys, numpy as np\n"
        "from shiftwatch.journal import Journal, JournalGroup\n"
        f"j = Journal({str(tmp_path)!r}, sync_every=1e9)\n"
        "j.open('s')\n"
        "for i in range(200):\n"
        "    t = np.arange(5.0) + 5 * i\n"
        "    j.append([JournalGroup('a', None, t, t, t)])\n"
        "os.kill(os.getpid(), signal.SIGKILL)\n")
    res = subprocess.run([sys.executable, "-c", code], check=False)
    assert res.returncode == -9
    rounds = Journal(tmp_path).open("s")
    assert len(rounds) == 200 and rounds[-1][0].times[-1] == 999.0
