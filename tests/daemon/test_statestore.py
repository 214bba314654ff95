"""The state snapshot store, on a real filesystem."""

from __future__ import annotations

import gzip
import json
import logging
import math
import os
import signal
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.statestore import SCHEMA_VERSION, SNAPSHOT_NAME, StateStore

DAEMON_ROOT = Path(__file__).resolve().parents[2] / "daemon"


def engines(n: int = 3) -> dict[str, StreamEngine]:
    """Real engines in different states: warming up, watching, after a confirmed shift."""
    rng = np.random.default_rng(5)
    out = {}
    for i, length in enumerate((50, 700, 1000)[:n]):
        t = 1764633600.0 + np.arange(float(length))
        x = 500.0 + 0.4 * rng.standard_normal(length)
        if length == 1000:
            x[600:] += 0.4
        eng = StreamEngine(f"line{i}/fill_g")
        eng.process(t, x)
        out[eng.stream] = eng
    return out


def aside_files(d: Path) -> list[str]:
    return sorted(p.name for p in d.iterdir() if p.name != SNAPSHOT_NAME)


def test_round_trip_of_real_engine_states(tmp_path: Path) -> None:
    engs = engines()
    assert {e.state for e in engs.values()} >= {"warming_up", "watching"}
    states = {name: e.get_state() for name, e in engs.items()}
    store = StateStore(tmp_path / "state")  # created on first save
    store.save(states, {"saved_at": 1764634600.25, "version": "0.1.0"})
    streams, meta = StateStore(tmp_path / "state").load()
    assert meta == {"saved_at": 1764634600.25, "version": "0.1.0"}
    assert streams == states
    assert list(streams) == list(states)
    for name, st in streams.items():
        restored = StreamEngine(name)
        restored.set_state(st)
        assert restored.get_state() == engs[name].get_state()


def test_floats_survive_bit_for_bit_and_markers_are_escaped(tmp_path: Path) -> None:
    odd = [0.1, -0.0, math.inf, -math.inf, 5e-324, 1.7976931348623157e308, 1 / 3, 2.0**-1074,
           123456789.123456789]
    state: dict[str, Any] = {
        "window": odd * 3,
        "short": [1.5, 2.5],
        "mixed": [1.0, 2, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0],  # an int inside: stays JSON
        "ints": list(range(20)),
        "nested": {"deep": [[float(i) for i in range(10)], {"x": [0.5] * 9}]},
        "looks_packed": {"$f64": "not base64 at all"},
        "looks_escaped": {"$dict": {"$f64": 1}},
        "empty": [], "none": None, "flag": True, "text": "fill weight / 温度",
    }
    store = StateStore(tmp_path)
    store.save({"s": state, "ünï\n\"quoted\"": {}}, {})
    streams, _ = store.load()
    got = streams["s"]
    assert got == state
    assert [x.hex() for x in got["window"]] == [x.hex() for x in state["window"]]
    assert math.copysign(1.0, got["window"][1]) == -1.0
    assert type(got["mixed"][1]) is int
    assert streams["ünï\n\"quoted\""] == {}
    nan_state = {"v": [math.nan] * 10, "r": math.nan}
    store.save({"n": nan_state}, {})
    got = store.load()[0]["n"]
    assert all(math.isnan(v) for v in got["v"]) and math.isnan(got["r"])


def test_numpy_float_arrays_are_saved_as_lists(tmp_path: Path) -> None:
    store = StateStore(tmp_path)
    arr = np.linspace(0.0, 1.0, 11)
    store.save({"s": {"values": arr, "one": np.float64(2.5)}}, {})
    assert store.load()[0] == {"s": {"values": arr.tolist(), "one": 2.5}}


def test_no_snapshot_loads_empty(tmp_path: Path) -> None:
    assert StateStore(tmp_path).load() == ({}, {})
    assert StateStore(tmp_path / "missing").load() == ({}, {})


def test_file_is_gzip_json_lines_with_header_and_end(tmp_path: Path) -> None:
    store = StateStore(tmp_path)
    store.save({"a": {"v": [1.0] * 10}, "b": {"v": [2]}}, {"k": 1})
    lines = gzip.decompress((tmp_path / SNAPSHOT_NAME).read_bytes()).splitlines()
    header = json.loads(lines[0])
    assert header == {"format": "shiftwatch-state", "schema_version": SCHEMA_VERSION,
                      "streams": 2, "meta": {"k": 1}}
    assert json.loads(lines[1])[0] == "a" and "$f64" in json.loads(lines[1])[1]["v"]
    assert json.loads(lines[2]) == ["b", {"v": [2]}]
    assert json.loads(lines[-1]) == {"end": 2}


def bad_snapshot_case(tmp_path: Path, content: bytes, caplog: pytest.LogCaptureFixture,
                      expect_aside: str) -> None:
    caplog.clear()
    store = StateStore(tmp_path)
    (tmp_path / SNAPSHOT_NAME).write_bytes(content)
    with caplog.at_level(logging.INFO, logger="shiftwatch.statestore"):
        assert store.load() == ({}, {})
    assert aside_files(tmp_path) == [expect_aside]
    assert (tmp_path / expect_aside).read_bytes() == content
    assert len([r for r in caplog.records if r.name == "shiftwatch.statestore"]) == 1
    assert expect_aside in caplog.records[-1].getMessage()
    assert "\n" not in caplog.records[-1].getMessage()
    # The next load finds nothing, and saving works again.
    assert store.load() == ({}, {})
    store.save({"x": {}}, {"n": 1})
    assert store.load() == ({"x": {}}, {"n": 1})


def good_bytes(tmp_path: Path) -> bytes:
    d = tmp_path / "good"
    StateStore(d).save({name: e.get_state() for name, e in engines().items()}, {"g": 1})
    data = (d / SNAPSHOT_NAME).read_bytes()
    for p in d.iterdir():
        p.unlink()
    d.rmdir()
    return data


def test_truncated_file_is_moved_aside(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    data = good_bytes(tmp_path)
    bad_snapshot_case(tmp_path, data[: len(data) // 2], caplog, f"{SNAPSHOT_NAME}.corrupt-1")


def test_missing_gzip_trailer_is_moved_aside(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    data = good_bytes(tmp_path)
    bad_snapshot_case(tmp_path, data[:-4], caplog, f"{SNAPSHOT_NAME}.corrupt-1")


def test_complete_gzip_of_incomplete_content(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    lines = gzip.decompress(good_bytes(tmp_path)).splitlines(keepends=True)
    cut = gzip.compress(b"".join(lines[:-2]))  # gzip is valid; the last stream and the end are gone
    bad_snapshot_case(tmp_path, cut, caplog, f"{SNAPSHOT_NAME}.corrupt-1")
    extra = gzip.compress(b"".join(lines) + lines[1])  # something after the end marker
    (tmp_path / f"{SNAPSHOT_NAME}.corrupt-1").unlink()
    (tmp_path / SNAPSHOT_NAME).unlink()
    bad_snapshot_case(tmp_path, extra, caplog, f"{SNAPSHOT_NAME}.corrupt-1")


def test_garbage_bytes_are_moved_aside(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    garbage = np.random.default_rng(3).bytes(5000)
    bad_snapshot_case(tmp_path, garbage, caplog, f"{SNAPSHOT_NAME}.corrupt-1")


@pytest.mark.parametrize("content", [
    b"", b"\n", b"[1, 2]\n", b'{"format": "other"}\n',
    b'{"format": "shiftwatch-state", "schema_version": 1, "streams": 1, "meta": {}}\n[1, 2]\n{"end": 1}\n',
    (b'{"format": "shiftwatch-state", "schema_version": 1, "streams": 1, "meta": {}}\n'
     b'["s", {"v": {"$f64": "!!!"}}]\n{"end": 1}\n'),
    (b'{"format": "shiftwatch-state", "schema_version": 1, "streams": 1, "meta": {}}\n'
     b'["s", {"v": {"$f64": "AAAA"}}]\n{"end": 1}\n'),  # 3 bytes: not whole floats
    b'{"format": "shiftwatch-state", "schema_version": 1, "streams": 0, "meta": {}}\n{"end": 5}\n',
    b'{"format": "shiftwatch-state", "schema_version": 1, "streams": -1, "meta": {}}\n',
    b'\xff\xfe{}\n',
])
def test_malformed_content_is_moved_aside(tmp_path: Path, caplog: pytest.LogCaptureFixture,
                                          content: bytes) -> None:
    bad_snapshot_case(tmp_path, gzip.compress(content), caplog, f"{SNAPSHOT_NAME}.corrupt-1")


def test_unknown_schema_is_moved_aside(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    future = (json.dumps({"format": "shiftwatch-state", "schema_version": SCHEMA_VERSION + 1,
                          "streams": 0, "meta": {}}) + "\n" + '{"end": 0}\n').encode()
    bad_snapshot_case(tmp_path, gzip.compress(future), caplog, f"{SNAPSHOT_NAME}.unknown-1")
    assert "schema" in caplog.records[-1].getMessage()


def test_set_aside_names_do_not_overwrite(tmp_path: Path) -> None:
    store = StateStore(tmp_path)
    for i in range(3):
        (tmp_path / SNAPSHOT_NAME).write_bytes(b"junk %d" % i)
        assert store.load() == ({}, {})
    assert aside_files(tmp_path) == [f"{SNAPSHOT_NAME}.corrupt-{i}" for i in (1, 2, 3)]
    assert (tmp_path / f"{SNAPSHOT_NAME}.corrupt-3").read_bytes() == b"junk 2"


def test_leftover_temp_file_is_ignored_and_removed(tmp_path: Path,
                                                   caplog: pytest.LogCaptureFixture) -> None:
    store = StateStore(tmp_path)
    store.save({"old": {"v": [1.0] * 9}}, {"g": 1})
    leftover = tmp_path / f".{SNAPSHOT_NAME}.abc123.tmp"
    leftover.write_bytes(gzip.compress(b'{"format": "shiftwatch-state"'))  # a half-written save
    unrelated = tmp_path / "outbox-item.tmp"
    unrelated.write_bytes(b"not ours")
    with caplog.at_level(logging.INFO, logger="shiftwatch.statestore"):
        assert store.load() == ({"old": {"v": [1.0] * 9}}, {"g": 1})
    assert not leftover.exists()
    assert unrelated.exists()
    assert any(leftover.name in r.getMessage() for r in caplog.records)


def test_save_failure_raises_oserror_and_keeps_nothing_half_done(tmp_path: Path) -> None:
    # Tests run as root, which ignores permissions; a directory path that is a
    # file fails for everyone.
    blocker = tmp_path / "blocker"
    blocker.write_text("a file, not a directory")
    for d in (blocker, blocker / "sub"):
        with pytest.raises(OSError):
            StateStore(d).save({"s": {}}, {})
    assert blocker.read_text() == "a file, not a directory"


def test_save_failure_leaves_previous_snapshot(tmp_path: Path) -> None:
    store = StateStore(tmp_path)
    store.save({"s": {"v": [1.0] * 8}}, {"g": 1})
    with pytest.raises(TypeError):
        store.save({"s": {"v": object()}}, {"g": 2})
    assert store.load() == ({"s": {"v": [1.0] * 8}}, {"g": 1})
    assert aside_files(tmp_path) == []  # the failed save removed its temporary file


CHILD = r"""
import os
import sys
import time
import numpy as np
from shiftwatch import statestore
from shiftwatch.statestore import StateStore

def make(parity):
    rng = np.random.default_rng(parity)
    return {f"s{i}": {"state": "watching", "times": (1.7e9 + np.arange(2000.0)).tolist(),
                      "values": rng.standard_normal(2000).tolist(), "n": i}
            for i in range(40)}

# Where to stop and wait for the kill in the save after the first one:
# "anywhere" (no stop; the parent kills at an arbitrary moment), "mid-write"
# (half the snapshot written), "before-rename" (file complete and synced).
stop = sys.argv[2]
saves = 0

def wait_for_kill():
    if saves >= 1:
        print("stopped", flush=True)
        time.sleep(60)

if stop == "mid-write":
    real_lines = statestore._lines
    def lines(streams, meta):
        for k, line in enumerate(real_lines(streams, meta)):
            if k == 20:
                wait_for_kill()
            yield line
    statestore._lines = lines
elif stop == "before-rename":
    real_replace = os.replace
    def replace(src, dst):
        wait_for_kill()
        real_replace(src, dst)
    os.replace = replace

data = [make(0), make(1)]
store = StateStore(sys.argv[1])
g = 0
while True:
    g += 1
    store.save(data[g % 2], {"generation": g})
    saves += 1
    print(g, flush=True)
"""


def make_expected(parity: int) -> dict[str, Any]:
    rng = np.random.default_rng(parity)
    return {f"s{i}": {"state": "watching", "times": (1.7e9 + np.arange(2000.0)).tolist(),
                      "values": rng.standard_normal(2000).tolist(), "n": i}
            for i in range(40)}


def kill_saver(directory: Path, stop: str, lines: int) -> int:
    """Run a process that saves snapshots in a loop, SIGKILL it, return the last generation it reported."""
    env = dict(os.environ, PYTHONPATH=str(DAEMON_ROOT))
    proc = subprocess.Popen([sys.executable, "-c", CHILD, str(directory), stop],
                            stdout=subprocess.PIPE, text=True, env=env)
    assert proc.stdout is not None
    try:
        done = [int(proc.stdout.readline()) for _ in range(lines)]
        if stop != "anywhere":
            assert proc.stdout.readline() == "stopped\n"
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        proc.stdout.close()
    return done[-1]


@pytest.mark.parametrize("stop", ["mid-write", "before-rename"])
def test_killed_inside_save_leaves_previous_snapshot(tmp_path: Path, stop: str) -> None:
    # The saver is held inside its second save (half written, or written and
    # synced but not yet renamed) and killed there.
    expected = [make_expected(0), make_expected(1)]
    last = kill_saver(tmp_path, stop, 1)
    assert last == 1
    assert [p.name for p in tmp_path.iterdir() if p.name.endswith(".tmp")] != []
    streams, meta = StateStore(tmp_path).load()
    assert meta["generation"] == 1
    assert streams == expected[1]
    assert [p.name for p in tmp_path.iterdir()] == [SNAPSHOT_NAME]  # the leftover was removed
    assert aside_files(tmp_path) == []  # nothing set aside as corrupt


def test_killed_anywhere_leaves_old_or_new_complete_snapshot(tmp_path: Path) -> None:
    # Kill the saving process at arbitrary moments (mostly inside a save, since it
    # saves in a loop); every time the store holds one whole snapshot, at least
    # as new as the last one reported done.
    expected = [make_expected(0), make_expected(1)]
    for trial in range(12):
        last = kill_saver(tmp_path, "anywhere", 1 + trial % 3)
        streams, meta = StateStore(tmp_path).load()
        g = meta["generation"]
        assert g >= last
        assert streams == expected[g % 2]
        assert aside_files(tmp_path) == []  # leftovers removed, nothing set aside as corrupt


def test_encode_skips_plain_values_without_changing_anything() -> None:
    """_encode hands numbers, text, booleans and None back untouched without a call per
    value; held to the recursion that calls itself on every value, on engine states and
    on random nested data (numpy scalars, tuples, marker-like dicts, long and short lists)."""
    import base64
    import random

    import numpy as np

    from shiftwatch.core.engine import StreamEngine
    from shiftwatch.statestore import _encode, _is_float_list

    def reference(o: object) -> object:
        if isinstance(o, dict):
            d = {k: reference(v) for k, v in o.items()}
            if len(d) == 1 and ("$f64" in d or "$dict" in d):
                return {"$dict": d}
            return d
        if isinstance(o, (list, tuple)):
            if _is_float_list(o):
                return {"$f64": base64.b64encode(np.array(o, dtype="<f8").tobytes()).decode("ascii")}
            return [reference(x) for x in o]
        if isinstance(o, np.ndarray) and o.ndim == 1 and o.dtype.kind == "f":
            return {"$f64": base64.b64encode(o.astype("<f8").tobytes()).decode("ascii")}
        return o

    rng = random.Random(3)

    def leaf() -> object:
        return rng.choice([1.5, 7, True, None, "x", np.float64(2.5), np.int64(3), float("nan")])

    def tree(depth: int) -> object:
        r = rng.random()
        if depth > 3 or r < 0.3:
            return leaf()
        if r < 0.5:
            return {rng.choice(["a", "$f64", "$dict", "b"]): tree(depth + 1) for _ in range(rng.randrange(3))}
        if r < 0.7:
            return [rng.random() for _ in range(rng.choice([3, 8, 20]))]
        if r < 0.8:
            return np.arange(float(rng.randrange(1, 12)))
        seq = [tree(depth + 1) for _ in range(rng.randrange(12))]
        return tuple(seq) if rng.random() < 0.3 else seq

    for _ in range(500):
        o = tree(0)
        assert repr(_encode(o)) == repr(reference(o))
    eng = StreamEngine("line/v")
    eng.process(1.788e9 + np.arange(3000.0), 100 + np.random.default_rng(1).standard_normal(3000))
    state = dict(eng.get_state())
    assert repr(_encode(state)) == repr(reference(state))


def test_daemon_snapshot_of_engines_as_arrays_is_the_same_file(tmp_path: Path) -> None:
    """The daemon hands the store each engine's samples as float64 arrays
    (``get_state(arrays=True)``, see localstate._EngineStates); the file must be the one the
    lists of floats give, byte for byte (the gzip stream is written with mtime 0), for
    engines in every state: a window shorter than the store packs, warming up, watching,
    an event open, after a confirmed shift."""
    from shiftwatch.localstate import _EngineStates

    engs = engines()
    rng = np.random.default_rng(11)
    short = StreamEngine("line/short")
    short.process(1764633600.0 + np.arange(3.0), [1.0, 2.0, 1.5])
    engs[short.stream] = short
    opened = StreamEngine("line/open")
    t = 1764633600.0 + np.arange(1315.0)
    x = 500.0 + 0.4 * rng.standard_normal(1315)
    x[1300:] += 0.6  # a step of 1.5 sigma: tripped on its 15th sample, not decided yet
    opened.process(t, x)
    engs[opened.stream] = opened
    assert {e.state for e in engs.values()} >= {"warming_up", "watching", "event_open"}
    assert any(len(s["times"]) < 8 for s in (e.get_state() for e in engs.values()))
    meta = {"saved_at": 1764634600.25}
    StateStore(tmp_path / "lists").save({n: e.get_state() for n, e in engs.items()}, meta)
    StateStore(tmp_path / "arrays").save(_EngineStates(engs), meta)
    a = (tmp_path / "lists" / SNAPSHOT_NAME).read_bytes()
    b = (tmp_path / "arrays" / SNAPSHOT_NAME).read_bytes()
    assert gzip.decompress(a) == gzip.decompress(b)
    assert a == b
    # and the arrays are what the lists hold
    for name, eng in engs.items():
        listed, arrayed = eng.get_state(), eng.get_state(arrays=True)
        for key, v in arrayed.items():
            if isinstance(v, np.ndarray):
                assert v.dtype == np.float64 and v.tolist() == listed[key], (name, key)
            else:
                assert v == listed[key], (name, key)
