"""The pool of calm streams (core/calm.py) against the engine fed one sample at a time.

The pool holds a watching stream's samples back while an upper bound of its
CUSUM charts shows no trip is possible, and hands them to the engine in one
batch.  What must hold, for every stream and every way of cutting it:

- the same records, field for field, as the engine fed one sample per call;
- each record made on the same sample, never later: the pool hands a stream
  over on (or before) the sample that trips it;
- the same engine state at the end, up to rounding (the array path sums in
  another order).

References outside the project: the CUSUM recursion and its thresholds are
Page (1954), "Continuous inspection schemes", Biometrika 41; that the
recursion C_j = max(0, C_(j-1) + z_j - k) moves by at most the total change of
its inputs (it is 1-Lipschitz) is common practice in its analysis.  The first
test checks the pool's charts against statsmodels-free plain loops of that
recursion.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from shiftwatch.core.calm import CalmPool, CalmTerms
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0


def test_pooled_charts_follow_pages_recursion() -> None:
    # With no follower and no prewhitening, the pool's sums are Page's
    # recursion on the clipped residuals, checked against a plain loop.
    rng = np.random.default_rng(5)
    ks, hs = (0.25, 0.5, 1.0), (30.0, 20.0, 10.0)
    terms = CalmTerms(level=3.0, offsets=(0.0,), lam=0.0, delay=0, lo=-100.0, hi=100.0, inv=2.0, phi=0.0,
                      prev_r=0.0, clip=3.0, ks=ks, hs=hs, c_plus=(1.0, 0.5, 0.0), c_minus=(0.0, 0.2, 0.4),
                      room=10_000,
                      last_time=0.0, max_ahead=math.inf, max_behind=math.inf)
    pool = CalmPool(max_samples=200, max_age=1e9)
    pool.join("s", terms)
    cp, cm = [1.0, 0.5, 0.0], [0.0, 0.2, 0.4]
    x = 3.0 + 0.5 * rng.standard_normal(150)
    for i, v in enumerate(x):
        flag = pool.offer(["s"], np.array([i + 1.0]), np.array([v]), np.array([i + 1.0]), now=0.0)
        z = max(-3.0, min(3.0, (v - 3.0) * 2.0))
        cp = [max(0.0, c + z - k) for c, k in zip(cp, ks)]
        cm = [max(0.0, c - z - k) for c, k in zip(cm, ks)]
        assert bool(flag[0]) == any(c >= h * (1 - 1e-9) for c, h in zip(cp + cm, hs + hs))
        if flag[0]:
            break
    s = pool.slots(["s"])[0]
    assert pool._cp[s, :3].tolist() == pytest.approx(cp, abs=1e-12)
    assert pool._cm[s, :3].tolist() == pytest.approx(cm, abs=1e-12)


def _series(kind: str, n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    t = T0 + np.arange(float(n))
    if kind == "ar":
        e = rng.standard_normal(n)
        x = np.empty(n)
        x[0] = e[0]
        for i in range(1, n):
            x[i] = 0.6 * x[i - 1] + math.sqrt(1 - 0.36) * e[i]
    elif kind == "t3":
        x = rng.standard_t(3, n) / math.sqrt(3.0)
        x[rng.random(n) < 0.004] += 12.0
    else:
        x = rng.standard_normal(n)
    x = 100.0 + 2.0 * x
    if kind == "drift":
        x += np.linspace(0.0, 3.0, n)
    for _ in range(int(rng.integers(0, 4))):  # steps of 0.5 to 4 sigma
        at = int(rng.integers(300, n))
        x[at:] += 2.0 * float(rng.choice([-1, 1])) * float(rng.uniform(0.5, 4.0))
    if kind == "messy":
        bad = rng.random(n)
        x[bad < 0.003] = np.nan
        t[(bad > 0.003) & (bad < 0.006)] -= 5.0  # out of order
        t[(bad > 0.006) & (bad < 0.008)] -= 1.0  # repeats the previous sample's time
    return t, x


def _one_by_one(t: np.ndarray, x: np.ndarray, settings: DetectionSettings) -> tuple[list[Any], StreamEngine]:
    eng = StreamEngine("s", settings)
    out = []
    for i in range(t.shape[0]):
        for rec in eng.process(t[i:i + 1], x[i:i + 1], t[i:i + 1] + 0.5).records:
            out.append((i, rec.to_dict()))
    return out, eng


def _pooled(t: np.ndarray, x: np.ndarray, settings: DetectionSettings, max_samples: int,
            stats: dict[str, int]) -> tuple[list[Any], StreamEngine]:
    eng = StreamEngine("s", settings)
    pool = CalmPool(max_samples=max_samples, max_age=1e9)
    out = []
    for i in range(t.shape[0]):
        ti, xi, ai = t[i:i + 1], x[i:i + 1], t[i:i + 1] + 0.5
        if "s" in pool:
            stats["pooled"] += 1
            if not pool.offer(["s"], ti, xi, ai, now=0.0)[0]:
                continue
            ti, xi, ai = pool.take("s")
        stats["calls"] += 1
        for rec in eng.process(ti, xi, ai).records:
            out.append((i, rec.to_dict()))
        terms = eng.calm_terms()
        if terms is not None:
            pool.join("s", terms)
    if "s" in pool:
        ti, xi, ai = pool.take("s")
        for rec in eng.process(ti, xi, ai).records:
            out.append((t.shape[0] - 1, rec.to_dict()))
    return out, eng


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "drift", "messy"])
@pytest.mark.parametrize("test", ["multi_cusum", "cusum"])
def test_pooled_streams_give_the_same_records_on_the_same_samples(kind: str, test: str) -> None:
    settings = DetectionSettings(test=test, warmup_samples=200)
    stats = {"pooled": 0, "calls": 0}
    records = 0
    for rep in range(4):
        rng = np.random.default_rng(1000 * rep + len(kind))
        t, x = _series(kind, 3000, rng)
        want, ref = _one_by_one(t, x, settings)
        got, eng = _pooled(t, x, settings, max_samples=int(rng.choice([8, 64, 256])), stats=stats)
        assert got == want, f"{kind} run {rep}: records differ"

        # The end state up to rounding: the array path sums in another order.
        assert eng.state == ref.state
        assert eng.level == pytest.approx(ref.level, rel=1e-12)
        assert eng.sigma == pytest.approx(ref.sigma, rel=1e-12)
        assert eng.statistic == pytest.approx(ref.statistic, rel=1e-9, abs=1e-12)
        assert eng.samples_total == ref.samples_total
        assert eng.rejected_total == ref.rejected_total
        records += len(want)
    # The pool did its job: most watched samples waited, and the engine took them
    # in far fewer calls than samples.
    # The pool did its job: most watched samples waited (the rest are warm-ups, young
    # levels after steps and open events, which are never pooled).
    assert stats["pooled"] > 0.4 * 4 * 3000
    if kind != "iid":
        assert records > 0


def test_glr_streams_are_never_pooled() -> None:
    eng = StreamEngine("s", DetectionSettings(test="glr", warmup_samples=100))
    rng = np.random.default_rng(3)
    eng.process(T0 + np.arange(500.0), rng.standard_normal(500))
    assert eng.state == "watching" and eng.calm_terms() is None


def test_a_stream_with_an_open_event_is_not_calm() -> None:
    eng = StreamEngine("s", DetectionSettings(warmup_samples=100))
    rng = np.random.default_rng(4)
    x = rng.standard_normal(700)
    x[600:] += 3.0
    t = T0 + np.arange(700.0)
    for i in range(700):
        eng.process(t[i:i + 1], x[i:i + 1])
        if eng.state == "event_open":
            break
    assert eng.state == "event_open" and eng.calm_terms() is None


def test_batches_and_waits_are_spread_over_the_top_quarter_of_the_limits() -> None:
    # Streams that join together leave after 48 to 64 plain samples (max_samples 64), or
    # once their first waiting sample is 22.5 to 30 s old (max_age 30): spread by name,
    # so they do not all reach their engines in one round, and never past the limits.
    terms = CalmTerms(level=0.0, offsets=(0.0,), lam=0.0, delay=0, lo=-10.0, hi=10.0, inv=1.0, phi=0.0,
                      prev_r=0.0, clip=3.0, ks=(0.5,), hs=(1e6,), c_plus=(0.0,), c_minus=(0.0,), room=10_000,
                      last_time=0.0, max_ahead=math.inf, max_behind=math.inf)
    names = [f"brackenfield/line{i // 20}/head{i % 20}/fill_g" for i in range(200)]
    pool = CalmPool(max_samples=64, max_age=30.0)
    for name in names:
        pool.join(name, terms)
    left: dict[str, int] = {}
    for j in range(1, 65):
        live = [n for n in names if n not in left]
        t = np.full(len(live), float(j))
        for name, h in zip(live, pool.offer(live, t, np.zeros(len(live)), t, now=0.0).tolist()):
            if h:
                left[name] = j
    assert len(left) == len(names) and set(left.values()) <= set(range(48, 65))
    assert len(set(left.values())) >= 8
    ages = CalmPool(max_samples=64, max_age=30.0)
    for name in names:
        ages.join(name, terms)
    ages.offer(names, np.ones(200), np.zeros(200), np.ones(200), now=0.0)
    assert ages.due(22.49) == [] and sorted(ages.due(30.0)) == sorted(names)
    assert 50 < len(ages.due(26.25)) < 150
