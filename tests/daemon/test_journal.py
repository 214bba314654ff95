"""The sample journal: rounds read back bit for bit, only on top of their own snapshot,
and a torn or damaged tail never read."""

from __future__ import annotations

import json
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
            ga.stream == gb.stream and ga.unit == gb.unit and ga.topic_filter == gb.topic_filter
            and all(np.array_equal(x, y, equal_nan=True) for x, y in zip(ga[2:5], gb[2:5]))
            for ga, gb in zip(ra, rb))
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


def test_a_stream_whose_name_was_cut_survives_restore_replay_and_reload(
        tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    # A topic of more than 256 characters under a '+' filter gets a cut name
    # ending in '~' and a hash, which the filter 'plant/+/fill' no longer
    # matches: the daemon must remember the entry the engine was made for.
    from shiftwatch.config import load_config
    from shiftwatch.daemon import Daemon
    from shiftwatch.decode import stream_name
    from shiftwatch.metrics import Metrics
    from shiftwatch.mqtt import Message

    path = tmp_path / "shiftwatch.yaml"
    path.write_text("streams:\n  - {topic: 'plant/+/fill', format: json, value: v, time: ts, "
                    "unit: g, label: 'fill on {1}'}\n"
                    f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / 'state'}'}}\n")
    cfg = load_config(str(path))
    topic = "plant/" + "h" * 300 + "/fill"
    name = stream_name(topic, None)
    assert name != topic and cfg.stream_for(name) is None  # the name alone matches no entry

    t0 = 1.79e9
    x = 500.0 + 0.5 * np.random.default_rng(5).standard_normal(900)
    x[700:] += 1.5

    def msgs(lo: int, hi: int) -> list[Message]:
        return [Message(topic=topic, payload=json.dumps({"v": float(x[i]), "ts": t0 + i}).encode(),
                        arrived=t0 + i, mid=0, qos=0) for i in range(lo, hi)]

    def start() -> Daemon:
        d = Daemon(load_config(str(path)), config_path=str(path), metrics=Metrics())
        d.restore()
        return d

    first = start()
    first.process(msgs(0, 500))
    assert first.snapshot()
    first.process(msgs(500, 650))  # journaled on top of the snapshot, then a crash
    assert first.journal is not None
    first.journal.close()
    before = first.engines[name].get_state()

    second = start()  # snapshot restored, then the journal replayed
    assert name in second.engines
    assert second.engines[name].get_state() == before
    eng = second.engines[name]
    second.reload()  # same file: the stream stays, with its state
    assert second.engines.get(name) is eng and eng.get_state() == before

    third = start()  # from the snapshot the reload wrote
    assert third.engines[name].get_state() == before
    with caplog.at_level(logging.INFO, logger="shiftwatch"):
        third.process(msgs(650, 900))
    assert third.records_published >= 1
    assert "CONFIRMED fill on hhhh" in caplog.text  # the entry's label, from its '+' level
    if third.journal is not None:
        third.journal.close()


def test_the_entry_filter_is_kept_and_old_rounds_without_it_still_read(tmp_path: Path) -> None:
    from shiftwatch.journal import _decode_round, _encode_round

    j = Journal(tmp_path)
    j.open("snap-1")
    j.append([group("line1/fill", 3)._replace(topic_filter="line1/+"), group("line2/fill", 2)])
    j.close()
    (got,) = Journal(tmp_path).open("snap-1")
    assert [g.topic_filter for g in got] == ["line1/+", None]
    # A round written before the filter was recorded has three items per stream.
    body = _encode_round([group("line1/fill", 4)])
    head, _, data = body.partition(b"\n")
    old = json.dumps([entry[:3] for entry in json.loads(head)]).encode() + b"\n" + data
    (g,) = _decode_round(old)
    assert g.stream == "line1/fill" and g.topic_filter is None and g.values.shape == (4,)


def test_background_syncs_leave_the_caller_and_close_waits_for_them(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # The daemon's journal forces the disk from a thread of its own, so that a
    # slow disk never holds up the main loop (and an alert); while one sync is
    # in flight the next due one is skipped, and close() waits for it and
    # forces the rest itself.
    import threading

    calls: list[str] = []
    disk = threading.Event()  # the "disk" answers when the test says so
    real = os.fdatasync

    def held_fdatasync(fd: int) -> None:
        if threading.current_thread() is not threading.main_thread():
            assert disk.wait(30)
        calls.append(threading.current_thread().name)
        real(fd)

    monkeypatch.setattr(os, "fdatasync", held_fdatasync)
    j = Journal(tmp_path, sync_every=0.0, background=True)
    j.start_background()  # its thread starts here, at start-up, never on the way of a round
    threads = threading.active_count()
    j.open("snap-1")
    rounds = [[group("line1/fill", 4, k)] for k in range(20)]
    for r in rounds:
        j.append(r)  # every one due for a sync; none waits for the held one
    assert calls == []
    disk.set()
    j.close()
    assert calls == ["shiftwatch-journal-sync", "MainThread"]
    assert threading.active_count() == threads  # no thread was started per sync
    j.stop_background()
    assert same(Journal(tmp_path).open("snap-1"), rounds)


def test_a_round_is_written_as_the_plain_encoding_bit_for_bit(tmp_path: Path) -> None:
    """Journal.append writes the parts of _round_record, and the cluster's journal messages
    are _encode_round's: both exactly the encoding as first written, for random rounds (groups of several sizes, float32 and
    strided arrays, units, filters, names outside ASCII, pooled singles, empty rounds)."""
    from shiftwatch.journal import JournalSingles, _encode_round, _record, _round_record

    def plain(groups: list[JournalGroup], singles: JournalSingles | None) -> bytes:
        """The encoding as it was first written: each array's bytes, joined."""
        index = []
        arrays = []
        for g in groups:
            index.append([g.stream, g.unit, int(g.times.shape[0]), g.topic_filter])
            arrays += [g.times, g.values, g.arrived]
        data = b"".join(np.ascontiguousarray(a, dtype="<f8").tobytes() for a in arrays)
        if singles is not None and singles.streams:
            index += [[n, u, 1, f] for n, u, f in zip(singles.streams, singles.units, singles.topic_filters)]
            data += np.column_stack((singles.times, singles.values, singles.arrived)).astype("<f8").tobytes()
        return json.dumps(index, ensure_ascii=False).encode("utf-8") + b"\n" + data

    rng = np.random.default_rng(5)
    j = Journal(tmp_path)
    j.open("t")
    expected = [(tmp_path / JOURNAL_NAME).read_bytes()]
    for k in range(60):
        groups = []
        for i in range(int(rng.integers(0, 6))):
            n = int(rng.choice([0, 1, 3, 260]))
            t = rng.standard_normal(2 * n)[::2] if k % 3 == 0 else 1.788e9 + np.arange(float(n))
            v = rng.standard_normal(n).astype(np.float32) if k % 4 == 0 else rng.standard_normal(n)
            groups.append(JournalGroup(f"s{i}/é{k}", None if i % 2 else "g", t, v, np.full(n, 1.788e9 + k),
                                       None if i % 3 else "plant/+/v"))
        singles = None
        if k % 2:
            m = int(rng.integers(0, 4))
            singles = JournalSingles([f"p{q}" for q in range(m)], [None] * m, ["plant/#"] * m,
                                     rng.standard_normal(m), rng.standard_normal(m), rng.standard_normal(m))
        rec = b"".join(bytes(p) for p in _round_record(groups, singles))
        assert _encode_round(groups, singles) == plain(groups, singles)
        assert rec == _record(plain(groups, singles))
        if groups or singles:
            j.append(groups, singles)
            expected.append(rec)
    j.close()
    assert (tmp_path / JOURNAL_NAME).read_bytes() == b"".join(expected)


def test_a_cluster_journal_message_is_the_round_encoding_of_its_one_group_bit_for_bit() -> None:
    """``encode_group`` (a cluster journal message, its index line from cached parts since
    2026-12-05) against ``_encode_round`` of the one group and the encoding as first
    written, for random groups (sizes 0 to 260, float32, big-endian and strided arrays, units, filters,
    names with quotes, backslashes, control characters and letters outside ASCII, the same
    stream again with another count), and read back by ``decode_groups`` as that group."""
    from shiftwatch.journal import _encode_round, decode_groups, encode_group

    rng = np.random.default_rng(11)
    names = ["line1/fill", "s/é\u00e9t\u00e9", 'q"uote', "back\\slash", "ctl\x01\n", "日本/ç"]
    for k in range(200):
        n = int(rng.choice([0, 1, 2, 31, 260]))
        t = rng.standard_normal(2 * n)[::2] if k % 3 == 0 else 1.788e9 + np.arange(float(n))
        v = rng.standard_normal(n).astype(np.float32) if k % 4 == 0 else rng.standard_normal(n)
        if k % 5 == 1:  # big-endian doubles (encode_group's direct join takes little-endian ones only)
            v = v.astype(">f8")
        g = JournalGroup(names[k % len(names)], [None, "g", "°C", ""][k % 4], t, v, np.full(n, 1.788e9 + k),
                         [None, "plant/+/v", "é/#"][k % 3])
        index = json.dumps([[g.stream, g.unit, n, g.topic_filter]], ensure_ascii=False).encode("utf-8")
        plain = index + b"\n" + b"".join(np.ascontiguousarray(a, dtype="<f8").tobytes() for a in g[2:5])
        body = encode_group(g)
        assert body == _encode_round([g]) == plain
        (back,) = decode_groups(body)
        assert (back.stream, back.unit, back.topic_filter) == (g.stream, g.unit, g.topic_filter)
        assert all(np.array_equal(x, np.asarray(y, dtype=np.float64)) for x, y in zip(back[2:5], g[2:5]))
