"""The established watch's cheaper batch path against the reference it stands in for.

A watching stream's batch goes through the spike split, the follower, the test and
the baseline sums as arrays; the array calls on a batch of a few hundred samples
cost more than their arithmetic.  Where the engine now shares or saves those calls
(the switches in :data:`SWITCHES`, each one a fast path with the original kept as
its reference), these tests replay random histories through both, with steps,
spikes, gaps in time, autocorrelated and heavy-tailed noise and every kind of
batching, and require the same records, rejections and saved state (every sum and
estimate the engine keeps, printed with all its digits) bit for bit.  The reference
paths themselves are held to outside references by the other tests of tests/core
(test_engine.py, test_events.py: statsmodels, scipy, published tables).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from shiftwatch.core import engine, follow
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.multicusum import MultiCusumTest
from shiftwatch.core.screen import screen_samples
from shiftwatch.core.settings import DetectionSettings

from .batches import mixed_cuts, noise, run_in_batches

T0 = 1_788_000_000.0

#: The engine's switches for the batch path (True: the fast path, False: the reference).
#: SPARSE_SPIKES's fast path now keeps its samples as slices between the lone spikes.
#: OFFSETS_IN_PLACE keeps the follower offsets in one buffer (memory, not arithmetic: the
#: saved state's offsets must come out the same to the last bit).
SWITCHES = ("FOLD_TOGETHER", "SPARSE_SPIKES", "OFFSETS_IN_PLACE")


def _history(kind: str, n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Times and values of one stream: noise of ``kind``, steps, lone spikes, gaps."""
    x = noise(kind, n, rng)  # t3: heavy tails, the stream ends up clipped at 2 sigma
    x = 50.0 + 0.8 * x
    for _ in range(int(rng.integers(0, 4))):
        at = int(rng.integers(300, n))
        x[at:] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(0.5, 5.0))
    for at in rng.integers(0, n, size=int(rng.integers(0, 12))):
        x[at] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(6.0, 20.0))
    dt = np.ones(n)
    for at in rng.integers(1, n, size=int(rng.integers(0, 6))):  # stoppages and short gaps
        dt[at] = float(rng.choice([2.0, 7.0, 45.0, 3600.0]))
    if rng.random() < 0.3:  # a jittery clock
        dt *= rng.uniform(0.8, 1.2, n)
    return T0 + np.cumsum(dt), x


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "quantised"])
def test_batch_path_equals_the_reference(kind: str) -> None:
    rng = np.random.default_rng({"iid": 21, "ar": 22, "t3": 23, "quantised": 24}[kind])
    for _ in range(12):
        n = int(rng.integers(1500, 9000))
        t, x = _history(kind, n, rng)
        cuts = mixed_cuts(n, rng)
        fast = run_in_batches(StreamEngine("s"), t, x, cuts, SWITCHES, True)
        ref = run_in_batches(StreamEngine("s"), t, x, cuts, SWITCHES, False)
        assert fast == ref
        assert len(fast["states"]) == len(cuts) + 1  # a state after every batch was compared


@pytest.mark.parametrize("switch", SWITCHES)
def test_each_switch_alone(switch: str) -> None:
    # One fast path at a time against the reference, with the other tests too (the single
    # CUSUM and the GLR).
    rng = np.random.default_rng(31)
    for test_name, settings in (("multi_cusum", DetectionSettings()),
                                ("cusum", DetectionSettings(test="cusum")),
                                ("glr", DetectionSettings(test="glr"))):
        for kind in ("iid", "ar", "t3"):
            n = int(rng.integers(2000, 6000))
            t, x = _history(kind, n, rng)
            cuts = mixed_cuts(n, rng)
            fast = run_in_batches(StreamEngine("s", settings), t, x, cuts, switch, True)
            ref = run_in_batches(StreamEngine("s", settings), t, x, cuts, switch, False)
            assert fast == ref, (test_name, kind)


def test_the_switches_are_the_engines() -> None:
    # Every switch named here exists and is on by default.
    assert all(getattr(engine, name) is True for name in SWITCHES)


def _bank_update_as_it_was(test: Any, z: np.ndarray) -> int:
    """MultiCusumTest.update's exact path as it was written before the per-row maxima
    screened its blocks and the running sum went in place: the reference for it."""
    bank = test._bank
    m = bank.m
    d = np.empty((2 * m, z.shape[0]))
    np.subtract(z[None, :], bank.k_col, out=d[:m])
    np.subtract(-z[None, :], bank.k_col, out=d[m:])
    s = np.cumsum(d, axis=1)
    floor = np.minimum.accumulate(s, axis=1)
    np.minimum(floor, -test._c[:, None], out=floor)
    np.subtract(s, floor, out=s)
    hit = (s > bank.h2_col).any(axis=0)
    if hit.any():
        i = int(np.argmax(hit))
        col = s[:, i].copy()
        ratio = col / bank.h2
        row = int(np.argmax(ratio))
        test._c, test._stat, test._tripped, test._dir = col, float(ratio[row]), row % m, 1 if row < m else -1
        return i
    test._c = s[:, -1].copy()
    test._stat = float(np.max(test._c / bank.h2))
    return -1


def test_bank_update_equals_its_earlier_form() -> None:
    # The CUSUM bank's block update (33 to 1,023 samples, below its fast screen) against the
    # form it had, on residuals that trip and residuals that do not, from random sums:
    # the same trip index, sums, statistic and direction, bit for bit.
    rng = np.random.default_rng(41)
    for _ in range(300):
        arl = float(rng.choice([600.0, 3600.0, 604800.0]))
        shift = float(rng.uniform(0.5, 2.0))
        new, old = MultiCusumTest.design(arl, shift), MultiCusumTest.design(arl, shift)
        n = int(rng.integers(33, 1024))
        z = np.clip(rng.standard_normal(n) + float(rng.choice([0.0, 0.0, 0.4, -0.6, 1.5])), -4.0, 4.0)
        start = np.abs(rng.standard_normal(2 * new._bank.m)) * float(rng.choice([0.0, 0.5, 2.0]))
        start = np.minimum(start, 0.9 * np.concatenate((new._bank.h_arr, new._bank.h_arr)))
        new._c, old._c = start.copy(), start.copy()
        got, want = new.update(z), _bank_update_as_it_was(old, z)
        assert got == want
        assert new.get_state() == old.get_state()
        assert new._c.tobytes() == old._c.tobytes()


def test_follower_single_block_equals_its_loop() -> None:
    # follow_path on a stretch of at most one block (a live batch) against the block loop's
    # step as it was written, ``p * (u0 + lam cumsum(r / p))``: the same floats; and both
    # against the recursion u_i = (1 - lam) u_(i-1) + lam r_i, the exponentially weighted
    # mean's definition (NIST/SEMATECH e-Handbook 6.3.2.4), to within the rounding the
    # module documents.
    rng = np.random.default_rng(43)
    for _ in range(200):
        lam = 1.0 / float(rng.choice([60.0, 110.0, 250.0, 1000.0]))
        block = max(16, min(follow._FOLLOW_BLOCK, int(4.0 / lam)))
        m = int(rng.integers(0, block + 1))
        r = rng.standard_normal(m) * float(rng.uniform(0.1, 3.0))
        u0 = float(rng.standard_normal())
        got = follow.follow_path(r, u0, lam)
        p = ((1.0 - lam) ** np.arange(1, block + 1, dtype=np.float64))[:m]  # as the engine keeps them
        want = np.concatenate(([u0], p * (u0 + lam * np.cumsum(r / p))))
        assert got.tobytes() == want.tobytes()
        u, rec = u0, [u0]
        for v in r.tolist():
            u = (1.0 - lam) * u + lam * v
            rec.append(u)
        assert np.allclose(got, rec, rtol=0.0, atol=1e-11 * (1.0 + float(np.abs(r).max(initial=0.0))))


def test_a_float_batch_is_screened_as_an_object_batch_is() -> None:
    # screen_samples checks a float64 batch on the array as it is; the same values as an
    # object array go through the per-value conversion with validity masks (the path the
    # decoders' mixed payloads take): the same kept samples and the same rejections, on
    # batches full of what must be set aside (NaN, infinities, values past 1e150 in
    # magnitude, repeated and earlier times).  IEEE 754 doubles: -0.0 == 0.0, NaN fails
    # every comparison.
    rng = np.random.default_rng(47)
    specials = [np.nan, np.inf, -np.inf, 1e200, -1e200, 1e150, -1e150, np.nextafter(1e150, np.inf),
                -np.nextafter(1e150, np.inf), -0.0]
    for _ in range(3000):
        n = int(rng.integers(0, 40))
        x = 50.0 + rng.standard_normal(n)
        for at in rng.integers(0, max(n, 1), size=int(rng.integers(0, 6))):
            if n:
                x[at] = specials[int(rng.integers(0, len(specials)))]
        t = 1_788_000_000.0 + np.cumsum(rng.choice([1.0, 1.0, 1.0, 0.0, -2.0], size=n))
        last = float(rng.choice([-np.inf, 1_787_999_999.0, 1_788_000_003.0]))
        got = screen_samples(t, x, last_time=last)
        want = screen_samples(t.astype(object), x.astype(object), last_time=last)
        assert got.times.tobytes() == np.asarray(want.times, dtype=np.float64).tobytes()
        assert got.values.tobytes() == np.asarray(want.values, dtype=np.float64).tobytes()
        assert got.rejected == want.rejected
        assert np.asarray(got.kept).tolist() == np.asarray(want.kept).tolist()


def test_windows_of_one_block_keep_their_own_samples() -> None:
    # Windows hold their rows in shared blocks of _WindowStore.BLOCK (no array object of
    # their own).  Streams made, fed and dropped in turn must each keep exactly their
    # own newest samples, also in a row that a dropped window left behind: held to a
    # plain list of every stream's samples (collections.deque with maxlen, the standard
    # library's bounded queue, as the reference of what a window holds).
    import collections
    import gc

    from shiftwatch.core.window import Window, _WindowStore

    rng = np.random.default_rng(41)
    keep = 37
    live: dict[int, tuple[Window, collections.deque[tuple[float, float]]]] = {}
    for step in range(3 * _WindowStore.BLOCK):
        k = int(rng.integers(0, 2 * _WindowStore.BLOCK))
        if k in live and rng.random() < 0.3:
            del live[k]  # its row goes back to the store
            gc.collect()
            continue
        if k not in live:
            live[k] = (Window(keep, slack=5), collections.deque(maxlen=keep + 5))
        w, ref = live[k]
        m = int(rng.integers(1, 12))
        x, t = rng.standard_normal(m), step + np.arange(float(m)) / 16
        if m == 1:
            w.push(float(x[0]), float(t[0]))
        else:
            w.extend(x, t)
        ref.extend(zip(t.tolist(), x.tolist()))
        for w2, ref2 in live.values():
            n = len(w2)
            assert keep <= n or n == len(ref2)
            assert list(zip(w2.times.tolist(), w2.values.tolist())) == list(ref2)[len(ref2) - n:]
