"""The daemon's pool of calm streams (``Daemon.pool``, core/calm.py) end to end, in process.

A live round brings each stream a sample or two; a calm stream's samples wait in
the pool and reach its engine in one batch.  What must hold for the daemon:

- the same alert records, published in the same round, as a daemon without the
  pool (the line operator must learn of a step as early as before);
- every sample journaled in the round it came, so a crash loses none of those
  that wait; a snapshot carries the waiting ones (the journal restarts after
  them), and a start feeds them before the journal;
- waiting samples are counted (``shiftwatch_samples_waiting``), and fed when
  their time is up, when the daemon is idle, and before a reload or a stop.

The reference is the daemon without the pool (``Daemon(pool=False)``), itself held to
the engine and to outside references elsewhere (tests/core).
"""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Any

import numpy as np

from shiftwatch.config import load_config
from shiftwatch.core.timefmt import format_time
from shiftwatch.daemon import Daemon
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import Message

T0 = 1_790_000_000.0
WARM = 700


def _iso(t: float) -> str:
    return format_time(t)


def _config(tmp_path: Path, name: str) -> Path:
    path = tmp_path / f"{name}.yaml"
    path.write_text("streams:\n  - {topic: 'line/+/v', format: json, value: v, time: ts, unit: g}\n"
                    f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / name}'}}\n")
    return path


def _daemon(path: Path, *, pool: bool) -> Daemon:
    d = Daemon(load_config(str(path)), config_path=str(path), metrics=Metrics(), pool=pool)
    d.restore()
    return d


def _data(n: int, m: int, rng: np.random.Generator, *, steps: bool = True) -> np.ndarray:
    e = rng.standard_normal((n, m))
    x = e.copy()
    ar = np.arange(n) % 4 == 0  # one stream in four AR(1), phi 0.6
    for j in range(1, m):
        x[ar, j] = 0.6 * x[ar, j - 1] + 0.8 * e[ar, j]
    for s in range(0, n if steps else 0, 3):  # a step in one stream in three, 1.5 to 4 sigma
        at = int(rng.integers(WARM + 50, m - 50))
        x[s, at:] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(1.5, 4.0))
    return 250.0 + 0.5 * x


def _round(n: int, k: int, data: np.ndarray, t0: float = T0) -> list[Message]:
    # The last stream's sample of round WARM + 400 repeats the time of the one before.
    return [Message(f"line/s{i:03d}/v", json.dumps({"v": float(data[i, k]), "ts": t0 + k - (
        i == n - 1 and k == WARM + 400)}).encode(), t0 + k, 0, 0) for i in range(n)]


def _warm(d: Daemon, n: int, data: np.ndarray, t0: float = T0) -> None:
    d.process([Message(f"line/s{i:03d}/v", json.dumps([{"v": float(v), "ts": t0 + j}
                                                        for j, v in enumerate(data[i, :WARM])]).encode(),
                       t0 + WARM, 0, 0)
               for i in range(n)])


def _warmed(tmp_path: Path, name: str, n: int, data: np.ndarray, t0: float = T0) -> Daemon:
    """A pooled daemon whose n streams are past their warm-up."""
    d = _daemon(_config(tmp_path, name), pool=True)
    assert d.pool is not None
    _warm(d, n, data, t0)
    return d


def _records(d: Daemon) -> list[dict[str, Any]]:
    """The records published so far (in the outbox: nothing acknowledges them here), in
    the order of stream and time: within a round the two daemons feed streams in
    another order."""
    out = []
    for item in d.outbox.pending():
        body = json.loads(item.payload)
        body.pop("summary")  # says "today" by the wall clock
        out.append(body)
    return sorted(out, key=lambda r: (r["stream"], r["as_of"], r["phase"], r["id"]))


def test_pooled_daemon_publishes_the_same_records_in_the_same_rounds(tmp_path: Path) -> None:
    n, m = 60, WARM + 900
    data = _data(n, m, np.random.default_rng(11))
    plain = _daemon(_config(tmp_path, "plain"), pool=False)
    pooled = _daemon(_config(tmp_path, "pooled"), pool=True)
    assert plain.pool is None and pooled.pool is not None
    for d in (plain, pooled):
        _warm(d, n, data)
    waited = 0
    for k in range(WARM, m):
        msgs = _round(n, k, data)
        plain.process(msgs)
        pooled.process(msgs)
        # Same records, published in this same round.
        assert _records(pooled) == _records(plain), f"round {k}"
        waited = max(waited, pooled.pool.total_waiting())
    recs = _records(plain)
    assert sum(r["phase"] == "confirmed" for r in recs) >= n // 3 - 2
    assert waited > 10 * n  # the calm streams did wait
    # The bad sample was set aside the same way (it reached its engine at once).
    name = f"line/s{n - 1:03d}/v"
    pooled._pool_empty()
    assert pooled.engines[name].rejected_total == plain.engines[name].rejected_total
    assert pooled.engines[name].rejected_total["duplicate_time"] == 1
    for d in (plain, pooled):
        assert d.journal is not None
        d.journal.close()


def test_waiting_samples_are_journaled_and_carried_by_a_snapshot(tmp_path: Path) -> None:
    n, m = 20, WARM + 300
    data = _data(n, m, np.random.default_rng(12))
    path = _config(tmp_path, "a")
    first = _daemon(path, pool=True)
    assert first.pool is not None
    _warm(first, n, data)
    for k in range(WARM, WARM + 100):
        first.process(_round(n, k, data))
    assert first.pool.total_waiting() > 0
    assert first.snapshot()  # carries the waiting samples; the journal restarts after them
    waiting_at_snapshot = first.pool.total_waiting()
    for k in range(WARM + 100, WARM + 150):
        first.process(_round(n, k, data))  # journaled on top of the snapshot, then a crash
    assert first.journal is not None
    first.journal.close()
    taken = {name: e.samples_total + first.pool.waiting(name) for name, e in first.engines.items()}
    assert sum(taken.values()) == n * (WARM + 150)

    second = _daemon(path, pool=True)  # snapshot, its waiting samples, then the journal
    assert {name: e.samples_total for name, e in second.engines.items()} == taken
    assert waiting_at_snapshot > 0
    # Both carry on alike: the same records from here on.
    reference = _daemon(_config(tmp_path, "ref"), pool=False)
    _warm(reference, n, data)
    for k in range(WARM, WARM + 150):
        reference.process(_round(n, k, data))
    before_second, before_ref = len(_records(second)), len(_records(reference))
    for k in range(WARM + 150, m):
        second.process(_round(n, k, data))
        reference.process(_round(n, k, data))
        assert len(_records(second)) - before_second == len(_records(reference)) - before_ref, f"round {k}"
    new_second = [r for r in _records(second) if r["as_of"] > _iso(T0 + WARM + 149)]
    new_ref = [r for r in _records(reference) if r["as_of"] > _iso(T0 + WARM + 149)]
    assert new_second == new_ref and new_ref
    for d in (second, reference):
        assert d.journal is not None
        d.journal.close()


def test_a_damaged_waiting_field_costs_those_samples_only(tmp_path: Path) -> None:
    n = 5
    data = _data(n, WARM + 60, np.random.default_rng(13), steps=False)
    path = _config(tmp_path, "b")
    first = _daemon(path, pool=True)
    _warm(first, n, data)
    for k in range(WARM, WARM + 40):
        first.process(_round(n, k, data))
    assert first.snapshot()
    assert first.journal is not None
    first.journal.close()
    snap = first.store
    streams, meta = snap.load()
    names = sorted(meta["waiting"])
    assert names, "no stream had samples waiting"
    meta["waiting"][names[0]] = [[1.0, 2.0], [3.0]]  # columns of unequal length
    snap.save(streams, meta)
    second = _daemon(path, pool=True)
    assert second.metrics.states_set_aside._value.get() == 1
    for name in names[1:]:
        assert second.engines[name].samples_total == first.engines[name].samples_total + first.pool.waiting(name)
    assert second.engines[names[0]].samples_total == first.engines[names[0]].samples_total
    assert second.journal is not None
    second.journal.close()


def test_idle_rounds_and_a_reload_feed_the_waiting_samples(tmp_path: Path) -> None:
    n = 10
    data = _data(n, WARM + 60, np.random.default_rng(14), steps=False)
    d = _warmed(tmp_path, "c", n, data)
    assert d.pool is not None
    for k in range(WARM, WARM + 30):
        d.process(_round(n, k, data))
    assert d.pool.total_waiting() > 0
    for _ in range(200):  # nothing queued: idle rounds feed them, 20 ms of work each
        d.round(timeout=0.0)
        if not d.pool.total_waiting():
            break
    assert d.pool.total_waiting() == 0
    assert all(e.samples_total == WARM + 30 for e in d.engines.values())
    d._gauges()
    assert d.metrics.samples_waiting._value.get() == 0
    for k in range(WARM + 30, WARM + 50):
        d.process(_round(n, k, data))
    assert d.pool.total_waiting() > 0
    d.reload()  # the same file: every engine takes its samples first
    assert d.pool.total_waiting() == 0
    assert all(e.samples_total == WARM + 50 for e in d.engines.values())
    assert d.journal is not None
    d.journal.close()


def test_streams_with_two_samples_a_round_stay_pooled_and_give_the_same_records(tmp_path: Path) -> None:
    # A 2 Hz publisher with rounds of a second: each stream brings two samples a round.
    # They go through the pool a layer at a time (the review found them taken out and
    # fed every round, twice the cost of no pool), with the records of a plain daemon.
    n, m = 30, WARM + 600
    data = _data(n, m, np.random.default_rng(15))
    plain = _daemon(_config(tmp_path, "plain2"), pool=False)
    pooled = _daemon(_config(tmp_path, "pooled2"), pool=True)
    assert pooled.pool is not None
    for d in (plain, pooled):
        _warm(d, n, data)
    waited = 0
    for k in range(WARM, m, 2):
        msgs = _round(n, k, data) + _round(n, k + 1, data)
        plain.process(msgs)
        pooled.process(msgs)
        assert _records(pooled) == _records(plain), f"round {k}"
        waited = max(waited, pooled.pool.total_waiting())
    assert waited > 10 * n
    assert any(r["phase"] == "confirmed" for r in _records(plain))
    for d in (plain, pooled):
        assert d.journal is not None
        d.journal.close()


def test_a_hold_on_one_stream_leaves_the_others_pooled(tmp_path: Path) -> None:
    # One hold in the book used to send every pooled stream the per-stream way (the
    # review measured the pooled daemon 2 to 3 times slower than none while it stood).
    n = 10
    data = _data(n, WARM + 100, np.random.default_rng(160), steps=False)  # no false detection in the warm-up
    t0 = float(int(time.time())) - 2 * WARM  # commands take times within days of now
    d = _warmed(tmp_path, "h", n, data, t0)
    assert d.pool is not None
    held = "line/s000/v"
    hold = Message("shiftwatch/commands/hold", json.dumps(
        {"target": held, "start": _iso(t0 + WARM + 10), "end": _iso(t0 + WARM + 20), "note": "scale check",
         "by": "operator"}).encode(), t0 + WARM, 0, 0)
    d.process([hold])
    assert d.floor.holding()
    for k in range(WARM, WARM + 60):
        d.process(_round(n, k, data, t0))
    assert held not in d.pool  # the stream a hold names is fed round by round
    others = [f"line/s{i:03d}/v" for i in range(1, n)]
    assert all(name in d.pool for name in others) and d.pool.total_waiting() > 5 * (n - 1)
    # The hold kept its samples from the engine, and counted them.
    assert d.metrics.registry.get_sample_value("shiftwatch_samples_held_total", {"stream": held}) == 10
    d._pool_empty()
    assert all(d.engines[name].samples_total == WARM + 60 for name in others)
    assert d.engines[held].samples_total == WARM + 50
    assert d.journal is not None
    d.journal.close()


def test_a_pooled_stream_that_brings_a_batch_goes_the_per_stream_way(tmp_path: Path) -> None:
    # A pooled stream whose round brings a JSON array of hundreds of samples: its engine
    # takes them in one call, and the journal keeps them as one group.  Fed through the
    # pool a sample at a time they had made a journal entry per sample (the memory bench
    # ran the journal to its limit and the daemon to 261 MB).
    from shiftwatch.journal import Journal

    n = 5
    data = _data(n, WARM + 400, np.random.default_rng(17), steps=False)
    d = _warmed(tmp_path, "batch", n, data)
    assert d.pool is not None
    d.process(_round(n, WARM, data))  # one sample each: they wait in the pool
    assert all(f"line/s{i:03d}/v" in d.pool for i in range(n))
    assert d.snapshot()
    d.process([Message(f"line/s{i:03d}/v", json.dumps([{"v": float(v), "ts": T0 + WARM + 1 + j} for j, v in
                                                        enumerate(data[i, WARM + 1:WARM + 301])]).encode(),
                       T0 + WARM + 301, 0, 0) for i in range(n)])
    assert d.pool.total_waiting() == 0
    assert all(e.samples_total == WARM + 301 for e in d.engines.values())
    assert d.journal is not None
    d.journal.close()
    _, meta = d.store.load()
    (groups,) = Journal(tmp_path / "batch" / "snapshots").open(meta["journal"])
    assert sorted((g.stream, len(g.values)) for g in groups) == [(f"line/s{i:03d}/v", 300) for i in range(n)]


def test_level_updates_are_due_exactly_when_the_tuples_kept_before_said_so(tmp_path: Path) -> None:
    # What the levels topic shows of a watching stream is kept as its engine's Baseline
    # (a tuple per stream cost 64 bytes more).  Over streams that warm up, watch, open
    # events on steps and refine their baselines, an update must be due exactly when
    # the (state, level, sigma) tuple last sent differs from the stream's now, the rule
    # as it stood (a plain dict of those tuples beside the daemon is the reference).
    n, m = 30, WARM + 500
    data = _data(n, m, np.random.default_rng(12))
    d = _daemon(_config(tmp_path, "levels"), pool=False)
    sent: dict[str, tuple[Any, ...]] = {}
    states: set[str] = set()
    due_rounds = 0
    for k in range(0, m, 25):
        rows = [Message(f"line/s{i:03d}/v", json.dumps([{"v": float(v), "ts": T0 + k + j} for j, v in
                                                        enumerate(data[i, k:k + 25])]).encode(), T0 + k, 0, 0)
                for i in range(n)]
        d.process(rows)
        for name, eng in d.engines.items():
            if eng.level is None:
                continue
            now = (eng.state, eng.level, eng.sigma)
            states.add(eng.state)
            assert d.levels.shows(name, eng.state, eng) == (sent.get(name) == now), (k, name)
            if sent.get(name) != now:
                due_rounds += 1
                sent[name] = now
                d.levels.note_shown(name, eng.state, eng)
        d.levels.due.clear()  # no broker here: what LevelBoard.send_due would have sent is noted above
    assert {"watching", "event_open"} <= states
    assert due_rounds > 2 * n  # levels moved with refinements and steps
    assert d.journal is not None
    d.journal.close()


def test_a_daemon_keeping_its_state_on_disk_keeps_no_set_of_fed_streams(tmp_path: Path) -> None:
    # The set of streams fed since the last snapshot serves only the snapshots to the
    # NATS cluster (state.keep: cluster), which save just those streams.  A daemon with
    # its state on disk snapshots every stream, so it must not gather the set: it held
    # every stream's name for as long as the daemon ran (about 50 bytes a stream).
    n = 40
    data = _data(n, WARM + 10, np.random.default_rng(13), steps=False)
    d = _daemon(_config(tmp_path, "disk"), pool=False)
    assert not d.in_cluster
    _warm(d, n, data)
    assert len(d.engines) == n and all(e.samples_total == WARM for e in d.engines.values())
    assert d._fed_since_snapshot == set()
    assert d.journal is not None
    d.journal.close()
