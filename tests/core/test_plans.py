"""The pure logic of planned windows, holds and acknowledgements (core/plans.py) and the
engine's hook for planned steps.

References: topic-filter matching against the examples of the MQTT 3.1.1
specification (OASIS Standard, 2014), section 4.7.1 (the same text is in
MQTT 5.0, section 4.7.1); time stamps against the examples of RFC 3339,
section 5.8.  Simulated steps are checked against the size and time they
were made with.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.plans import (
    KEEP_AFTER,
    MAX_WINDOWS,
    CommandError,
    FloorBook,
    Window,
    _valid_filter,
    filter_matches,
    parse_command,
)

# ------------------------------------------------------------------ topic filters
# MQTT 3.1.1, section 4.7.1.2 (multi-level wildcard) and 4.7.1.3 (single-level wildcard).
MQTT_MATCHES = [
    ("sport/tennis/player1/#", "sport/tennis/player1", True),
    ("sport/tennis/player1/#", "sport/tennis/player1/ranking", True),
    ("sport/tennis/player1/#", "sport/tennis/player1/score/wimbledon", True),
    ("sport/#", "sport", True),
    ("sport/tennis/+", "sport/tennis/player1", True),
    ("sport/tennis/+", "sport/tennis/player2", True),
    ("sport/tennis/+", "sport/tennis/player1/ranking", False),
    ("sport/+", "sport", False),
    ("sport/+", "sport/", True),
    ("+/+", "/finance", True),
    ("/+", "/finance", True),
    ("+", "/finance", False),
]


@pytest.mark.parametrize(("pattern", "name", "want"), MQTT_MATCHES)
def test_filters_match_as_the_mqtt_specification_says(pattern: str, name: str, want: bool) -> None:
    assert filter_matches(pattern, name) is want


@pytest.mark.parametrize("bad", ["sport/tennis#", "sport/tennis/#/ranking", "sport+", ""])
def test_filters_the_mqtt_specification_calls_invalid_are_refused(bad: str) -> None:
    # MQTT 3.1.1, 4.7.1.2: "sport/tennis#" and "sport/tennis/#/ranking" are not valid;
    # 4.7.1.3: "sport+" is not valid.  An empty filter is refused too (4.7.3).
    assert _valid_filter(bad) is not None
    with pytest.raises(CommandError) as e:
        parse_command("hold", {"target": bad}, 1e9)
    assert e.value.reason == "bad_field"


# ------------------------------------------------------------------ commands
def test_times_in_rfc3339_form_are_read_as_the_rfc_says() -> None:
    # RFC 3339, section 5.8: 1985-04-12T23:20:50.52Z and 1996-12-19T16:39:57-08:00
    # (the latter is 1996-12-20T00:39:57Z, epoch 851042397).
    c = parse_command("plan", {"target": "a/#", "start": "1985-04-12T23:20:50.52Z", "for": "1h"}, 482196050.0)
    assert c.start == pytest.approx(482196050.52)
    assert c.end == pytest.approx(482196050.52 + 3600)
    c = parse_command("hold", {"target": "a/#", "start": "1996-12-19T16:39:57-08:00"}, 851042397.0)
    assert c.start == 851042397.0 and c.end is None


def test_relative_times_count_from_the_commands_arrival() -> None:
    now = 1_800_000_000.0
    c = parse_command("plan", {"target": "a/+", "start": "-5min", "end": "+20min"}, now)
    assert (c.start, c.end) == (now - 300, now + 1200)
    c = parse_command("hold", {"target": "a/+", "start": "now", "for": "1.5h"}, now)
    assert (c.start, c.end) == (now, now + 5400)


@pytest.mark.parametrize(("verb", "body", "reason", "words"), [
    ("plan", {"target": "a/#", "for": "20"}, "bad_time", "has no unit"),
    ("plan", {"target": "a/#", "for": "20min", "end": "+1h"}, "bad_field", "not both"),
    ("plan", {"target": "a/#", "end": "-1min"}, "bad_time", "not after the start"),
    ("plan", {"target": "a/#", "start": "+8d", "for": "1h"}, "bad_time", "days from now"),
    ("plan", {"target": "a/#", "for": "40d"}, "bad_time", "longer than"),
    ("plan", {"target": "a/#", "start": "yesterday", "for": "1h"}, "bad_time", "start"),
    ("hold", {"target": "a/#", "note": "x" * 201}, "bad_field", "longer than 200"),
    ("hold", {"target": "a/#", "note": "line\nbreak"}, "bad_field", "control character"),
    ("hold", {"target": 5}, "bad_field", "topic filter as text"),
    ("hold", {"target": "a/#", "ref": "has space"}, "bad_field", "ref"),
    ("end", {"id": "abc", "target": "a/#"}, "bad_field", "exactly one"),
    ("end", {}, "bad_field", "exactly one"),
    ("ack", {"event": "not-hex"}, "bad_field", "event"),
    ("ack", {"event": "abc", "start": "now"}, "unknown_field", "'start'"),
    ("stop", {}, "unknown_command", "plan, hold, end, ack"),
])
def test_a_bad_command_is_refused_whole_with_its_reason(verb: str, body: dict, reason: str, words: str) -> None:
    with pytest.raises(CommandError) as e:
        parse_command(verb, json.dumps(body).encode(), 1_800_000_000.0)
    assert e.value.reason == reason
    assert words in str(e.value)


@pytest.mark.parametrize(("payload", "reason"), [
    (b"\xff\xfe", "not_json"), (b"{", "not_json"), (b"[]", "not_an_object"), (b"3", "not_an_object"),
    (b"{" + b" " * 5000 + b"}", "too_large"),
])
def test_payloads_that_are_not_a_json_object_are_refused(payload: bytes, reason: str) -> None:
    with pytest.raises(CommandError) as e:
        parse_command("hold", payload, 0.0)
    assert e.value.reason == reason


# ------------------------------------------------------------------ the book
NOW = 1_800_000_000.0


def book_with(*cmds: tuple[str, dict]) -> tuple[FloorBook, list[dict]]:
    book = FloorBook()
    replies = [book.apply(parse_command(v, b, NOW), NOW, ["l2/h1/fill", "l2/h2/fill", "l3/h1/fill"]).reply
               for v, b in cmds]
    return book, replies


def test_a_window_covers_its_start_but_not_its_end() -> None:
    w = Window("ab", "hold", "#", 100.0, 200.0)
    assert w.covers(100.0) and w.covers(199.999) and not w.covers(200.0) and not w.covers(99.9)
    assert Window("ab", "hold", "#", 100.0, None).covers(1e12)
    assert w.meets(90.0, 100.0) and w.meets(150.0, 250.0) and not w.meets(201.0, 300.0)


def test_holds_mask_exactly_the_samples_of_their_streams_inside_them() -> None:
    book, replies = book_with(("hold", {"target": "l2/+/fill", "start": "+10s", "end": "+20s"}))
    assert replies[0]["streams_now"] == 2
    t = NOW + np.arange(30.0)
    m = book.held_mask("l2/h1/fill", t)
    assert m is not None and np.flatnonzero(m).tolist() == list(range(10, 20))
    assert book.held_mask("l3/h1/fill", t) is None


def test_ending_a_window_by_command_cuts_it_at_the_commands_time_or_withdraws_it() -> None:
    book, replies = book_with(("hold", {"target": "l2/#", "start": "-1min"}),
                              ("plan", {"target": "l2/#", "start": "+1h", "for": "10min"}))
    hold_id, plan_id = replies[0]["window"]["id"], replies[1]["window"]["id"]
    later = NOW + 30
    r = book.apply(parse_command("end", {"id": hold_id}, later), later).reply
    assert r["ended"][0]["end"] is not None and book.windows[hold_id].end == later
    r = book.apply(parse_command("end", {"target": "l2/#"}, later), later).reply
    # the hold again (cut at the same time) and the plan, not begun: withdrawn
    assert {e["id"]: e.get("withdrawn", False) for e in r["ended"]} == {hold_id: False, plan_id: True}
    assert plan_id not in book.windows
    with pytest.raises(CommandError) as e:
        book.apply(parse_command("end", {"id": plan_id}, later), later)
    assert e.value.reason == "unknown_window"


def test_windows_long_over_are_forgotten_and_the_count_is_bounded() -> None:
    book, _ = book_with(("plan", {"target": "a/#", "start": "-2h", "for": "1h"}))
    assert book.prune(NOW) == [] and len(book.windows) == 1
    assert len(book.prune(NOW + KEEP_AFTER)) == 1 and not book.windows
    for i in range(MAX_WINDOWS):
        book.apply(parse_command("hold", {"target": f"a/{i}"}, NOW), NOW)
    before = dict(book.windows)
    with pytest.raises(CommandError) as e:
        book.apply(parse_command("hold", {"target": "a/x"}, NOW), NOW)
    assert e.value.reason == "too_many_windows" and book.windows == before


def test_acknowledgements_count_open_lasting_steps_only() -> None:
    book = FloorBook()
    book.note_record("s", "detected", "e1", 10.0, 1.0, "g")
    assert book.unacknowledged("s") == 0  # detected: not yet a lasting step
    book.note_record("s", "confirmed", "e1", 10.0, 1.1, "g")
    book.note_record("s", "detected", "e2", 20.0, -1.0, "g")
    book.note_record("s", "dismissed", "e2", 20.0, -1.0, "g")
    assert book.unacknowledged("s") == 1 and list(book.events["s"]) == ["e1"]
    out = book.apply(parse_command("ack", {"event": "e1", "note": "seen", "by": "op"}, NOW), NOW)
    assert out.ack is not None and out.ack[0] == "s" and out.ack[1].note == "seen"
    assert book.unacknowledged("s") == 0
    with pytest.raises(CommandError) as e:
        book.apply(parse_command("ack", {"event": "e1"}, NOW), NOW)
    assert e.value.reason == "already_acknowledged"
    book.note_record("s", "planned", "e3", 30.0, 1.0, "g")  # planned steps ask nobody to look
    assert "e3" not in book.events["s"]


def test_the_book_survives_its_saved_state_and_refuses_a_damaged_one() -> None:
    book, _ = book_with(("hold", {"target": "l2/#", "note": "CIP", "by": "op"}),
                        ("plan", {"target": "l3/+/fill", "for": "20min"}))
    book.note_record("l2/h1/fill", "confirmed", "e1", 10.0, 1.0, "g")
    state = json.loads(json.dumps(book.get_state()))
    again = FloorBook.from_state(state)
    assert again.windows == book.windows and again.revision == book.revision
    assert again.unacknowledged("l2/h1/fill") == 1
    state["windows"][1]["end"] = None  # a planned window without an end
    with pytest.raises(ValueError, match=r"floor.windows\[1\]"):
        FloorBook.from_state(state)
    with pytest.raises(ValueError, match="floor.revision"):
        FloorBook.from_state({})


def test_the_view_says_what_is_in_force_at_the_streams_newest_sample() -> None:
    book, replies = book_with(("hold", {"target": "l2/#", "start": "+1min", "for": "5min"}),
                              ("plan", {"target": "l2/h1/fill", "start": "+10min", "for": "5min"}))
    v = book.view("l2/h1/fill", NOW)
    assert v.hold is None and len(v.plans) == 1 and v.unacknowledged == 0
    v = book.view("l2/h1/fill", NOW + 120)
    assert v.hold is not None and v.hold.id == replies[0]["window"]["id"]
    assert book.view("l2/h1/fill", NOW + 3600).plans == ()
    assert book.view("l2/h1/fill", NOW + 120).to_dict()["held"] is True


# ------------------------------------------------------------------ the engine's hook
T0 = 1_800_000_000.0


def line(seed: int, n: int, steps: dict[int, float]) -> tuple[np.ndarray, np.ndarray]:
    t = T0 + np.arange(float(n))
    x = 500.0 + 0.4 * np.random.default_rng(seed).standard_normal(n)
    for at, size in steps.items():
        x[at:] += size
    return t, x


def planned_engine(start: float, end: float) -> StreamEngine:
    book = FloorBook()
    book.apply(parse_command("plan", {"target": "l2/+", "start": "now", "end": f"+{end - start}s"}, start), start)
    eng = StreamEngine("l2/h1")
    eng.planned = book.plan_lookup("l2/h1")
    return eng


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_step_inside_a_planned_window_is_one_planned_record_at_its_size_and_time(seed: int) -> None:
    t, x = line(seed, 2000, {800: 1.2, 1500: -1.2})  # 3 sigma each, the first one planned
    eng = planned_engine(T0 + 790, T0 + 820)
    recs = eng.process(t, x).records
    assert [r.phase for r in recs] == ["planned", "detected", "confirmed"]
    p = recs[0]
    assert abs(p.shift_at - t[800]) <= 3 and abs(p.delta - 1.2) < 0.5 and p.plan_id is not None
    assert abs(recs[2].shift_at - t[1500]) <= 3  # no blind spot after the planned step
    # Without the window the same step alarms: detected, then confirmed at the same place.
    plain = StreamEngine("l2/h1").process(t, x).records
    assert [r.phase for r in plain[:2]] == ["detected", "confirmed"]
    assert abs(plain[1].shift_at - t[800]) <= 3


def test_planned_steps_do_not_depend_on_batching() -> None:
    # Design rule of the engine (DEVELOPERS.md, "Batch independence").
    t, x = line(4, 1600, {700: 1.0})
    whole = planned_engine(T0 + 690, T0 + 720).process(t, x).records
    eng = planned_engine(T0 + 690, T0 + 720)
    cut = []
    rng = np.random.default_rng(9)
    i = 0
    while i < len(t):
        k = int(rng.integers(1, 40))
        cut += eng.process(t[i:i + k], x[i:i + k]).records
        i += k
    assert [r.to_dict() for r in cut] == [r.to_dict() for r in whole]
    assert whole and whole[0].phase == "planned"


def test_an_event_open_when_its_plan_arrives_ends_planned_and_the_level_moves_on() -> None:
    t, x = line(3, 1200, {500: 0.6})  # 1.5 sigma: detected, not confirmed at once
    eng = StreamEngine("l2/h1")
    got = []
    i = 0
    while not got and i < len(t):
        got = eng.process(t[i:i + 1], x[i:i + 1]).records
        i += 1
    assert [r.phase for r in got] == ["detected"] and eng.state == "event_open"
    book = FloorBook()
    book.apply(parse_command("plan", {"target": "l2/#", "start": "-20s", "for": "1min"}, t[i - 1]), t[i - 1])
    eng.planned = book.plan_lookup("l2/h1")
    rec = eng.adopt_planned_event(t[i - 1])
    assert rec is not None and rec.phase == "planned" and rec.id == got[0].id
    assert eng.state == "watching"
    assert eng.records_total["planned"] == 1
    rest = eng.process(t[i:], x[i:]).records
    assert [r.phase for r in rest] == []  # the new level is the reference: nothing to report


def test_a_plan_that_does_not_cover_the_step_changes_nothing() -> None:
    t, x = line(5, 1500, {800: 1.2})
    eng = planned_engine(T0 + 1000, T0 + 1100)
    recs = eng.process(t, x).records
    ref = StreamEngine("l2/h1").process(t, x).records
    assert [r.to_dict() for r in recs] == [r.to_dict() for r in ref]
    assert [r.phase for r in recs] == ["detected", "confirmed"]


# ------------------------------------------------------------------ fuzzing

_JSON = st.recursive(st.none() | st.booleans() | st.floats(allow_nan=True) | st.integers() | st.text(max_size=30),
                     lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
                     max_leaves=12)
_FIELDS = st.dictionaries(
    st.sampled_from(["target", "start", "end", "for", "note", "by", "ref", "id", "event", "x"]),
    st.one_of(_JSON, st.sampled_from(["now", "-5min", "+1h", "20min", "2026-03-02T06:00:00Z", "a/#", "+/x",
                                      "abc123", "1e999", "-0s", "+1e400min"])),
    max_size=6)


@settings(max_examples=600, deadline=None)
@given(verb=st.sampled_from(["plan", "hold", "end", "ack", "zap"]),
       payload=st.one_of(st.binary(max_size=80), _FIELDS.map(lambda d: json.dumps(d).encode()),
                         _JSON.map(lambda d: json.dumps(d).encode())))
def test_any_payload_gives_a_command_or_a_reasoned_refusal_and_never_half_a_change(verb: str,
                                                                                   payload: bytes) -> None:
    # The project's rule for bad input: a clear error naming what was wrong, nothing crashes.
    book = FloorBook()
    before = json.dumps(book.get_state())
    try:
        cmd = parse_command(verb, payload, NOW)
    except CommandError as exc:
        assert exc.reason and str(exc)
        return
    try:
        book.apply(cmd, NOW, ["a/b"])
    except CommandError as exc:
        assert exc.reason and json.dumps(book.get_state()) == before  # refused: nothing changed
