"""A record's levels keep the precision their standard errors call for, and its
summary shows the step between them, on readings far from zero with little noise.

Outside trial of 2026-12-05: a platinum thermometer at 773.152 K with 0.001 K of
noise stepped by 0.003 K.  The confirmed record said ``level_before`` 773.152,
``level_after`` 773.155 (6 significant digits) while the fitted level was
773.15542 with a standard error of 5e-05 (rounded by 8 standard errors), so
``level_after - level_before`` was 0.003 against the record's own ``delta`` of
0.00342; its summary read "773.15 -> 773.16".  A barometric reading of
101325 Pa with 0.2 Pa of noise stepping by 1.2 Pa read "1.0133e+05 ->
1.0133e+05": no step at all between the two numbers an operator is shown.

Reference: the fitted levels are the two segment means of the exact
least-squares single split (brute force: numpy's argmin of the sum of squared
errors over every split of the record's samples, computed here, not by the
engine).  Demo data: the Brackenfield bottling plant's tunnel oven and its
compressed-air header, an invented site; normal noise from fixed random states.
"""

from __future__ import annotations

import re

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.display import alert_summary

T0 = 1_772_409_600.0


def brute_split(y: np.ndarray, last: int) -> tuple[int, float, float]:
    """The least-squares single split of ``y`` (segments of at least 2) with the first
    sample after it at index <= ``last``: numpy argmin of the total SSE."""
    best = None
    for k in range(2, min(last, y.size - 2) + 1):
        a, b = y[:k], y[k:]
        sse = float(((a - a.mean()) ** 2).sum() + ((b - b.mean()) ** 2).sum())
        if best is None or sse < best[0]:
            best = (sse, k, float(a.mean()), float(b.mean()))
    assert best is not None
    return best[1], best[2], best[3]


@pytest.mark.parametrize(("level", "sigma", "step", "unit"), [
    (773.152, 0.001, 0.003, "K"),        # tunnel oven zone thermometer
    (101325.0, 0.2, 1.2, "Pa"),          # compressed-air header, absolute
    (500.0, 0.5, 1.0, "g"),              # fill weight: as before
])
@pytest.mark.parametrize("state", [1, 2, 3])
def test_a_confirmed_record_keeps_its_levels_to_their_standard_errors(
        state: int, level: float, sigma: float, step: float, unit: str) -> None:
    rng = np.random.default_rng(state)
    n = 1700
    x = level + sigma * rng.standard_normal(n)
    x[1500:] += step
    t = T0 + np.arange(n, dtype=np.float64)
    eng = StreamEngine("brackenfield/line2/oven/zone3", unit=unit)
    recs = eng.process(t, x).records
    conf = [r for r in recs if r.phase == "confirmed"]
    assert len(conf) == 1, [r.phase for r in recs]
    rec = conf[0]
    d = rec.to_dict()
    # The record's samples: the n_before + n_after up to its as_of (none set aside here).
    end = round(rec.as_of - T0) + 1
    y = x[end - rec.n_before - rec.n_after:end]
    k, m_before, m_after = brute_split(y, round(rec.detected_at - T0) - (end - y.size))
    assert k == rec.n_before
    # Each level within a tenth of its standard error of the exact segment mean
    # (and of the unrounded fit), and the two levels' difference is the step reported.
    assert abs(d["level_before"] - m_before) <= d["level_before_se"] / 10 + 1e-12 * level
    assert abs(d["level_after"] - m_after) <= d["level_after_se"] / 10 + 1e-12 * level
    assert abs((d["level_after"] - d["level_before"]) - d["delta"]) <= (
        d["level_before_se"] + d["level_after_se"]) / 10 + 1e-12 * level
    # The summary's two levels differ by the step to two figures, without exponents.
    text = alert_summary(rec)
    shown = re.search(r": (\S+) -> (\S+) " + unit + "$", text)
    assert shown is not None, text
    a, b = (float(v) for v in shown.groups())
    assert "e+" not in shown.group(0)
    assert abs((b - a) - rec.delta) <= 0.05 * abs(rec.delta), text


def test_a_step_on_readings_without_noise_says_so_instead_of_inf_sigma() -> None:
    # Outside trial of 2026-12-05, through the real daemon: a valve-position reading
    # that sat at 7.25 bar for 1,500 samples and moved to 7.5 (a stuck sensor that
    # moved: README, a known limit that it reads as a step).  The record's
    # ``delta_sigma`` was null, as RFC 8259 section 6 requires (JSON has no infinity),
    # but the summary an operator reads said "stepped up 0.25 bar (inf sigma)", and
    # the status page "+0.25 bar (+inf sigma)".  (Failed before on both texts.)
    from shiftwatch.status import EventSummary, _size_text

    x = np.full(1800, 7.25)
    x[1500:] = 7.5
    eng = StreamEngine("brackenfield/line2/capper/air_bar", unit="bar")
    recs = eng.process(T0 + np.arange(1800, dtype=np.float64), x).records
    assert [r.phase for r in recs] == ["detected", "confirmed"]
    for rec in recs:
        assert rec.to_dict()["delta_sigma"] is None and rec.to_dict()["sigma"] == 0.0
        text = alert_summary(rec)
        assert "inf" not in text and "nan" not in text, text
        assert "stepped up 0.25 bar (no noise to measure it in sigmas)" in text, text
        assert text.endswith(": 7.25 -> 7.50 bar"), text
        page = _size_text(EventSummary.of(rec, rec.as_of), "bar")
        assert page == "+0.25 bar (no noise to measure it in sigmas)", page


@pytest.mark.parametrize(("a", "b", "scale", "want"), [
    # Found by a first-hour review (2026-12-05): a replay's summary read "500.02 -> 501.3",
    # the second level one figure short of the first though both are rounded alike.
    (500.02, 501.3, 1.28, ("500.02", "501.30")),
    (7.25, 7.5, 0.25, ("7.25", "7.50")),
    (501.3, 500.02, 1.28, ("501.30", "500.02")),
    # A new user's replay (2026-12-05): a detected record's levels 499.9951 and 502.2031 read
    # "500.0 -> 502.2", four figures where its confirmed record read "500.00 -> 502.36": both
    # lost a zero to '.5g', so neither could lend the other its decimals.  A level that five
    # figures round keeps the zeros of its five figures.
    (499.9951, 502.2031, 2.208, ("500.00", "502.20")),
    (500.0049, 501.2003, 1.195, ("500.00", "501.20")),
    (30.00004, 29.49996, -0.5, ("30.000", "29.500")),
    # Padded only to the level's own five figures: 12345 takes no decimals from 0.5 (an
    # exact value, a sensor's fallback, keeps its short form).
    (12345.0, 0.5, 12344.5, ("12345", "0.5")),
    # Both already alike, or in exponent form: unchanged.
    (500.03, 501.83, 1.8, ("500.03", "501.83")),
    (1.5e-7, 2.5e-7, 1e-7, ("1.5e-07", "2.5e-07")),
])
def test_the_two_levels_of_a_summary_show_the_same_decimals(
        a: float, b: float, scale: float, want: tuple[str, str]) -> None:
    """The two levels of a summary line are read side by side, so a trailing zero that
    ``format(x, '.5g')`` drops from one of them is put back (to that level's own five
    significant figures, never further): "500.02 -> 501.30", not "500.02 -> 501.3".
    Five significant figures and the dropping of zeros past them are common practice in
    reporting measurements (the decimals a reading is shown with say its resolution)."""
    from shiftwatch.display import _levels
    assert _levels(a, b, scale) == want
