"""A bank whose largest reference value cannot alarm as often as the design asks.

Found while walking every detection setting (tests/daemon/test_config_ranges.py): with
``min_shift_sigma: 4`` and ``false_alarm_every: 1h`` at one sample a second (an ARL of
3,600), ``MultiCusumTest.design`` raised ValueError ("cannot reach") and the engine with
it, for every batch of the stream.  A two-sided CUSUM chart with reference value k signals
at each step with probability at least 2 P(Z > k) when its h is near 0, so its in-control
ARL can never be below 1 / (2 P(Z > k)) (the h -> 0 limit of Page's CUSUM; common
practice, e.g. Montgomery, Introduction to Statistical Quality Control, ch. 9): for
k = 3.67 that is about 4,100 samples.  Such a chart already alarms less often than asked,
the safe side; the design now gives it the smallest h instead of refusing the bank.
"""

from __future__ import annotations

import numpy as np
from scipy.stats import norm

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.multicusum import MultiCusumTest
from shiftwatch.core.settings import DetectionSettings


def test_a_bank_is_designed_when_its_largest_k_cannot_alarm_as_often_as_asked() -> None:
    bank = MultiCusumTest.design(600.0, 4.0)
    k_max = max(bank.ks)
    floor = 1.0 / (2.0 * norm.sf(k_max))  # scipy as the reference for the normal tail
    assert floor > 600.0  # the chart that made design refuse
    assert all(h > 0 for h in bank.hs)
    # The bank keeps its in-control promise: simulated on iid N(0, 1), its run lengths
    # average at least the ARL asked for (the design aims a few percent high).
    rng = np.random.default_rng(20260302)
    lengths = []
    for _ in range(400):
        bank.reset()
        n = 0
        while True:
            z = rng.standard_normal(4096)
            i = bank.update(z)
            if i >= 0:
                lengths.append(n + i + 1)
                break
            n += z.shape[0]
    mean = float(np.mean(lengths))
    se = float(np.std(lengths) / np.sqrt(len(lengths)))
    assert mean + 3 * se >= 600.0, (mean, se)


def test_the_engine_runs_a_large_min_shift_with_a_short_false_alarm_time() -> None:
    for state in range(1, 5):  # whether a redesign hits the gap depends on the noise estimates
        rng = np.random.default_rng(state)
        n = 3000
        t = 1.7e9 + np.arange(n, dtype=float)  # one sample a second: ARL 3,600 for 1 h
        v = 10.0 + rng.standard_normal(n)
        v[1500:] += 6.0  # a 6-sigma step
        spec = DetectionSettings(min_shift_sigma=4.0, false_alarm_every=3600.0)
        res = StreamEngine("brackenfield/line2/capper/torque", spec).process(t, v)
        assert any(r.phase == "detected" and r.detected_at >= t[1500] for r in res.records), state
