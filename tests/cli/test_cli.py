"""The real command line, run in a subprocess: replay, fit and design.

Demo data are set at the Brackenfield bottling plant, an invented site: a
filler, a capper torque head and a tunnel oven.
"""

from __future__ import annotations

import json
import re
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest

from shiftwatch.core.arl import cusum_arl
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.records import RECORD_FIELDS
from shiftwatch.core.timefmt import format_time, parse_time
from shiftwatch.display import alert_summary

T0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC).timestamp()


def write_plant_csv(path: Path, *, n: int = 3000, epoch: bool = False) -> dict[str, int]:
    """Three streams with one known step each; returns the step index per stream."""
    rng = np.random.default_rng(21)
    steps = {"brackenfield/filler3/fill_g": 1200, "brackenfield/capper1/torque_nm": 1800,
             "brackenfield/oven2/zone4_c": 2300}
    levels = {"brackenfield/filler3/fill_g": (500.0, 0.8, 1.0),
              "brackenfield/capper1/torque_nm": (2.4, 0.05, -0.08),
              "brackenfield/oven2/zone4_c": (182.0, 0.4, 0.7)}
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        for i in range(n):
            ts = T0 + i
            stamp = f"{ts:.3f}" if epoch else format_time(ts)
            for name, (lvl, sd, d) in levels.items():
                v = lvl + sd * rng.standard_normal() + (d if i >= steps[name] else 0.0)
                f.write(f"{stamp},{name},{v:.4f}\n")
    return steps


def read_records(text: str) -> list[dict]:
    return [json.loads(line) for line in text.splitlines() if line.strip()]


@pytest.mark.parametrize("epoch", [False, True])
def test_replay_finds_each_step_and_prints_json_lines(cli, tmp_path: Path, epoch: bool) -> None:
    csv_path = tmp_path / "line.csv"
    steps = write_plant_csv(csv_path, epoch=epoch)
    res = cli("replay", str(csv_path))
    assert res.returncode == 0, res.stderr
    recs = read_records(res.stdout)
    confirmed = {r["stream"]: r for r in recs if r["phase"] == "confirmed"}
    assert set(confirmed) == set(steps)
    for name, idx in steps.items():
        r = confirmed[name]
        assert list(r)[: len(RECORD_FIELDS)] == list(RECORD_FIELDS)
        assert abs(parse_time(r["shift_at"]) - (T0 + idx)) <= 5
        assert parse_time(r["shift_at_low"]) <= parse_time(r["shift_at"]) <= parse_time(r["shift_at_high"])
        assert r["test"] == "multi_cusum"
    assert [parse_time(r["as_of"]) for r in recs] == sorted(parse_time(r["as_of"]) for r in recs)
    assert "replayed 9000 rows in 3 stream(s): 3 shift(s) confirmed" in res.stderr


def test_replay_gives_what_the_engine_gives(cli, tmp_path: Path) -> None:
    # The CLI is a thin shell: its records are the engine's, fed sample by sample.
    csv_path = tmp_path / "line.csv"
    write_plant_csv(csv_path, n=2500)
    out = tmp_path / "alerts.jsonl"
    res = cli("replay", "--out", str(out), str(csv_path))
    assert res.returncode == 0, res.stderr
    assert res.stdout == ""
    got = read_records(out.read_text())
    rows = [line.split(",") for line in csv_path.read_text().splitlines()[1:]]
    expected = []
    for name in sorted({r[1] for r in rows}):
        eng = StreamEngine(name)
        for r in rows:
            if r[1] == name:
                for rec in eng.process([parse_time(r[0])], [float(r[2])]).records:
                    # The summary is the daemon's: the samples are from 2026-03-02, so it is dated.
                    expected.append({**rec.to_dict(), "summary": alert_summary(rec, today=0.0)})
    key = lambda d: (d["as_of"], d["stream"], d["phase"] != "detected")
    assert sorted(got, key=key) == sorted(expected, key=key)
    assert len(got) == 6


def test_replay_reports_bad_rows_by_file_and_line_and_keeps_the_good(cli, tmp_path: Path) -> None:
    csv_path = tmp_path / "line.csv"
    write_plant_csv(csv_path)
    lines = csv_path.read_text().splitlines()
    lines[10] = lines[10].rsplit(",", 1)[0] + ",n/a"
    lines[20] = "yesterday," + lines[20].split(",", 1)[1]
    lines[30] = lines[30].rsplit(",", 1)[0] + ",nan"
    lines[40] = lines[39]  # a repeated row: duplicate time for that stream
    lines[50] = "2026-03-02T06:00:01Z,brackenfield/filler3/fill_g"  # a missing column
    csv_path.write_text("\n".join(lines) + "\n")
    res = cli("replay", str(csv_path))
    assert res.returncode == 1
    err = res.stderr
    assert f"{csv_path}:11: value 'n/a' is not a number" in err
    assert f"{csv_path}:21: time 'yesterday' is not RFC 3339, epoch seconds or epoch milliseconds" in err
    assert f"{csv_path}:31: stream " in err and "value is NaN" in err
    assert f"{csv_path}:41: stream " in err and "repeats one already accepted" in err
    assert f"{csv_path}:51: expected 3 columns, got 2" in err
    recs = read_records(res.stdout)
    assert sum(r["phase"] == "confirmed" for r in recs) == 3


def test_replay_refuses_a_file_without_the_columns(cli, tmp_path: Path) -> None:
    bad = tmp_path / "wide.csv"
    bad.write_text("timestamp,filler3,oven2\n2026-03-02T06:00:00Z,500.1,182.0\n")
    res = cli("replay", str(bad))
    assert res.returncode == 2
    assert f"{bad}:1: header lacks column(s) time, stream, value" in res.stderr
    res = cli("replay", str(tmp_path / "missing.csv"))
    assert res.returncode == 2 and "missing.csv: cannot open" in res.stderr


def test_replay_applies_per_stream_settings_from_config(cli, tmp_path: Path) -> None:
    csv_path = tmp_path / "line.csv"
    write_plant_csv(csv_path)
    cfg = tmp_path / "shiftwatch.yaml"
    cfg.write_text(
        "streams:\n"
        "  - topic: brackenfield/capper1/+\n"
        "    unit: N m\n"
        "    detection: {test: cusum, min_shift_sigma: 1.5}\n"
        "detection: {false_alarm_every: 30d}\n")
    res = cli("replay", "--config", str(cfg), str(csv_path))
    assert res.returncode == 0, res.stderr
    recs = read_records(res.stdout)
    capper = [r for r in recs if r["stream"] == "brackenfield/capper1/torque_nm"]
    others = [r for r in recs if r["stream"] != "brackenfield/capper1/torque_nm"]
    assert capper and all(r["test"] == "cusum" and r["unit"] == "N m" for r in capper)
    assert others and all(r["test"] == "multi_cusum" and "unit" not in r for r in others)
    # Alert records as the daemon publishes them: a summary, and the label the config gives.
    assert all(r["summary"].startswith(r["phase"].upper() + " ") for r in recs)
    assert all("label" not in r for r in recs)
    cfg.write_text(cfg.read_text().replace("    unit: N m\n", "    unit: N m\n    label: capper {1}\n")
                   + "display: {time_zone: America/Chicago}\n")
    res = cli("replay", "--config", str(cfg), str(csv_path))
    assert res.returncode == 0, res.stderr
    capper = [r for r in read_records(res.stdout) if r["stream"] == "brackenfield/capper1/torque_nm"]
    assert capper and all(r["label"] == "capper torque_nm" for r in capper)
    # Chicago in March 2026 is on CST before the 8th (US rules: second Sunday of March).
    assert all(r["summary"].startswith(f"{r['phase'].upper()} capper torque_nm ") and " CST" in r["summary"]
               for r in capper), capper[0]["summary"]
    assert all(r["shift_at"].endswith("Z") for r in capper)  # the records stay UTC


def test_replay_names_the_config_key_and_line_on_error(cli, tmp_path: Path) -> None:
    csv_path = tmp_path / "line.csv"
    write_plant_csv(csv_path, n=200)
    cfg = tmp_path / "bad.yaml"
    cfg.write_text("detection:\n  min_shift_sigma: 1.0\n  false_alarm_evry: 7d\n")
    res = cli("replay", "--config", str(cfg), str(csv_path))
    assert res.returncode == 2
    assert f"{cfg}:3: detection.false_alarm_evry: unknown key; did you mean 'false_alarm_every'?" in res.stderr


def test_fit_on_the_nile_series(cli, tmp_path: Path) -> None:
    # Nile annual flow, shipped in statsmodels (Cobb 1978, Biometrika 65:243):
    # the least-squares break puts the first new-regime year at 1899, with
    # levels 1097.75 and 849.97 (also strucchange's published example).
    from statsmodels.datasets import nile

    data = nile.load_pandas().data
    csv_path = tmp_path / "nile.csv"
    with open(csv_path, "w") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{int(year)}-01-01T00:00:00Z,aswan/flow,{vol}\n"
                     for year, vol in zip(data["year"], data["volume"]))
    res = cli("fit", str(csv_path), "--json")
    assert res.returncode == 0, res.stderr
    d = json.loads(res.stdout)
    assert d["stream"] == "aswan/flow"
    assert d["shift_at"] == "1899-01-01T00:00:00.000Z"
    assert d["level_before"] == pytest.approx(1097.75, abs=0.01)
    assert d["level_after"] == pytest.approx(849.97, abs=0.01)
    assert d["n_before"] == 28 and d["n_after"] == 72
    assert d["p_value"] < 1e-6


def test_fit_asks_for_a_stream_when_the_file_has_several(cli, tmp_path: Path) -> None:
    csv_path = tmp_path / "line.csv"
    steps = write_plant_csv(csv_path, n=2000)
    res = cli("fit", str(csv_path))
    assert res.returncode == 2 and "choose one with --stream" in res.stderr
    res = cli("fit", str(csv_path), "--stream", "brackenfield/filler3/fill_g", "--json")
    assert res.returncode == 0, res.stderr
    d = json.loads(res.stdout)
    assert abs(parse_time(d["shift_at"]) - (T0 + steps["brackenfield/filler3/fill_g"])) <= 3


def test_design_matches_lucas_crosier(cli) -> None:
    # Lucas & Crosier (1982), Technometrics 24:199-205, Table 1 (values recalled from memory): a two-sided CUSUM with
    # k = 0.5 and h = 4 has an in-control ARL of 168 and 8.38 at a 1-sigma shift.
    res = cli("design", "--min-shift", "1", "--false-alarm-every", "168s", "--interval", "1s", "--json")
    assert res.returncode == 0, res.stderr
    d = json.loads(res.stdout)
    assert d["cusum"]["k"] == 0.5
    assert d["cusum"]["h"] == pytest.approx(4.0, abs=0.02)
    row = next(r for r in d["rows"] if r["shift_sigma"] == 1.0)
    assert row["cusum_arl"] == pytest.approx(8.38, rel=0.01)


def test_design_prints_a_table_an_engineer_can_read(cli) -> None:
    res = cli("design", "--min-shift", "1", "--false-alarm-every", "7d", "--interval", "1s")
    assert res.returncode == 0, res.stderr
    out = res.stdout
    assert "in-control average run length (ARL): 604,800 samples" in out
    # h for k = 0.5 at ARL 604,800 (the issue quotes about 12.1, from memory).
    h = float(out.split("h = ")[1].split()[0])
    assert h == pytest.approx(12.15, abs=0.05)
    assert cusum_arl(0.5, h) == pytest.approx(604800, rel=0.01)
    for shift in ("0.75", "1.00", "2.00", "4.00"):
        assert f"  {shift}   " in out
    # Delays as a person says them (the first-hour report saw "1.633 min"): whole seconds
    # under 10 minutes, never a decimal fraction of a minute.
    assert not re.search(r"\d\.\d+ min", out), out
    row = next(line for line in out.splitlines() if line.startswith("   0.50"))
    assert re.search(r"\d+ / \d+ min \d+ s", row), row
    res = cli("design", "--false-alarm-every", "often")
    assert res.returncode == 2 and "--false-alarm-every: not a duration: 'often'" in res.stderr
    # A bare number is refused (it printed "every 7 s" and "a false alarm every 50 s").
    res = cli("design", "--false-alarm-every", "7")
    assert res.returncode == 2 and res.stdout == ""
    assert "--false-alarm-every: '7' has no unit (use a number with a unit: 250ms, 30s" in res.stderr
    res = cli("design", "--interval", "1")
    assert res.returncode == 2 and "--interval: '1' has no unit" in res.stderr


def test_fit_prints_rounded_figures_for_people_and_full_ones_in_json(cli, tmp_path: Path) -> None:
    csv_path = tmp_path / "line.csv"
    write_plant_csv(csv_path, n=2000)
    args = ("fit", str(csv_path), "--stream", "brackenfield/filler3/fill_g")
    full = json.loads(cli(*args, "--json").stdout)
    res = cli(*args)
    assert res.returncode == 0, res.stderr
    text = res.stdout
    assert text.startswith(f"brackenfield/filler3/fill_g: one step at {full['shift_at']}")
    before, after = (float(f"{full[k]:.5g}") for k in ("level_before", "level_after"))
    assert f"level before {before:g} " in text and f"level after  {after:g} " in text
    # No figure runs to more than 5 significant digits (the report saw 3.0683249999999873).
    numbers = re.findall(r"(?<![\d:T-])\d+\.\d+", text.split("\n", 1)[1].replace(full["shift_at_low"], ""))
    assert numbers and all(len(n.replace(".", "").lstrip("0")) <= 5 for n in numbers), numbers
    assert "--json gives every figure in full" in text


def test_commands_explain_bad_arguments_without_a_traceback(cli, tmp_path: Path) -> None:
    csv_path = tmp_path / "line.csv"
    write_plant_csv(csv_path, n=300)
    for args, message in (
        (["replay", "--out", str(tmp_path / "no" / "such" / "dir.jsonl"), str(csv_path)], "cannot write"),
        (["fit", str(csv_path), "--stream", "brackenfield/filler3/fill_g", "--level", "1.5"], "fit: "),
        (["fit", str(csv_path), "--stream", "brackenfield/filler3/fill_g", "--min-segment", "5000"], "fit: "),
        (["design", "--min-shift", "10"], "--min-shift must be above 0 and at most 4"),
    ):
        res = cli(*args)
        assert res.returncode == 2, args
        assert message in res.stderr and "Traceback" not in res.stderr, res.stderr


def _strict_json(text: str) -> dict:
    """JSON as RFC 8259 defines it: section 6 permits no Infinity or NaN, which Python's json
    reads by default (and JavaScript's JSON.parse, Go's encoding/json refuse)."""
    def refuse(name: str) -> None:
        raise ValueError(f"{name} is not JSON (RFC 8259, section 6)")
    return json.loads(text, parse_constant=refuse)


def test_records_of_a_reading_with_no_noise_are_strict_json(cli, tmp_path: Path) -> None:
    # A level that does not vary at all (a stuck or quantised reading), then a step: the noise
    # sigma is 0, so the step in sigmas and the F statistic are infinite. They were written as
    # Infinity, which strict JSON parsers refuse (found by an outside trial); now null.
    path = tmp_path / "flat.csv"
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{int(T0) + i},brackenfield/filler3/level_mm,{5.0 if i < 600 else 7.0}\n"
                     for i in range(1000))
    res = cli("replay", str(path))
    assert res.returncode == 0, res.stderr
    lines = [ln for ln in res.stdout.splitlines() if ln.strip()]
    assert lines, res.stderr
    recs = [_strict_json(ln) for ln in lines]
    confirmed = [r for r in recs if r["phase"] == "confirmed"]
    assert len(confirmed) == 1 and confirmed[0]["delta"] == 2.0
    assert confirmed[0]["delta_sigma"] is None and confirmed[0]["sigma"] == 0.0
    fit = cli("fit", str(path), "--json")
    assert fit.returncode == 0, fit.stderr
    got = _strict_json(fit.stdout)
    assert got["delta"] == 2.0 and got["delta_sigma"] is None


def test_a_sub_second_detection_delay_is_said_in_milliseconds(cli, tmp_path: Path) -> None:
    # Found by an outside tester: a replay of 100 Hz data said "detected 0 s later" (8 ms).  The
    # delay is taken from the record's own RFC 3339 times with datetime.fromisoformat (the
    # standard library, not shiftwatch's parser); 1 s = 1000 ms (SI).
    rng = np.random.default_rng(21)
    n, step_at = 3000, 2000
    t0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC).timestamp()
    path = tmp_path / "vibration.csv"
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{format_time(t0 + i / 100)},brackenfield/line2/capper/torque,"
                     f"{2.0 + 0.05 * rng.standard_normal() + 0.15 * (i >= step_at):.4f}\n" for i in range(n))
    res = cli("replay", "--jobs", "1", str(path))
    assert res.returncode == 0, res.stderr
    recs = [json.loads(line) for line in res.stdout.splitlines()]
    assert recs, res.stderr
    for r in recs:
        lag = (datetime.fromisoformat(r["detected_at"]) - datetime.fromisoformat(r["shift_at"])).total_seconds()
        assert 0 < lag < 1, r  # the case at hand: a delay under a second
        assert f", detected {lag * 1000:.3g} ms later: " in r["summary"], (lag, r["summary"])
