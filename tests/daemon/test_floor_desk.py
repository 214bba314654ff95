"""The daemon's desk for floor commands (shiftwatch.floor), in process: where the book of
planned windows, holds and acknowledgements is kept across restarts.

The end-to-end behaviour (real daemon, real Mosquitto) is in test_floor.py; this file
checks the precedence of the two saved copies and old snapshots without either.
"""

from __future__ import annotations

import json
import logging
from pathlib import Path

from prometheus_client import CollectorRegistry

from shiftwatch.core.plans import FloorBook, parse_command
from shiftwatch.floor import FLOOR_FILE, FloorDesk
from shiftwatch.metrics import FloorMetrics

NOW = 1_800_000_000.0


def desk(tmp_path: Path) -> tuple[FloorDesk, list[tuple[str, bytes, bool]]]:
    sent: list[tuple[str, bytes, bool]] = []
    d = FloorDesk("sw", tmp_path, FloorMetrics(CollectorRegistry()), logging.getLogger("test.floor"),
                  lambda t, p, durable: sent.append((t, p, durable)))
    return d, sent


def book(*targets: str) -> FloorBook:
    b = FloorBook()
    for t in targets:
        b.apply(parse_command("hold", {"target": t}, NOW), NOW)
    return b


def test_a_snapshot_of_an_older_version_without_a_book_loads_empty(tmp_path: Path) -> None:
    d, _ = desk(tmp_path)
    d.load({"saved_at": NOW, "journal": "none", "filters": {}})
    assert d.book.windows == {} and d.book.events == {}
    assert d.view("a/b").hold is None


def test_the_newer_of_the_file_and_the_snapshot_is_taken(tmp_path: Path) -> None:
    older, newer = book("a/#"), book("a/#", "b/#")
    (tmp_path / FLOOR_FILE).write_text(json.dumps({"version": 1, "book": newer.get_state()}))
    d, _ = desk(tmp_path)
    d.load({"floor": older.get_state()})
    assert set(d.book.windows) == set(newer.windows)
    (tmp_path / FLOOR_FILE).write_text(json.dumps({"version": 1, "book": older.get_state()}))
    d, _ = desk(tmp_path)
    d.load({"floor": newer.get_state()})
    assert set(d.book.windows) == set(newer.windows)


def test_a_damaged_file_is_moved_aside_and_the_snapshot_used(tmp_path: Path, caplog) -> None:
    (tmp_path / FLOOR_FILE).write_text('{"version": 1, "book": {"revision": -3}}')
    d, _ = desk(tmp_path)
    with caplog.at_level(logging.ERROR, logger="test.floor"):
        d.load({"floor": book("a/#").get_state()})
    assert len(d.book.windows) == 1
    assert (tmp_path / (FLOOR_FILE + ".damaged")).exists() and not (tmp_path / FLOOR_FILE).exists()
    assert "is damaged (floor.revision: malformed" in caplog.text


def test_a_change_is_written_before_the_command_is_acknowledged_and_read_back(tmp_path: Path) -> None:
    from shiftwatch.mqtt import Message

    d, sent = desk(tmp_path)
    msg = Message("sw/commands/hold", json.dumps({"target": "a/#", "ref": "r1"}).encode(), NOW, 1, 1)
    assert d.handle([msg], NOW, {}, lambda name: None) == []
    assert [(t, json.loads(p)["ref"], durable) for t, p, durable in sent] == [("sw/replies", "r1", False)]
    again, _ = desk(tmp_path)
    again.load({})
    assert set(again.book.windows) == set(d.book.windows)
