"""``shiftwatch design --chart`` and ``design --from``, the real command line in a subprocess.

The replay file is set at Brackenfield Bottling, line 2 (an invented plant):
a filler head whose weights are autocorrelated, a capper torque read to
0.01 N m, and a tunnel-oven zone read every 10 s.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from shiftwatch.core.suggest import measure_noise, suggest
from shiftwatch.core.timefmt import format_time

T0 = 1_772_431_200.0  # 2026-03-02T06:00:00Z
FILL = "brackenfield/line2/filler/head2/fill"
TORQUE = "brackenfield/line2/capper/torque"
OVEN = "brackenfield/line2/oven/senml/zone3_temp"


def write_history(path: Path) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    rng = np.random.default_rng(8)
    series = {}
    n = 12_000
    e = rng.standard_normal(n) * 0.6 * math.sqrt(1 - 0.55**2)
    x = np.empty(n)
    x[0] = 0.0
    for i in range(1, n):
        x[i] = 0.55 * x[i - 1] + e[i]
    fill = np.round(500.0 + x, 3)
    fill[7000:] += 1.0  # a nozzle swap during the history
    series[FILL] = (T0 + np.arange(n, dtype=float), fill)
    series[TORQUE] = (T0 + np.arange(n, dtype=float), np.round(2.4 + 0.05 * rng.standard_normal(n), 2))
    series[OVEN] = (T0 + 10.0 * np.arange(1500), np.round(182.0 + 0.5 * rng.standard_normal(1500), 2))
    rows = []
    for name, (t, v) in series.items():
        rows += [(float(a), name, float(b)) for a, b in zip(t, v)]
    rows.sort()
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        for a, name, b in rows:
            f.write(f"{format_time(a)},{name},{b}\n")
    return series


@pytest.fixture
def history(tmp_path: Path) -> tuple[Path, dict[str, tuple[np.ndarray, np.ndarray]]]:
    p = tmp_path / "line2-history.csv"
    return p, write_history(p)


def test_design_from_a_replay_file_suggests_settings_per_stream(cli, history) -> None:
    path, series = history
    res = cli("design", "--from", str(path), "--within", "1min", "--streams-in-plant", "120",
              "--plant-false-alarms-per-day", "2", "--json")
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    assert out["within_s"] == 60.0 and out["streams_in_plant"] == 120
    got = {s["stream"]: s for s in out["streams"]}
    assert set(got) == set(series)
    for name, (t, v) in series.items():
        # The command says what the core says about the same readings.
        want = suggest(measure_noise(t, v), within=60.0, streams_in_plant=120, plant_false_alarms_per_day=2.0)
        s = got[name]
        assert s["min_shift_sigma"] == want.min_shift_sigma
        assert s["false_alarm_every"] == "60d"  # 120 streams / 2 a day = 60 days
        assert s["explanation"] == want.explain(name)
        assert s["explanation"].startswith(f"{name}: noise ")
    fill = got[FILL]
    assert fill["noise"]["phi"] == pytest.approx(0.55, abs=0.04)
    assert fill["noise"]["sigma"] == pytest.approx(0.6, rel=0.06)  # the step does not inflate it
    assert fill["found_in_time"] and fill["median_delay_s"] <= 60.0
    assert "strongly autocorrelated" in fill["explanation"]
    oven = got[OVEN]
    assert oven["noise"]["interval_s"] == 10.0 and "readings every 10 s" in oven["explanation"]
    assert got[TORQUE]["noise"]["quantum"] == pytest.approx(0.01)


def test_design_from_uses_the_configured_labels_and_units(cli, history, tmp_path: Path) -> None:
    path, _ = history
    cfg = tmp_path / "line2.yaml"
    cfg.write_text(
        "streams:\n"
        "  - topic: brackenfield/line2/filler/+/fill\n    unit: g\n    label: \"fill weight on filler {1}\"\n"
        "  - topic: brackenfield/line2/capper/torque\n    format: number\n    unit: N m\n    label: capper torque\n"
        "  - topic: brackenfield/line2/oven/senml\n    format: senml\n    unit: Cel\n    label: \"tunnel oven {name}\"\n")
    res = cli("design", "--from", str(path), "--config", str(cfg))
    assert res.returncode == 0, res.stderr
    lines = res.stdout.splitlines()
    assert len(lines) == 3
    by_start = {line.split(":")[0]: line for line in lines}
    assert set(by_start) == {"fill weight on filler head2", "capper torque", "tunnel oven zone3_temp"}
    fill = by_start["fill weight on filler head2"]
    assert "noise 0.6 g" in fill or "noise 0.59 g" in fill or "noise 0.61 g" in fill, fill
    assert "N m" in by_start["capper torque"] and "Cel" in by_start["tunnel oven zone3_temp"]
    # 3 streams in the file and the default budget of one a day: 3 days
    assert all("false_alarm_every 3d keeps the plant's 3 streams to about 1 false detection a day." in line
               for line in lines)


def test_design_from_explains_what_it_cannot_do(cli, history, tmp_path: Path) -> None:
    path, _ = history
    short = tmp_path / "short.csv"
    short.write_text("time,stream,value\n" + "".join(f"{T0 + i},brackenfield/line2/filler/head9/fill,500.{i % 7}\n"
                                                     for i in range(20)))
    res = cli("design", "--from", str(path), "--from", str(short))
    assert res.returncode == 1
    assert "brackenfield/line2/filler/head9/fill: no suggestion: 20 usable readings; at least 60" in res.stdout
    for args, message in (
        (["design", "--from", str(path), "--min-shift", "1"], "leave out --min-shift"),
        (["design", "--from", str(path), "--chart", str(tmp_path / "c.png")], "use it without --from"),
        (["design", "--from", str(path), "--within", "soon"], "not a duration: 'soon'"),
        (["design", "--from", str(path), "--plant-false-alarms-per-day", "0"], "must be positive"),
        (["design", "--from", str(tmp_path / "missing.csv")], "missing.csv"),
    ):
        res = cli(*args)
        assert res.returncode == 2, (args, res.stdout, res.stderr)
        assert message in res.stderr and "Traceback" not in res.stderr, res.stderr


def test_design_chart_draws_the_chosen_settings_and_their_neighbours(cli, tmp_path: Path) -> None:
    import matplotlib.image

    png = tmp_path / "design.png"
    res = cli("design", "--min-shift", "1", "--false-alarm-every", "7d", "--interval", "1s",
              "--chart", str(png), "--json")
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    curves = out["chart"]["curves"]
    assert [c["label"] for c in curves] == ["chosen", "more sensitive", "less sensitive"]
    assert [c["false_alarm_every_s"] / 86400 for c in curves] == [7.0, 1.75, 28.0]
    # The chart's figures are the design table's: at 1 sigma the chosen curve is the table's row.
    row = next(r for r in out["rows"] if r["shift_sigma"] == 1.0)
    i = curves[0]["shift_sigma"].index(1.0)
    assert curves[0]["median_delay"][i] == row["multi_cusum_median_delay_at_most"]
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    img = matplotlib.image.imread(str(png))
    assert img.shape[0] > 300 and img.shape[1] > 800
    colours = {tuple(np.round(p, 2)) for p in img.reshape(-1, img.shape[2])[::7]}
    assert len(colours) > 20  # three coloured curves, text and a grid, not a blank image
    bad = cli("design", "--chart", str(tmp_path / "no" / "such" / "dir" / "c.png"))
    assert bad.returncode == 2 and "cannot write the chart" in bad.stderr and "Traceback" not in bad.stderr


@pytest.mark.parametrize("options, asked, used", [
    # 20,000 weeks at 1 s, and a year at 1 ms, ask for ARLs past the 1e9 samples the tests are
    # calibrated for (both ended in a ValueError traceback); the daemon designs for 1e9 there.
    (["--false-alarm-every", "20000w"], "12,096,000,000", "1,000,000,000"),
    (["--interval", "1ms", "--false-alarm-every", "365d"], "31,536,000,000", "1,000,000,000"),
    # 1 ms at 1 s asks for an ARL of 0.001 samples: the table showed 50 and said nothing.
    (["--false-alarm-every", "1ms"], "0.001", "50"),
])
def test_design_says_when_the_arl_is_held_to_the_calibrated_range(cli, options: list[str], asked: str,
                                                                  used: str) -> None:
    res = cli("design", *options)
    assert res.returncode == 0, res.stderr
    assert "Traceback" not in res.stderr
    assert f"in-control average run length (ARL): {used} samples" in res.stdout
    assert f"asks for an ARL of {asked} samples" in res.stdout
    assert "the daemon designs its tests\n   for 50 to 1,000,000,000 samples" in res.stdout
    data = json.loads(cli("design", *options, "--json").stdout)
    assert data["arl0"] == float(used.replace(",", ""))
    assert data["arl0_asked"] == pytest.approx(float(asked.replace(",", "")))


def test_design_within_the_range_says_nothing_of_it(cli) -> None:
    res = cli("design", "--false-alarm-every", "7d")
    assert res.returncode == 0, res.stderr
    assert "in-control average run length (ARL): 604,800 samples" in res.stdout  # 7 x 86,400 s at 1 s
    assert "asks for an ARL" not in res.stdout


def test_design_at_min_shift_0_1_and_arl_1e9_prints_finite_delays_and_no_warning(cli) -> None:
    # The reviewer's reproduction: numpy overflow warnings, a nan CUSUM ARL at 3 and
    # 4 sigma, and a bank delay of 4 samples at 1.5 to 4 sigma for charts with h of 101
    # to 243.  A chart climbs mu - k a sample, so it needs about h / (mu - k) samples
    # (Wald's approximation, common practice, from memory): 26 or more at 4 sigma.
    res = cli("design", "--min-shift", "0.1", "--false-alarm-every", "10000w", "--json")
    assert res.returncode == 0, res.stderr
    assert "RuntimeWarning" not in res.stderr
    data = json.loads(res.stdout)
    for row in data["rows"]:
        assert math.isfinite(row["cusum_arl"]) and math.isfinite(row["cusum_median_delay"])
        if row["shift_sigma"] >= 1.5:
            assert row["multi_cusum_median_delay_at_most"] >= 0.9 * 101.18 / (row["shift_sigma"] - 0.0907)


def test_design_refuses_charts_too_long_for_the_run_length_figures(cli) -> None:
    # min_shift 0.05 at ARL 1e9 needs charts with h above 300, where the chain's 400
    # nodes no longer resolve the run lengths: an error in words, not a wrong table.
    res = cli("design", "--min-shift", "0.05", "--false-alarm-every", "10000w")
    assert res.returncode != 0
    assert "Traceback" not in res.stderr
    assert "computed only up to h = 300" in res.stderr
    assert res.stdout == ""
