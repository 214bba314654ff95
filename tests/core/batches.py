"""One engine run over a series cut into batches, with one of the engine module's
switches set: how the tests hold a fast path to the reference path it replaces
(the young phase's loop, the sparse spike split, the split screen, the batch path),
and the noise the histories of those tests are made of."""

from __future__ import annotations

import itertools
import json
from typing import Any

import numpy as np

from shiftwatch.core import engine
from shiftwatch.core.engine import StreamEngine


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
