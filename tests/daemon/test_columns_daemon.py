"""Batched payloads through ``Daemon.process`` as columns, in process.

A clean JSON array or a plain SenML pack is decoded as float64 columns (see
tests/daemon/test_decode.py, which holds them to the usual decoding) and stays a
column up to the engine.  What must hold for the daemon: a round that mixes
arrays and single samples for one stream, two arrays for one stream, or a SenML
pack whose two names give one stream, feeds each engine exactly the samples, in
the order, that the same messages fed one per round do.  The reference is the
daemon fed one message per round; the engine's records and state do not depend on
how its samples are batched (tests/core/test_small_batches.py and the engine's own
tests hold that to outside references).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from shiftwatch.config import load_config
from shiftwatch.daemon import Daemon
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import Message

T0 = 1_790_000_000.0


def _daemon(tmp_path: Path, name: str) -> Daemon:
    path = tmp_path / f"{name}.yaml"
    path.write_text("streams:\n  - {topic: 'line/+/v', format: json, value: v, time: ts}\n"
                    "  - {topic: 'pack/+', format: senml}\n"
                    f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / name}'}}\n")
    d = Daemon(load_config(str(path)), config_path=str(path), metrics=Metrics())
    d.restore()
    return d


def _array(x: np.ndarray, t0: float) -> bytes:
    return json.dumps([{"v": round(float(v), 4), "ts": t0 + j} for j, v in enumerate(x)]).encode()


def _messages(rng: np.random.Generator) -> list[Message]:
    x = 500.0 + 0.4 * rng.standard_normal(4000)
    msgs = [
        # two arrays for one stream (the second repeats the first's last time: set aside)
        Message("line/a/v", _array(x[:300], T0), T0 + 300, 0, 0),
        Message("line/a/v", _array(x[300:600], T0 + 299), T0 + 600, 0, 0),
        # an array, then single samples, then an array again
        Message("line/b/v", _array(x[600:900], T0), T0 + 300, 0, 0),
        Message("line/b/v", json.dumps({"v": float(x[900]), "ts": T0 + 300}).encode(), T0 + 301, 0, 0),
        Message("line/b/v", json.dumps({"v": float(x[901]), "ts": T0 + 301}).encode(), T0 + 302, 0, 0),
        Message("line/b/v", _array(x[902:1200], T0 + 302), T0 + 600, 0, 0),
        # single samples, then an array
        Message("line/c/v", json.dumps({"v": float(x[1200]), "ts": T0}).encode(), T0 + 1, 0, 0),
        Message("line/c/v", _array(x[1201:1500], T0 + 1), T0 + 300, 0, 0),
        # a small array (POOL_LAYERS samples or fewer), then a large one
        Message("line/d/v", _array(x[1500:1503], T0), T0 + 3, 0, 0),
        Message("line/d/v", _array(x[1503:1800], T0 + 3), T0 + 300, 0, 0),
    ]
    # SenML: one name per pack; then a pack whose two URNs give one stream (ow/temp),
    # their records interleaved in time.
    one = [{"bn": "brackenfield:filler3:", "bt": T0, "bu": "g", "n": "fill_g", "v": round(float(x[1800]), 4)}]
    one += [{"n": "fill_g", "t": j, "v": round(float(v), 4)} for j, v in enumerate(x[1801:2100], start=1)]
    two = [{"n": f"urn:{'ab'[j % 2]}:ow:temp", "t": T0 + j, "u": "Cel", "v": round(float(v), 4)}
           for j, v in enumerate(x[2100:2400])]
    msgs += [Message("pack/p1", json.dumps(one).encode(), T0 + 300, 0, 0),
             Message("pack/p2", json.dumps(two).encode(), T0 + 300, 0, 0)]
    return msgs


def test_a_round_of_mixed_batches_feeds_the_engines_as_one_message_per_round(tmp_path: Path) -> None:
    msgs = _messages(np.random.default_rng(15))
    together = _daemon(tmp_path, "together")
    together.process(msgs)
    apart = _daemon(tmp_path, "apart")
    for m in msgs:
        apart.process([m])
    names = sorted(apart.engines)
    assert names == sorted(together.engines) == [
        "line/a/v", "line/b/v", "line/c/v", "line/d/v", "pack/p1/brackenfield:filler3:fill_g", "pack/p2/ow/temp"]
    for name in names:
        a, b = apart.engines[name], together.engines[name]
        assert a.samples_total == b.samples_total and a.rejected_total == b.rejected_total, name
        assert [c.tolist() for c in a.held_samples()] == [c.tolist() for c in b.held_samples()], name
    assert together.engines["line/a/v"].rejected_total.get("duplicate_time") == 1
    assert together.engines["pack/p2/ow/temp"].samples_total == 300
    assert together.engines["pack/p1/brackenfield:filler3:fill_g"].unit == "g"
    # Streams that brought arrays this round did not join the pool of calm streams.
    assert together.pool is not None and not any(n in together.pool for n in names)
    for d in (together, apart):
        if d.journal is not None:
            d.journal.close()
