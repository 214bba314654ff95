"""The retained levels of the streams as a state machine of their own (shiftwatch.levels).

``LevelBoard`` is driven here directly, with real engines fed real samples and a
publish callable that records what it is handed, the way the daemon's broker link
would take it: which updates become due, which go out, the bound on those awaiting
the broker's acknowledgement, the offline round at a stop, and the clearing of a
removed stream.  The daemon end to end is held to the same behaviour by
test_fuzz.py (the bound under a frozen broker), test_calm_daemon.py (what is due)
and test_hardening.py (a removed stream's retained message cleared).

References: MQTT 3.1.1 (OASIS Standard, 2014), section 3.3.1.3: a retained
PUBLISH with a zero-length payload removes the retained message of its topic;
the six significant digits of the payload are Python's ``%.6g`` (the Python
Language Reference, "Format Specification Mini-Language"); ``updated_at`` is an
RFC 3339 time in UTC (RFC 3339, section 5.6), here built by ``datetime`` from the
standard library.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from typing import Any

import numpy as np

from shiftwatch.core.engine import WATCHING, StreamEngine
from shiftwatch.core.settings import DetectionSettings
from shiftwatch.levels import LEVELS_IN_FLIGHT, OFFLINE, LevelBoard

T0 = 1_790_000_000.0
#: A short warm-up (the least warmup_samples allowed), so that a stream has a level soon.
SETTINGS = DetectionSettings(warmup_samples=20)
CLOCK = 1_790_003_600.25
PREFIX = "brackenfield"


def _engine(name: str, rng: np.random.Generator, n: int = 120, level: float = 50.0) -> StreamEngine:
    """A stream of Brackenfield's kiln line past its warm-up (demo data)."""
    eng = StreamEngine(name, SETTINGS, unit="degC")
    eng.process(T0 + np.arange(n, dtype=float), level + rng.standard_normal(n), T0 + np.arange(n, dtype=float))
    assert eng.level is not None
    return eng


class Link:
    """What the board hands the broker link: (topic, payload, level) per call.  A level
    publication gets a message id, as paho's would, that the board counts in flight."""

    def __init__(self) -> None:
        self.up = True
        self.made = True
        self.sent: list[tuple[str, bytes, bool]] = []
        self.mid = 0
        self.board: LevelBoard | None = None

    def publish(self, topic: str, payload: bytes, level: bool) -> None:
        self.sent.append((topic, payload, level))
        self.mid += 1
        if level:
            assert self.board is not None
            self.board.sent_out(self.mid)

    def bodies(self) -> list[dict[str, Any]]:
        return [json.loads(p) for _t, p, level in self.sent if level]


def _board(engines: dict[str, StreamEngine], labels: dict[str, str] | None = None) -> tuple[LevelBoard, Link]:
    link = Link()
    board = LevelBoard(PREFIX, engines, label_for=(labels or {}).get, publish=link.publish,
                       linked=lambda: link.made, connected=lambda: link.made and link.up,
                       clock=lambda: CLOCK)
    link.board = board
    return board, link


def test_a_stream_without_a_level_is_never_due() -> None:
    eng = StreamEngine("kiln/3/temp", SETTINGS, unit="degC")
    eng.process([T0, T0 + 1], [50.0, 50.1], [T0, T0 + 1])  # still warming up
    assert eng.level is None
    board, link = _board({"kiln/3/temp": eng})
    board.changed("kiln/3/temp", eng)
    board.send_due()
    assert not board.due and link.sent == []


def test_an_update_goes_out_once_and_again_only_when_what_it_shows_changes() -> None:
    rng = np.random.default_rng(3)
    eng = _engine("kiln/1/temp", rng)
    assert eng.state == WATCHING
    board, link = _board({"kiln/1/temp": eng}, {"kiln/1/temp": "Kiln 1 crown"})
    board.changed("kiln/1/temp", eng)
    assert list(board.due) == ["kiln/1/temp"]
    board.send_due()
    assert not board.due
    ((topic, _payload, level),) = link.sent
    assert topic == f"{PREFIX}/levels/kiln/1/temp" and level
    (body,) = link.bodies()
    assert body["stream"] == "kiln/1/temp" and body["label"] == "Kiln 1 crown"
    assert body["state"] == WATCHING and body["unit"] == "degC" and "note" not in body
    # Six significant digits, as %.6g gives them (Python's format specification).
    assert body["level"] == float(f"{eng.level:.6g}") and body["sigma"] == float(f"{eng.sigma:.6g}")
    # RFC 3339 UTC with milliseconds, from the board's clock.
    assert body["updated_at"] == datetime.fromtimestamp(CLOCK, tz=UTC).strftime("%Y-%m-%dT%H:%M:%S.250Z")
    # A watching stream is kept as its engine's Baseline itself: nothing new to show.
    assert board.sent["kiln/1/temp"] is eng.baseline
    assert board.shows("kiln/1/temp", WATCHING, eng) and not board.shows("kiln/1/temp", OFFLINE, eng)
    board.changed("kiln/1/temp", eng)
    assert not board.due
    # New samples move the level: due again, and the new level goes out.
    before = eng.level
    eng.process(T0 + 120 + np.arange(40, dtype=float), 50.0 + rng.standard_normal(40),
                T0 + 120 + np.arange(40, dtype=float))
    assert eng.level != before
    board.changed("kiln/1/temp", eng)
    board.send_due()
    assert [b["level"] for b in link.bodies()] == [float(f"{before:.6g}"), float(f"{eng.level:.6g}")]


def test_nothing_goes_out_while_the_broker_is_away_and_the_queue_keeps_each_stream_once() -> None:
    rng = np.random.default_rng(4)
    engines = {f"kiln/{k}/temp": _engine(f"kiln/{k}/temp", rng) for k in range(3)}
    board, link = _board(engines)
    link.up = False
    for _ in range(3):
        for name, eng in engines.items():
            board.changed(name, eng)
        board.send_due()
    assert list(board.due) == list(engines) and link.sent == []
    link.up = True
    board.send_due()
    assert [json.loads(p)["stream"] for _t, p, _l in link.sent] == list(engines)  # oldest first


def test_at_most_levels_in_flight_await_the_broker() -> None:
    rng = np.random.default_rng(5)
    n = LEVELS_IN_FLIGHT + 12
    engines = {f"dryer/{k}/moisture": _engine(f"dryer/{k}/moisture", rng, n=60) for k in range(n)}
    board, link = _board(engines)
    for name, eng in engines.items():
        board.changed(name, eng)
    board.send_due()
    assert len(link.sent) == LEVELS_IN_FLIGHT and len(board.in_flight) == LEVELS_IN_FLIGHT
    assert len(board.due) == n - LEVELS_IN_FLIGHT
    for mid in range(1, 6):  # the broker acknowledges five
        board.answered(mid)
    board.send_due()
    assert len(link.sent) == LEVELS_IN_FLIGHT + 5 and len(board.due) == n - LEVELS_IN_FLIGHT - 5
    board.answered(10_000)  # an acknowledgement of something else frees no place
    board.send_due()
    assert len(link.sent) == LEVELS_IN_FLIGHT + 5
    board.connection_lost()  # the bound counts from each connection
    board.send_due()
    assert len(link.sent) == n and not board.due
    assert sorted(b["stream"] for b in link.bodies()) == sorted(engines)


def test_at_a_stop_every_stream_goes_out_once_more_as_offline() -> None:
    rng = np.random.default_rng(6)
    engines = {f"press/{k}/force": _engine(f"press/{k}/force", rng) for k in range(4)}
    board, link = _board(engines)
    for name, eng in engines.items():
        board.changed(name, eng)
    board.send_due()
    board.go_offline(engines)
    assert list(board.due) == list(engines)
    board.send_due()
    offline = link.bodies()[4:]
    assert [b["stream"] for b in offline] == list(engines)
    for b in offline:
        eng = engines[b["stream"]]
        assert b["state"] == OFFLINE and b["level"] == float(f"{eng.level:.6g}")
        assert b["note"].startswith("shiftwatch stopped")
    # What the topic shows now is the offline tuple, not the baseline.
    assert all(board.sent[n] == (OFFLINE, e.level, e.sigma) for n, e in engines.items())


def test_a_removed_stream_is_cleared_with_an_empty_retained_message() -> None:
    rng = np.random.default_rng(7)
    engines = {"kiln/1/temp": _engine("kiln/1/temp", rng), "kiln/2/temp": _engine("kiln/2/temp", rng)}
    board, link = _board(engines)
    for name, eng in engines.items():
        board.changed(name, eng)
    board.clear("kiln/2/temp")  # due and not yet sent: no update of it goes out
    assert list(board.due) == ["kiln/1/temp"]
    assert link.sent == [(f"{PREFIX}/levels/kiln/2/temp", b"", False)]  # MQTT 3.1.1, 3.3.1.3
    board.send_due()
    board.clear("kiln/1/temp")
    assert "kiln/1/temp" not in board.sent and link.sent[-1] == (f"{PREFIX}/levels/kiln/1/temp", b"", False)
    assert len(board.in_flight) == 1  # the clearing messages do not count against the bound
    # Before the link exists (a reload before the start) nothing is handed over.
    link.made = False
    board.clear("kiln/3/temp")
    assert link.sent[-1][0] == f"{PREFIX}/levels/kiln/1/temp"


def test_a_stream_gone_meanwhile_or_let_go_is_skipped() -> None:
    rng = np.random.default_rng(8)
    engines = {"kiln/1/temp": _engine("kiln/1/temp", rng), "kiln/2/temp": _engine("kiln/2/temp", rng),
               "kiln/3/temp": _engine("kiln/3/temp", rng)}
    board, link = _board(engines)
    for name, eng in engines.items():
        board.changed(name, eng)
    del engines["kiln/1/temp"]  # removed by a reload after it was queued
    board.let_go("kiln/2/temp")  # another shard owns it now
    board.send_due()
    assert [b["stream"] for b in link.bodies()] == ["kiln/3/temp"] and not board.due
