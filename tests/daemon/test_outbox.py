"""The alert outbox, on a real filesystem."""

from __future__ import annotations

import logging
import os
import signal
import subprocess
import sys
import threading
from collections.abc import Callable
from pathlib import Path

import pytest

from shiftwatch.outbox import Outbox, OutboxItem

DAEMON_ROOT = Path(__file__).resolve().parents[2] / "daemon"


def files(d: Path) -> list[str]:
    return sorted(p.name for p in d.iterdir())


def test_add_and_pending_in_order_across_reopen(tmp_path: Path) -> None:
    box = Outbox(tmp_path)
    added = [box.add(f"shiftwatch/alerts/s{i}", b'{"n": %d}' % i, qos=i % 3, retain=i == 4)
             for i in range(12)]
    assert [i.key for i in added] == sorted(i.key for i in added)
    assert box.pending() == added
    assert len(box) == 12
    again = Outbox(tmp_path)
    assert again.pending() == added
    assert again.pending()[4].retain and again.pending()[5].qos == 2
    # New items after a reopen come after the old ones.
    later = again.add("t", b"later")
    assert later.key > added[-1].key
    assert Outbox(tmp_path).pending() == added + [later]


def test_payload_bytes_survive_exactly(tmp_path: Path) -> None:
    payloads = [b"", b"\n\n", b"\x00\xff" * 1000, "温度 ünï".encode(), b'{"a": 1}\n{"b": 2}']
    box = Outbox(tmp_path)
    for p in payloads:
        box.add("weird/tøpic/\"q\"", p)
    got = Outbox(tmp_path).pending()
    assert [i.payload for i in got] == payloads
    assert {i.topic for i in got} == {"weird/tøpic/\"q\""}


def test_remove(tmp_path: Path) -> None:
    box = Outbox(tmp_path)
    a, b, c = (box.add("t", bytes([i])) for i in range(3))
    box.remove(b.key)
    box.remove(b.key)  # twice is fine
    box.remove("00000000000000009999")  # never existed
    assert box.pending() == [a, c]
    assert len(box) == 2
    assert Outbox(tmp_path).pending() == [a, c]
    box.remove(a.key)
    box.remove(c.key)
    assert len(Outbox(tmp_path)) == 0
    assert files(tmp_path) == []
    # Within one instance keys keep increasing after removals.
    assert box.add("t", b"x").key > c.key


def test_bound_drops_oldest_and_logs_each(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    box = Outbox(tmp_path, max_items=3)
    with caplog.at_level(logging.WARNING, logger="shiftwatch.outbox"):
        items = [box.add("t", b"%d" % i) for i in range(5)]
    assert box.pending() == items[2:]
    assert box.dropped == 2
    assert len([r for r in caplog.records if "discarded" in r.getMessage()]) == 2
    assert Outbox(tmp_path, max_items=3).pending() == items[2:]
    assert len(files(tmp_path)) == 3


def test_smaller_bound_on_reopen_drops_oldest(tmp_path: Path) -> None:
    box = Outbox(tmp_path)
    items = [box.add("t", b"%d" % i) for i in range(5)]
    small = Outbox(tmp_path, max_items=2)
    assert small.pending() == items[3:]
    assert small.dropped == 3
    with pytest.raises(ValueError):
        Outbox(tmp_path, max_items=0)


def test_bad_arguments(tmp_path: Path) -> None:
    box = Outbox(tmp_path)
    with pytest.raises(ValueError):
        box.add("", b"x")
    with pytest.raises(ValueError):
        box.add("t", b"x", qos=3)
    assert len(box) == 0


CHILD = r"""
import sys
from shiftwatch.outbox import Outbox
box = Outbox(sys.argv[1])
i = 0
while True:
    item = box.add("alerts/%d" % i, b"payload %d" % i)
    print(item.key, flush=True)
    i += 1
"""


def test_items_survive_a_killed_process(tmp_path: Path) -> None:
    # Added, then the process dies without any cleanup: every add that returned
    # is still pending in a new instance, in order, and nothing is damaged.
    env = dict(os.environ, PYTHONPATH=str(DAEMON_ROOT))
    proc = subprocess.Popen([sys.executable, "-c", CHILD, str(tmp_path)], stdout=subprocess.PIPE,
                            text=True, env=env)
    assert proc.stdout is not None
    returned = [proc.stdout.readline().strip() for _ in range(30)]
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    proc.stdout.close()
    box = Outbox(tmp_path)
    pending = box.pending()
    keys = [i.key for i in pending]
    assert keys[:30] == returned
    assert keys == sorted(keys)
    for n, item in enumerate(pending):
        assert item.topic == f"alerts/{n}" and item.payload == b"payload %d" % n
    assert all(name.endswith(".msg") for name in files(tmp_path))  # leftovers cleaned


def test_discarded_object_leaves_items_pending(tmp_path: Path) -> None:
    box = Outbox(tmp_path)
    a = box.add("t", b"a")
    b = box.add("t", b"b")
    del box
    assert Outbox(tmp_path).pending() == [a, b]


@pytest.mark.parametrize("damage", [
    lambda data: data[:-3],  # truncated payload
    lambda data: data[:5],  # truncated header
    lambda data: b"",  # empty file
    lambda data: data.replace(b"payload", b"PAYLOAD"),  # checksum mismatch
    lambda data: b"\xff\xfe garbage\n" + data,  # not JSON
    lambda data: data.replace(b'"qos": 1', b'"qos": 7'),
])
def test_unreadable_item_is_moved_aside(tmp_path: Path, caplog: pytest.LogCaptureFixture,
                                        damage: Callable[[bytes], bytes]) -> None:
    box = Outbox(tmp_path)
    a = box.add("t", b"payload a")
    b = box.add("t", b"payload b")
    c = box.add("t", b"payload c")
    path = tmp_path / f"{b.key}.msg"
    path.write_bytes(damage(path.read_bytes()))
    with caplog.at_level(logging.WARNING, logger="shiftwatch.outbox"):
        again = Outbox(tmp_path)
    assert again.pending() == [a, c]
    assert (tmp_path / f"{b.key}.msg.corrupt-1").exists()
    msgs = [r.getMessage() for r in caplog.records if r.name == "shiftwatch.outbox"]
    assert len(msgs) == 1 and b.key in msgs[0] and "\n" not in msgs[0]
    # The damaged item's number is not reused, and the reopened outbox works.
    d = again.add("t", b"payload d")
    assert d.key > c.key
    assert Outbox(tmp_path).pending() == [a, c, d]


def test_leftover_temp_and_unrelated_files(tmp_path: Path) -> None:
    box = Outbox(tmp_path)
    a = box.add("t", b"a")
    (tmp_path / ".outbox-abc.tmp").write_bytes(b'{"topic": "t"')
    (tmp_path / "README").write_text("not an item")
    assert Outbox(tmp_path).pending() == [a]
    assert files(tmp_path) == [f"{a.key}.msg", "README"]


def test_add_failure_raises_and_stores_nothing(tmp_path: Path) -> None:
    box = Outbox(tmp_path / "box")
    box.add("t", b"a")
    # Replace the directory by a file: writes fail for root too.
    for p in (tmp_path / "box").iterdir():
        p.unlink()
    (tmp_path / "box").rmdir()
    (tmp_path / "box").write_text("now a file")
    with pytest.raises(OSError):
        box.add("t", b"b")
    assert len(box) == 1


def test_unusable_directory_keeps_records_in_memory(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    # A directory that cannot be made (here: a file is in the way, which stops
    # root too) leaves an outbox in memory: it never raises, and says so once.
    (tmp_path / "box").write_text("not a directory")
    box = Outbox(tmp_path / "box")
    assert not box.on_disk
    assert "kept in memory only" in caplog.text
    item = box.add("t", b"a")
    box.sync()
    assert [i.key for i in box.pending()] == [item.key]
    box.remove(item.key)
    assert len(box) == 0
    assert (tmp_path / "box").read_text() == "not a directory"


def test_concurrent_add_and_remove(tmp_path: Path) -> None:
    box = Outbox(tmp_path)
    added: list[OutboxItem] = []
    lock = threading.Lock()
    errors: list[BaseException] = []

    def producer(n: int) -> None:
        try:
            for i in range(40):
                item = box.add(f"p{n}", b"%d" % i)
                with lock:
                    added.append(item)
                if i % 2:
                    box.remove(item.key)  # as an on_publish callback would
        except BaseException as exc:  # noqa: BLE001  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=producer, args=(n,)) for n in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    keys = [i.key for i in added]
    assert len(set(keys)) == 160
    pending = box.pending()
    assert len(pending) == 80 == len(box)
    assert [i.key for i in pending] == sorted(i.key for i in pending)
    assert Outbox(tmp_path).pending() == pending


def test_records_added_without_sync_are_forced_by_sync(tmp_path: Path) -> None:
    box = Outbox(tmp_path / "ob")
    a = box.add("sw/alerts/a", b"one", sync=False)
    b = box.add("sw/alerts/b", b"two", sync=False)
    box.remove(a.key)  # delivered before the round ended: nothing to force
    box.sync()
    again = Outbox(tmp_path / "ob")
    assert [i.key for i in again.pending()] == [b.key]
    assert again.pending()[0].payload == b"two"


def test_a_deferred_removal_deletes_the_file_at_the_next_purge(tmp_path: Path) -> None:
    # paho's thread removes delivered records with defer=True: the list changes
    # at once, the file goes with the next purge (or sync), and a record whose
    # file outlived a crash is sent again, as at-least-once delivery allows.
    box = Outbox(tmp_path / "ob")
    a = box.add("sw/alerts/a", b"one")
    b = box.add("sw/alerts/b", b"two")
    box.remove(a.key, defer=True)
    assert [i.key for i in box.pending()] == [b.key] and len(box) == 1
    assert box.purge_waiting
    assert sorted(i.key for i in Outbox(tmp_path / "ob").pending()) == [a.key, b.key]  # "crash" now
    box.purge()
    assert not box.purge_waiting
    assert [i.key for i in Outbox(tmp_path / "ob").pending()] == [b.key]
    box.remove(b.key, defer=True)
    box.sync()  # sync purges too
    assert Outbox(tmp_path / "ob").pending() == []
