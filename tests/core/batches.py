"""One engine run over a series cut into batches, with one of the engine module's
switches set: how the tests hold a fast path to the reference path it replaces
(the young phase's loop, the sparse spike split, the split screen, the batch path),
and the noise the histories of those tests are made of."""

from __future__ import annotations

import itertools
import json
from collections.abc import Callable
from contextlib import AbstractContextManager
from dataclasses import replace
from typing import Any

import numpy as np

from shiftwatch.core import engine
from shiftwatch.core.baseline import BaselineSums, estimate_baseline
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings


def noise(kind: str, n: int, rng: np.random.Generator) -> np.ndarray:
    """``n`` samples of unit-scale noise of ``kind``: ``iid`` Gaussian, ``ar`` (AR(1), phi 0.6),
    ``t3`` (Student's t with 3 degrees of freedom: heavy tails) or ``quantised`` (Gaussian
    rounded to halves: ties and runs of equal values, as a coarse sensor gives)."""
    if kind == "iid":
        return rng.standard_normal(n)
    if kind == "ar":
        e = rng.standard_normal(n)
        x = np.empty(n)
        x[0] = e[0]
        for i in range(1, n):
            x[i] = 0.6 * x[i - 1] + e[i]
        return x
    if kind == "t3":
        return rng.standard_t(3, n)
    if kind == "quantised":
        return np.round(rng.standard_normal(n) * 2.0) / 2.0
    raise ValueError(kind)


def steps_of(n: int, rng: np.random.Generator, most: int) -> list[int]:
    """Cuts that split ``n`` samples into batches of 1 to ``most - 1`` samples each."""
    out, at = [], 0
    while True:
        at += int(rng.integers(1, most))
        if at >= n:
            return out
        out.append(at)


def run_in_batches(eng: StreamEngine, t: np.ndarray, x: np.ndarray, cuts: list[int],
                   switch: str | tuple[str, ...], on: bool) -> dict[str, Any]:
    """Feed ``eng`` the batches ``x[a:b]`` between ``cuts`` with ``engine.<switch>`` (or each
    of several) set to ``on`` (restored after); returns its records, rejections, state after
    each batch and counters, for comparison with the same run the other way."""
    names = (switch,) if isinstance(switch, str) else switch
    saved = {name: getattr(engine, name) for name in names}
    for name in names:
        setattr(engine, name, on)
    try:
        records, rejected, states = [], [], []
        for a, b in itertools.pairwise([0, *cuts, x.shape[0]]):
            res = eng.process(t[a:b], x[a:b])
            records += [r.to_dict() for r in res.records]
            rejected += [(a + r.position, r.reason, r.time) for r in res.rejected]
            states.append(json.dumps(eng.get_state(), sort_keys=True))
        return {"records": records, "rejected": rejected, "states": states,
                "counts": (eng.samples_total, dict(eng.records_total), dict(eng.rejected_total))}
    finally:
        for name, value in saved.items():
            setattr(engine, name, value)


def mixed_cuts(n: int, rng: np.random.Generator, modes: int = 6) -> list[int]:
    """Where to cut ``n`` samples into batches, one of the ways the engine is fed, drawn
    from the first ``modes`` of: 0 as replay feeds (4,096 at a time), 1 as a sender of
    JSON arrays of 260, 2 a few random cuts, 3 batches of 1 to 299, 4 one batch, 5 one
    sample at a time for 400 samples (a lone spike is a whole batch), then 4,096."""
    mode = int(rng.integers(0, modes))
    if mode == 5:
        return list(range(1, min(n, 400))) + list(range(400, n, 4096))
    if mode == 0:
        return list(range(4096, n, 4096))
    if mode == 1:
        return list(range(260, n, 260))
    if mode == 2:
        return sorted({int(v) for v in rng.integers(1, n, size=int(rng.integers(1, 40)))})
    if mode == 3:
        return steps_of(n, rng, 300)
    return []


def split_spikes_with(sparse: bool, t: np.ndarray, x: np.ndarray, pending: tuple[float, float] | None,
                      limit: int, *, prev_out: int | None = None, before: float | None = None,
                      t0: float = 0.0) -> tuple[Any, ...]:
    """``StreamEngine._split_spikes`` on one segment around level 40 (scale 0.2), with the
    sparse split (``sparse``) or the array split: its outputs as plain lists, and the
    sample held at its end.  ``pending``: a sample held from the batch before;
    ``prev_out``: the engine's count of outliers before; ``before``: a sample already in
    the window (at ``t0 - 2``), the one before the segment."""
    saved = engine.SPARSE_SPIKES
    engine.SPARSE_SPIKES = sparse
    try:
        eng = StreamEngine("brackenfield/press4/ram")
        if before is not None:
            eng._window.push(before, t0 - 2.0)
        eng._pending = pending
        if prev_out is not None:
            eng._prev_out = prev_out
        idx = np.arange(t.shape[0], dtype=np.intp)
        kt, kx, spikes, used, osign, settled = eng._split_spikes(t, x, idx, 40.0, 0.2, limit)
        return (kt.tolist(), kx.tolist(), spikes, used, None if osign is None else osign.tolist(),
                None if settled is None else settled.tolist(), eng._pending)
    finally:
        engine.SPARSE_SPIKES = saved


def record_run(eng: StreamEngine, t: np.ndarray, x: np.ndarray, a: np.ndarray | None,
               cuts: list[int]) -> dict[str, Any]:
    """Feed the batches between ``cuts`` (with their arrival times when ``a`` is given, as the
    daemon feeds them); everything the engine said and kept after each batch."""
    records, rejected, states = [], [], []
    for lo, hi in itertools.pairwise([0, *cuts, x.shape[0]]):
        res = eng.process(t[lo:hi], x[lo:hi]) if a is None else eng.process(t[lo:hi], x[lo:hi], a[lo:hi])
        records += [r.to_dict() for r in res.records]
        rejected += [(lo + r.position, r.reason, r.time) for r in res.rejected]
        states.append(json.dumps(eng.get_state(), sort_keys=True))
    return {"records": records, "rejected": rejected, "states": states,
            "counts": (eng.samples_total, dict(eng.records_total), dict(eng.rejected_total))}


def switched_run(switch: Callable[[bool], AbstractContextManager[None]], eng: StreamEngine, t: np.ndarray,
                 x: np.ndarray, a: np.ndarray | None, cuts: list[int], on: bool) -> dict[str, Any]:
    """:func:`record_run` with ``switch(on)`` set: the fast path (True) or its reference."""
    with switch(on):
        return record_run(eng, t, x, a, cuts)


def random_history(kind: str, n: int, rng: np.random.Generator, *, t0: float, level: float, sigma: float,
                   least_step: float, spiky: float, bare: float
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Times, values and (for most histories) arrival times of one stream: ``noise`` of
    ``kind`` about ``level``; up to 3 steps of ``least_step`` to 5 and lone spikes of 6 to
    20, in its units; with probability ``spiky`` 0.1% spikes of +9 sigma, as the replay
    bench's data carry; a few bad values, stoppages and short gaps, sometimes a jittery
    clock; with probability ``bare`` no arrival times (replay), else arrival times with
    now and then a sample stamped a day ahead."""
    x = level + sigma * noise(kind, n, rng)
    for _ in range(int(rng.integers(0, 4))):  # steps
        at = int(rng.integers(300, n))
        x[at:] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(least_step, 5.0))
    for at in rng.integers(0, n, size=int(rng.integers(0, 12))):  # lone spikes, +-6 to 20 sigma
        x[at] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(6.0, 20.0))
    if rng.random() < spiky:
        x[rng.random(n) < 0.001] += 9.0 * sigma
    for at in rng.integers(0, n, size=int(rng.integers(0, 3))):  # bad values
        x[at] = float(rng.choice([np.nan, np.inf]))
    dt = np.ones(n)
    for at in rng.integers(1, n, size=int(rng.integers(0, 6))):  # stoppages and short gaps
        dt[at] = float(rng.choice([2.0, 7.0, 45.0, 3600.0]))
    if rng.random() < 0.3:  # a jittery clock
        dt *= rng.uniform(0.8, 1.2, n)
    t = t0 + np.cumsum(dt)
    if rng.random() < bare:
        return t, x, None
    a = t + 0.05
    for at in rng.integers(0, n, size=int(rng.integers(0, 3))):  # a sample stamped a day ahead
        a[at] -= 86_400.0
    return t, x, a


def random_run_agrees(run: Callable[..., dict[str, Any]], history: Callable[..., Any], state: int, n: int,
                      most: int) -> None:
    """A random history (its noise's kind from ``state``) cut into batches of up to ``most``:
    ``run`` gives the same with its switch on and off."""
    rng = np.random.default_rng(state)
    kind = ("iid", "ar", "t3", "quantised")[state % 4]
    t, x, a = history(kind, n, rng)
    cuts = steps_of(n, rng, most)
    assert run(StreamEngine("s"), t, x, a, cuts, True) == run(StreamEngine("s"), t, x, a, cuts, False)


def mixed_runs_agree(run: Callable[..., dict[str, Any]], history: Callable[..., Any], kind: str,
                     rng: np.random.Generator, runs: int = 8) -> None:
    """``runs`` random histories of ``kind`` noise (1,500 to 12,000 samples) cut by
    :func:`mixed_cuts`: ``run`` gives the same with its switch on and off."""
    for _ in range(runs):
        n = int(rng.integers(1500, 12000))
        t, x, a = history(kind, n, rng)
        cuts = mixed_cuts(n, rng)
        on = run(StreamEngine("brackenfield/kiln2/draft"), t, x, a, cuts, True)
        assert on == run(StreamEngine("brackenfield/kiln2/draft"), t, x, a, cuts, False)


def other_tests_agree(run: Callable[..., dict[str, Any]], history: Callable[..., Any], test_name: str,
                      rng: np.random.Generator) -> None:
    """As :func:`mixed_runs_agree` with the sequential test ``test_name`` (cusum, glr), on
    iid, AR(1) and t(3) noise."""
    s = DetectionSettings(test=test_name)
    for kind in ("iid", "ar", "t3"):
        n = int(rng.integers(2000, 7000))
        t, x, a = history(kind, n, rng)
        cuts = mixed_cuts(n, rng)
        assert run(StreamEngine("s", s), t, x, a, cuts, True) == run(StreamEngine("s", s), t, x, a, cuts, False)


def baseline_sums_agree(switch: Callable[[bool], AbstractContextManager[None]], rng: np.random.Generator,
                        rounds: int, most: int, steps: Callable[[int], np.ndarray]) -> None:
    """``BaselineSums.add`` with ``switch`` on and off gives the same sums (every one, and of
    the same types, through ``to_list``) after random batches of t(3) readings of up to
    ``most`` whose time steps ``steps(m)`` gives, with and without a cut, phi zero and not,
    clip 4 and 2 (the tail count taken before or after the clip)."""
    for _ in range(rounds):
        b = estimate_baseline(np.arange(200.0), 10.0 + rng.standard_normal(200))
        b = replace(b, phi=float(rng.choice([0.0, 0.3, -0.2])), clip=float(rng.choice([4.0, 2.0])))
        sums = [BaselineSums(), BaselineSums()]
        at = 200.0
        for _ in range(int(rng.integers(1, 8))):
            m = int(rng.integers(1, most))
            v = 10.0 + rng.standard_t(3, m)
            tt = at + np.cumsum(steps(m))
            at = float(tt[-1])
            cut = int(rng.integers(0, m + 1))
            for s, on in zip(sums, (True, False)):
                with switch(on):
                    s.add(b, v, tt, cut=cut)
        assert json.dumps(sums[0].to_list()) == json.dumps(sums[1].to_list())
        assert [type(v) for v in sums[0].to_list()] == [type(v) for v in sums[1].to_list()]
