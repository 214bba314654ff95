"""Plant cases the other event benches leave out, measured against the truth and references
(not part of the pytest run).

Usage, from the repository root with the package installed (``ruptures`` and
``statsmodels`` come with the ``test`` extra)::

    python tests/bench/bench_event_cases.py              # 2 to 4 minutes on 2 cores (135 s quiet, 2026-12-05)
    python tests/bench/bench_event_cases.py --states 10  # fewer random states, a smoke check
    python tests/bench/bench_event_cases.py --cli 5      # also 5 states through `shiftwatch replay`

Simulated 1 Hz feeds, iid Gaussian noise of sigma 1 around 20, the default settings
(``min_shift_sigma`` 1, ``false_alarm_every`` 7d), fed 1,024 readings a call; every
stream has its own numpy random state (``--states`` of them a cell, states given per
case below), so two checkouts can be paired on the same data.  The first step comes
at reading 1,500 of 3,000 (a settled baseline).  A step counts as *found* when a
``confirmed`` or ``returned`` record dates it within 5 readings (as ``bench_events.py``
counts).

1. **close**: two steps 30, 60, 100 or 150 readings apart, of 1.5, 2 or 3 sigma each,
   the second the same way or back (states ``100_000 + ...``).  Per cell: each step
   found, the second's kind (``returned`` when it goes back), the shift-time error of
   each against the truth (median of its absolute value, p90), and the same for
   ruptures' ``Binseg(model="l2")`` told there are two breaks, on readings 1,300 to
   1,850 (an offline reference that sees every reading: Truong, Oudre & Vayatis 2020);
   the share of second records whose ``level_after`` +- 1.645 ``level_after_se``
   holds the true level (nominal 90%), and whose shift-time interval holds the true
   step (nominal 90%).  The detection delay of the second step is set
   beside an oracle two-sided CUSUM that knows the level and sigma on each side
   (Montgomery ch. 9, k = step / 2, h by Siegmund's approximation for the same ARL of
   604,800 readings), restarted at the first step.
2. **excursion**: the level leaves by 2, 3 or 5 sigma and comes back after 5, 10, 20 or
   50 readings (states ``200_000 + ...``).  The finals the records give, as a pattern
   (``confirmed returned`` is the record of an excursion, ``dismissed`` says the level
   stayed; ``confirmed confirmed`` names the way back a new step), and the streams
   whose last final record leaves the level away from the true 20 by more than half
   the step: the excursion is claimed as lasting.  Beside it, the share of excursions
   the oracle CUSUM above detects before the level is back (+ 5 readings).
2b. **way back**: the level leaves by 1.5, 2 or 3 sigma and after 20 or 50 readings moves
   back by 0.25, 0.5, 1, 1.5 or 2 times as much (states ``700_000 + ...``): the kind of
   the way back's final record, against the truth the line draws (``returned`` when the
   level ends within half the step of where it was: so at 1 times; a step of its own at
   0.25 and 2 times; 0.5 and 1.5 times lie on the line), and the readings from its
   detection to that record.
3. **slow+step**: a 2-sigma step at reading 3,000 of 6,000 on a steady drift of 0.0005
   sigma a reading, and on a cycle of 0.5 sigma amplitude and 30 minutes' period (the
   README's "slow change"), and with no slow change for comparison (states ``300_000 + ...``).  Found; the error of the
   record's ``delta`` against the true step; and the error of statsmodels' OLS fit of
   the model that made the data (level, slope or sine and cosine, and the step at its
   true reading) on readings 2,000 to 4,000 (a reference that knows the model).
4. **gap**: a 2-sigma step during a pause in the readings of 60 s, 5 minutes or an hour
   (no reading from 1,500 on for that long; the step comes in the pause), states
   ``400_000 + ...``; and the same readings with no pause.  The share of records whose
   time span (the reading before ``shift_at_low``, ``shift_at_high``] meets the true
   span (the last reading before the pause, the first after it], the share that
   name the pause (``gap_from``, and the summary of ``display.alert_summary``), and the
   shift-time error in readings.
5. **quantised**: steps of 1 and 2 sigma on readings rounded to 1 sigma (the coarsest a
   gauge should read; ``bench_events.py`` has 0.5), states ``500_000 + ...``.  Found
   within 1,000 readings, the shift-time error against ruptures' ``Binseg(model="l2")``
   told there is one break (readings 1,000 to 2,000), and the interval's coverage.
6. **messy**: a 2-sigma step in a feed where 2% of the readings arrive twice and 2% of
   neighbours arrive swapped (states ``600_000 + ...``).  The readings set aside
   against those planted (each repeated reading is a ``duplicate_time``; each swap
   leaves one ``out_of_order``), and the records against those of the clean feed
   (same phases, same ``shift_at``).

``--cli N`` replays the first N states of the close case (2-sigma, 60 apart, back)
through ``python -m shiftwatch replay`` on a generated CSV and checks its records are
the core API's (phase, shift time, delta).
"""

from __future__ import annotations

import argparse
import collections
import math
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

from shiftwatch.core.engine import StreamEngine

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_record_claims import oracle_delay, siegmund_h  # this folder is first on the path
from bench_sensor_faults import run_cli

T0 = 1_788_000_000.0
AT = 1500
N = 3000
BATCH = 1024
ARL = 604_800.0
FINAL = ("confirmed", "returned")
PARTS = ("close", "excursion", "way_back", "slow", "gap", "quantised", "messy")


def feed(t: np.ndarray, x: np.ndarray, batch: int = BATCH) -> tuple[list, collections.Counter]:
    eng = StreamEngine("bench/case")
    recs: list = []
    rej: collections.Counter = collections.Counter()
    for a in range(0, t.shape[0], batch):
        res = eng.process(t[a:a + batch], x[a:a + batch])
        recs += res.records
        rej.update(r.reason for r in res.rejected)
    return recs, rej


def binseg(x: np.ndarray, n_bkps: int) -> list[int]:
    import ruptures as rpt

    return [int(b) for b in rpt.Binseg(model="l2", min_size=2, jump=1).fit(x).predict(n_bkps=n_bkps)[:-1]]


def idx(t: np.ndarray, v: float) -> int:
    return int(np.searchsorted(t, v))


def _found(recs: list, t: np.ndarray, at: int) -> list:
    return [r for r in recs if r.phase in FINAL and abs(idx(t, r.shift_at) - at) <= 5]


# ------------------------------------------------------------------ 1. close steps
def _close(args: tuple[int, float, float, int]) -> dict:
    gap, size, way, state = args
    rng = np.random.default_rng(state)
    sign = float(rng.choice([-1.0, 1.0]))
    z = rng.standard_normal(N)
    x = 20.0 + z.copy()
    x[AT:] += sign * size
    x[AT + gap:] += way * sign * size
    t = T0 + np.arange(float(N))
    recs, _ = feed(t, x)
    f1, f2 = _found(recs, t, AT), _found(recs, t, AT + gap)
    out: dict = {"f1": bool(f1), "f2": bool(f2), "kind2": f2[0].phase if f2 else "-"}
    fin = [r for r in recs if r.phase in FINAL + ("dismissed", "undecided") and r.detected_at >= t[AT]]
    out["err1"] = min((abs(idx(t, r.shift_at) - AT) for r in fin), default=math.inf)
    out["err2"] = min((abs(idx(t, r.shift_at) - AT - gap) for r in fin), default=math.inf)
    if f2:
        r = f2[0]
        truth = 20.0 + sign * size * (1.0 + way)
        out["cover2"] = abs(r.level_after - truth) <= 1.6449 * r.level_after_se
        out["within2"] = r.shift_at_low <= t[AT + gap] <= r.shift_at_high
        det = next(d for d in recs if d.phase == "detected" and d.id == r.id)
        out["delay2"] = idx(t, det.detected_at) - (AT + gap)
    lo = 1300
    b = binseg(x[lo:1850], 2)
    out["rup1"] = min(abs(lo + v - AT) for v in b)
    out["rup2"] = min(abs(lo + v - AT - gap) for v in b)
    # the oracle knows the level between the steps and sigma, and starts at the first step
    out["oracle2"] = oracle_delay(x - 20.0 - sign * size, AT + gap, size / 2, siegmund_h(size / 2, ARL), start=AT)
    return out


# ------------------------------------------------------------------ 2. excursions
def _excursion(args: tuple[int, float, int]) -> tuple[str, bool, bool]:
    length, size, state = args
    rng = np.random.default_rng(state)
    sign = float(rng.choice([-1.0, 1.0]))
    z = rng.standard_normal(N)
    x = 20.0 + z
    x[AT:AT + length] += sign * size
    t = T0 + np.arange(float(N))
    recs, _ = feed(t, x)
    fin = [r for r in recs if r.phase != "detected" and r.detected_at >= t[AT]]
    pattern = " ".join(r.phase for r in fin) or "none"
    last = [r for r in fin if r.phase in ("confirmed", "returned", "undecided")]
    lasting = bool(last) and abs(last[-1].level_after - 20.0) > 0.5 * size
    k = size / 2
    oracle = oracle_delay(x - 20.0, AT, k, siegmund_h(k, ARL)) <= length + 5
    return pattern, lasting, oracle


def _way_back(args: tuple[float, int, float, int]) -> tuple[str, int] | None:
    back, length, size, state = args
    rng = np.random.default_rng(state)
    sign = float(rng.choice([-1.0, 1.0]))
    x = 20.0 + rng.standard_normal(N)
    x[AT:] += sign * size
    x[AT + length:] -= back * sign * size
    t = T0 + np.arange(float(N))
    recs, _ = feed(t, x)
    fin = [r for r in recs if r.phase != "detected" and r.detected_at >= t[AT + length]]
    if not fin:
        return None
    return fin[0].phase, idx(t, fin[0].as_of) - idx(t, fin[0].detected_at)


# ------------------------------------------------------------------ 3. a step on slow change
def _slow(args: tuple[str, int]) -> tuple[bool, float, float]:
    import statsmodels.api as sm

    kind, state = args
    rng = np.random.default_rng(state)
    n, at, size = 6000, 3000, 2.0 * float(rng.choice([-1.0, 1.0]))
    i = np.arange(float(n))
    x = 20.0 + rng.standard_normal(n)
    if kind == "drift":
        x += 0.0005 * i
    elif kind == "cycle":
        phase = rng.uniform(0.0, 2 * math.pi)
        x += 0.5 * np.sin(2 * math.pi * i / 1800.0 + phase)
    x[at:] += size
    t = T0 + i
    recs, _ = feed(t, x)
    f = _found(recs, t, at)
    err = f[0].delta - size if f else math.nan
    sl = slice(2000, 4000)
    step = (i[sl] >= at).astype(float)
    if kind == "drift":
        cols = [np.ones_like(step), i[sl], step]
    elif kind == "none":
        cols = [np.ones_like(step), step]
    else:
        w = 2 * math.pi * i[sl] / 1800.0
        cols = [np.ones_like(step), np.sin(w), np.cos(w), step]
    ols = sm.OLS(x[sl], np.column_stack(cols)).fit()
    return bool(f), err, float(ols.params[-1]) - size


# ------------------------------------------------------------------ 4. a step in a pause
def _gap(args: tuple[float, int]) -> tuple[bool, bool, int, bool]:
    pause, state = args
    rng = np.random.default_rng(state)
    x = 20.0 + rng.standard_normal(N)
    x[AT:] += 2.0 * float(rng.choice([-1.0, 1.0]))
    t = T0 + np.arange(float(N))
    t[AT:] += pause
    recs, _ = feed(t, x)
    fin = [r for r in recs if r.phase in FINAL and r.detected_at >= t[AT - 5]]
    if not fin:
        return False, False, 10**6, False
    r = fin[0]
    lo = idx(t, r.shift_at_low)
    span_lo = t[lo - 1]
    meets = span_lo < t[AT] and r.shift_at_high > t[AT - 1]
    from shiftwatch.display import alert_summary

    text = alert_summary(r)
    return True, meets, idx(t, r.shift_at) - AT, r.gap_from is not None and (
        "without readings" in text or "pause" in text)


# ------------------------------------------------------------------ 5. quantised
def _quant(args: tuple[float, int]) -> tuple[bool, float, float, bool]:
    size, state = args
    rng = np.random.default_rng(state)
    x = 20.0 + rng.standard_normal(N)
    x[AT:] += size * float(rng.choice([-1.0, 1.0]))
    x = np.round(x)
    t = T0 + np.arange(float(N))
    recs, _ = feed(t, x)
    fin = [r for r in recs if r.phase in FINAL and r.detected_at >= t[AT - 5] and r.as_of <= t[AT + 1000]]
    rup = abs(1000 + binseg(x[1000:2000], 1)[0] - AT)
    if not fin:
        return False, math.nan, float(rup), False
    r = fin[0]
    cover = r.shift_at_low <= t[AT] <= r.shift_at_high
    return True, float(abs(idx(t, r.shift_at) - AT)), float(rup), cover


# ------------------------------------------------------------------ 6. duplicates, swaps
def _messy(state: int) -> tuple[int, int, int, int, bool]:
    """Planted repeats and swaps, the readings whose time is not after all before them,
    those the engine set aside, and whether the records are the clean feed's (phases,
    shift times within one reading)."""
    rng = np.random.default_rng(state)
    x = 20.0 + rng.standard_normal(N)
    x[AT:] += 2.0 * float(rng.choice([-1.0, 1.0]))
    t = T0 + np.arange(float(N))
    clean, _ = feed(t, x, 64)
    order: list[int] = []
    dups = 0
    for i in range(N):
        order.append(i)
        if rng.random() < 0.02:
            order.append(i)
            dups += 1
    o = np.array(order)
    swaps = 0
    j = 0
    while j < len(o) - 1:
        if rng.random() < 0.02 and o[j] != o[j + 1]:
            o[j], o[j + 1] = o[j + 1], o[j]
            swaps += 1
            j += 2  # a swapped pair is not swapped again
        else:
            j += 1
    messy, rej = feed(t[o], x[o], 64)
    # a reading is late or repeated when its time is not after every time before it
    tt = t[o]
    late = int(np.sum(tt[1:] <= np.maximum.accumulate(tt)[:-1]))
    same = [r.phase for r in clean] == [r.phase for r in messy] and all(
        abs(idx(t, a.shift_at) - idx(t, b.shift_at)) <= 1 for a, b in zip(clean, messy, strict=False))
    return dups, swaps, late, rej["duplicate_time"] + rej["out_of_order"], same


def _pct(v: list[float], q: float) -> str:
    a = np.array([e for e in v if math.isfinite(e)], dtype=float)
    return f"{np.percentile(a, q):.0f}" if a.size else "-"


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--states", type=int, default=60, help="random states a cell")
    ap.add_argument("--cli", type=int, default=0, help="also replay this many states through the CLI")
    ap.add_argument("--part", action="append", choices=PARTS, help="only these parts (repeatable; default all)")
    a = ap.parse_args()
    parts = set(a.part or PARTS)
    S = a.states
    started = time.time()
    with ProcessPoolExecutor(2) as pool:
        if "close" in parts:
            print("\n1. Two steps close together (iid, step 1 at reading 1,500); errors in readings, "
                  "median / p90 of |shift_at - truth|")
            print("| size | way | apart | 1st found | 2nd found | 2nd kinds | 1st err engine / Binseg "
                  "| 2nd err engine / Binseg | 2nd level_after covered | 2nd 90% interval holds it "
                  "| 2nd delay engine / oracle (median) |")
            print("|---|---|---|---|---|---|---|---|---|---|---|")
            for size in (1.5, 2.0, 3.0):
                for way in (1.0, -1.0):
                    for gap in (30, 60, 100, 150):
                        base = 100_000 + 10_000 * int(size * 2) + 5_000 * (way < 0) + 100 * gap
                        res = list(pool.map(_close, [(gap, size, way, base + s) for s in range(S)]))
                        kinds = collections.Counter(r["kind2"] for r in res)
                        cov = [r["cover2"] for r in res if "cover2" in r]
                        win = [r["within2"] for r in res if "within2" in r]
                        d2 = [r["delay2"] for r in res if "delay2" in r]
                        o2 = [r["oracle2"] for r in res]
                        print(f"| {size} | {'same' if way > 0 else 'back'} | {gap} | "
                              f"{sum(r['f1'] for r in res)}/{S} | {sum(r['f2'] for r in res)}/{S} | "
                              + ", ".join(f"{k} {v}" for k, v in sorted(kinds.items())) + " | "
                              f"{_pct([r['err1'] for r in res], 50)}, {_pct([r['err1'] for r in res], 90)} / "
                              f"{_pct([r['rup1'] for r in res], 50)}, {_pct([r['rup1'] for r in res], 90)} | "
                              f"{_pct([r['err2'] for r in res], 50)}, {_pct([r['err2'] for r in res], 90)} / "
                              f"{_pct([r['rup2'] for r in res], 50)}, {_pct([r['rup2'] for r in res], 90)} | "
                              f"{100 * np.mean(cov):.0f}% of {len(cov)} | {100 * np.mean(win):.0f}% | "
                              f"{np.median(d2):.0f} / {np.median(o2):.0f} |", flush=True)

        if "excursion" in parts:
            print("\n2. Excursions: the level leaves and comes back (iid, at reading 1,500); "
                  "the final records after it, per stream")
            print("| size | readings away | finals (streams) | claimed lasting | oracle CUSUM detects it |")
            print("|---|---|---|---|---|")
            for size in (2.0, 3.0, 5.0):
                for length in (5, 10, 20, 50):
                    base = 200_000 + 10_000 * int(size) + 100 * length
                    res2 = list(pool.map(_excursion, [(length, size, base + s) for s in range(S)]))
                    pats = collections.Counter(r[0] for r in res2)
                    print(f"| {size} | {length} | " + ", ".join(f"{k} {v}" for k, v in pats.most_common())
                          + f" | {sum(r[1] for r in res2)} | {sum(r[2] for r in res2)}/{S} |", flush=True)

        if "way_back" in parts:
            print("\n2b. The way back: the level leaves by 1.5, 2 or 3 sigma for 20 or 50 readings, then moves "
                  "back by a share of that; the first final record after it (all sizes and lengths)")
            print("| back | right kind | records | readings from detection to it: median / p90 / p99 / max |")
            print("|---|---|---|---|")
            for back in (0.25, 0.5, 1.0, 1.5, 2.0):
                jobs = [(back, length, size, 700_000 + 1_000 * int(4 * back) + 100 * int(2 * size) + s)
                        for size in (1.5, 2.0, 3.0) for length in (20, 50) for s in range(2 * S)]
                res2b = [r for r in pool.map(_way_back, jobs, chunksize=10) if r is not None]
                k2b = collections.Counter(r[0] for r in res2b)
                right = {1.0: "returned", 0.25: "confirmed", 2.0: "confirmed"}.get(back)
                w = np.array([r[1] for r in res2b])
                print(f"| {back} | " + (f"{k2b[right]} of {len(res2b)}" if right else "(on the line)") + " | "
                      + ", ".join(f"{k} {v}" for k, v in k2b.most_common()) + " | "
                      f"{np.median(w):.0f} / {np.percentile(w, 90):.0f} / {np.percentile(w, 99):.0f} / {w.max()} |",
                      flush=True)

        if "slow" in parts:
            print("\n3. A 2-sigma step on slow change (at reading 3,000 of 6,000); delta error in sigma, "
                  "p10 / median / p90")
            print("| slow change | found | record's delta - truth | statsmodels OLS (true model) - truth |")
            print("|---|---|---|---|")
            for j, kind in enumerate(("drift", "cycle", "none")):
                res3 = list(pool.map(_slow, [(kind, 300_000 + 10_000 * j + s) for s in range(S)]))
                e = [r[1] for r in res3 if r[0]]
                o = [r[2] for r in res3]
                print(f"| {kind} | {sum(r[0] for r in res3)}/{S} | "
                      f"{np.percentile(e, 10):+.2f} / {np.median(e):+.2f} / {np.percentile(e, 90):+.2f} | "
                      f"{np.percentile(o, 10):+.2f} / {np.median(o):+.2f} / {np.percentile(o, 90):+.2f} |",
                      flush=True)

        if "gap" in parts:
            print("\n4. A 2-sigma step during a pause in the readings (1 Hz)")
            print("| pause | found | record's span meets the true one | names the pause (gap_from, summary) "
                  "| shift error in readings: p10 / median / p90 |")
            print("|---|---|---|---|---|")
            for pause in (0.0, 60.0, 300.0, 3600.0):
                res4 = list(pool.map(_gap, [(pause, 400_000 + s) for s in range(S)]))
                ok = [r for r in res4 if r[0]]
                e4 = [r[2] for r in ok]
                print(f"| {pause:.0f} s | {len(ok)}/{S} | {sum(r[1] for r in ok)} | {sum(r[3] for r in ok)} | "
                      f"{np.percentile(e4, 10):+.0f} / {np.median(e4):+.0f} / {np.percentile(e4, 90):+.0f} |",
                      flush=True)

        if "quantised" in parts:
            print("\n5. Readings rounded to 1 sigma, a step at reading 1,500")
            print("| step | found within 1,000 | |shift error| engine median, p90 / Binseg | "
                  "90% interval covers |")
            print("|---|---|---|---|")
            for size in (1.0, 2.0):
                res5 = list(pool.map(_quant, [(size, 500_000 + 1_000 * int(size) + s) for s in range(S)]))
                ok5 = [r for r in res5 if r[0]]
                print(f"| {size} | {len(ok5)}/{S} | {_pct([r[1] for r in ok5], 50)}, {_pct([r[1] for r in ok5], 90)} / "
                      f"{_pct([r[2] for r in res5], 50)}, {_pct([r[2] for r in res5], 90)} | "
                      f"{100 * np.mean([r[3] for r in ok5]):.0f}% |", flush=True)

        if "messy" in parts:
            print("\n6. Readings repeated (2%) and neighbours swapped (2%), a 2-sigma step")
            res6 = list(pool.map(_messy, [600_000 + s for s in range(S)]))
            tot = np.array([r[:4] for r in res6]).sum(axis=0)
            print(f"planted: {tot[0]} repeated readings, {tot[1]} swaps, {tot[2]} readings whose time is not "
                  f"after every earlier one; set aside (duplicate_time, out_of_order): {tot[3]}; records as the "
                  f"clean feed's (phases, shift_at within 1 reading): {sum(r[4] for r in res6)} of {S} streams")

    if a.cli:
        same = 0
        for s in range(a.cli):
            rng = np.random.default_rng(100_000 + 10_000 * 4 + 5_000 + 100 * 60 + s)
            sign = float(rng.choice([-1.0, 1.0]))
            x = 20.0 + rng.standard_normal(N)
            x[AT:] += sign * 2.0
            x[AT + 60:] -= sign * 2.0
            t = T0 + np.arange(float(N))
            core, _ = feed(t, x)
            cli = run_cli(t, x, "bench/case")
            want = [(d["phase"], d["shift_at"], d["delta"]) for d in (r.to_dict() for r in core)]
            got = [(d["phase"], d["shift_at"], d["delta"]) for d in cli]
            same += want == got
            if want != got:
                print(f"state {s}: core {want}\n         cli  {got}")
        print(f"\nshiftwatch replay: {same} of {a.cli} states gave the core API's records")
    print(f"\n({S} states a cell, {time.time() - started:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
