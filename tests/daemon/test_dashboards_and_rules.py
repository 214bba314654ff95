"""The Grafana dashboard and the Prometheus rules in config/, checked against the real daemon.

* The rules pass ``promtool check rules`` and behave as written under
  ``promtool test rules`` (promtool ships in Debian's ``prometheus``
  package; the README's test command (tests/install-and-test.sh) installs it, so a missing promtool fails).
* Every query of the dashboard parses as PromQL (``promtool check rules`` on
  a recording rule per query, Grafana's variables filled in).
* Every metric name the dashboard or the rules use is one the real daemon
  exposes on its /metrics endpoint, scraped over HTTP after a real broker
  delivered samples, bad messages and a step to it.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml
from prometheus_client.parser import text_string_to_metric_families

ROOT = Path(__file__).resolve().parents[2]
RULES = ROOT / "config" / "shiftwatch.rules.yml"
DASHBOARD = ROOT / "config" / "shiftwatch.grafana.json"
T0 = 1_790_000_000.0

#: Series Prometheus makes itself for every target (Prometheus documentation,
#: "Jobs and instances"); they never appear on an exporter's endpoint.
PROMETHEUS_OWN = {"up"}

#: PromQL words that look like names but are not metrics (PromQL documentation:
#: operators, aggregation modifiers and vector matching keywords).
PROMQL_WORDS = {"by", "without", "on", "ignoring", "group_left", "group_right", "bool", "and", "or",
                "unless", "offset", "inf", "nan"}


def promtool() -> str:
    exe = shutil.which("promtool") or ("/usr/bin/promtool" if Path("/usr/bin/promtool").exists() else None)
    if exe is None:
        pytest.fail("promtool is not installed: the README's test command (tests/install-and-test.sh) installs it "
                    "(apt-get install prometheus, which ships promtool)")
    return exe


def metric_names(expr: str) -> set[str]:
    """The metric names a PromQL expression selects.

    Strings, label matchers, range and subquery brackets and the label lists
    of ``by``/``without``/``on``/``ignoring``/``group_*`` are removed first;
    what is left that looks like a name and is not a function call or a
    keyword is a metric name.
    """
    e = re.sub(r'"(?:[^"\\]|\\.)*"', '""', expr)
    e = re.sub(r"\{[^}]*\}", "", e)
    e = re.sub(r"\[[^\]]*\]", "", e)
    e = re.sub(r"\b(by|without|on|ignoring|group_left|group_right)\s*\([^)]*\)", " ", e)
    names = set()
    for m in re.finditer(r"(?<![\w:.$])([A-Za-z_:][\w:]*)\s*(\()?", e):
        word, call = m.group(1), m.group(2)
        if call or word.lower() in PROMQL_WORDS:
            continue
        names.add(word)
    return names


def test_metric_name_extraction() -> None:
    assert metric_names('sum by (stream, phase) (increase(a_total{job="x", s=~"$s"}[$__range]))') == {"a_total"}
    assert metric_names("histogram_quantile(0.99, sum by (le) (rate(h_bucket[5m])))") == {"h_bucket"}
    assert metric_names("a / on (stream) b > 0.05 * c") == {"a", "b", "c"}
    assert metric_names("absent(up{job=\"shiftwatch\"})") == {"up"}


def load_rules() -> list[dict[str, Any]]:
    doc = yaml.safe_load(RULES.read_text())
    return [r for g in doc["groups"] for r in g["rules"]]


def dashboard_queries() -> list[str]:
    dash = json.loads(DASHBOARD.read_text())
    out = []
    for p in dash["panels"]:
        for t in p.get("targets", []):
            out.append(t["expr"])
    for a in dash["annotations"]["list"]:
        if "expr" in a:
            out.append(a["expr"])
    for v in dash["templating"]["list"]:
        q = v.get("query")
        if isinstance(q, dict):
            m = re.match(r"label_values\((.*),\s*\w+\)$", q["query"])
            assert m, q
            out.append(m.group(1))
    return out


def fill_grafana_variables(expr: str) -> str:
    """Grafana's variables as a real query would have them (Grafana documentation, "Global variables")."""
    return (expr.replace("$__rate_interval", "2m").replace("$__range", "6h")
            .replace("$job", "shiftwatch").replace("$stream", ".*").replace("$unit", "g"))


# ------------------------------------------------------------------ rules
def test_rules_file_has_the_rule_schema() -> None:
    # The rule-file schema of Prometheus 2.x (Prometheus documentation,
    # "Alerting rules"): groups with a name and rules; each alerting rule has
    # alert, expr, and optionally for, labels, annotations.
    doc = yaml.safe_load(RULES.read_text())
    assert set(doc) == {"groups"}
    names = set()
    for g in doc["groups"]:
        assert set(g) <= {"name", "interval", "rules"} and g["name"]
        for r in g["rules"]:
            assert set(r) <= {"alert", "expr", "for", "labels", "annotations"}, r
            assert re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", r["alert"]) and r["alert"] not in names
            names.add(r["alert"])
            assert isinstance(r["expr"], str) and r["expr"].strip()
            assert {"summary", "description"} <= set(r["annotations"])
            assert r["labels"]["severity"] in {"info", "warning"}
    # The four conditions the issue asks for, and more.
    assert {"ShiftwatchDown", "ShiftwatchBrokerDisconnected", "ShiftwatchStreamStale",
            "ShiftwatchMessagesDropped"} <= names


def test_promtool_accepts_the_rules() -> None:
    res = subprocess.run([promtool(), "check", "rules", str(RULES)], check=False, capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stdout + res.stderr
    assert f"SUCCESS: {len(load_rules())} rules found" in res.stdout


def _expand(text: str, labels: dict[str, str]) -> str:
    return re.sub(r"\{\{\s*\$labels\.(\w+)\s*\}\}", lambda m: labels.get(m.group(1), ""), text)


def _alert(name: str, **labels: str) -> dict[str, Any]:
    rule = next(r for r in load_rules() if r["alert"] == name)
    all_labels = {**labels, **rule["labels"]}
    return {"exp_labels": all_labels,
            "exp_annotations": {k: _expand(v, all_labels) for k, v in rule["annotations"].items()}}


def test_the_rules_fire_when_they_should_and_not_otherwise(tmp_path: Path) -> None:
    # promtool's rule unit tests (Prometheus documentation, "Unit testing for
    # rules"): synthetic series at one-minute steps, expected alerts at given times.
    a = {"job": "shiftwatch", "instance": "edge1:9650"}
    sel = 'job="shiftwatch",instance="edge1:9650"'
    fill_a = "brackenfield/line2/filler/head1/fill"
    fill_b = "brackenfield/line2/filler/head2/fill"
    tests = [
        {"interval": "1m", "input_series": [
            {"series": f"up{{{sel}}}", "values": "1 1 0x10"},
            {"series": f"shiftwatch_broker_connected{{{sel}}}", "values": "1 1 1 0x10"},
            {"series": f"shiftwatch_ingest_queue_depth{{{sel}}}", "values": "0 20000x10"},
            {"series": f"shiftwatch_outbox_depth{{{sel}}}", "values": "0 500x15"},
            {"series": f"shiftwatch_snapshot_failures_total{{{sel}}}", "values": "0 0 0 1 1 1"},
        ], "alert_rule_test": [
            {"eval_time": "1m", "alertname": "ShiftwatchDown", "exp_alerts": []},
            {"eval_time": "3m", "alertname": "ShiftwatchDown", "exp_alerts": []},  # down, not yet for 2m
            {"eval_time": "6m", "alertname": "ShiftwatchDown", "exp_alerts": [_alert("ShiftwatchDown", **a)]},
            {"eval_time": "3m", "alertname": "ShiftwatchBrokerDisconnected", "exp_alerts": []},
            {"eval_time": "6m", "alertname": "ShiftwatchBrokerDisconnected",
             "exp_alerts": [_alert("ShiftwatchBrokerDisconnected", **a)]},
            {"eval_time": "4m", "alertname": "ShiftwatchFallingBehind", "exp_alerts": []},
            {"eval_time": "7m", "alertname": "ShiftwatchFallingBehind",
             "exp_alerts": [_alert("ShiftwatchFallingBehind", **a)]},
            {"eval_time": "8m", "alertname": "ShiftwatchOutboxBacklog", "exp_alerts": []},
            {"eval_time": "12m", "alertname": "ShiftwatchOutboxBacklog",
             "exp_alerts": [_alert("ShiftwatchOutboxBacklog", **a)]},
            {"eval_time": "2m", "alertname": "ShiftwatchSnapshotsFailing", "exp_alerts": []},
            {"eval_time": "4m", "alertname": "ShiftwatchSnapshotsFailing",
             "exp_alerts": [_alert("ShiftwatchSnapshotsFailing", **a)]},
            {"eval_time": "4m", "alertname": "ShiftwatchAbsent", "exp_alerts": []},
        ]},
        {"interval": "1m", "input_series": [
            # head1 stops after 20 minutes; head2 goes on.
            {"series": f'shiftwatch_samples_total{{{sel},stream="{fill_a}"}}', "values": "0+60x20 1200x40"},
            {"series": f'shiftwatch_samples_total{{{sel},stream="{fill_b}"}}', "values": "0+60x60"},
            # 1 bad message a second for one reason, 1 a minute for another.
            {"series": f'shiftwatch_messages_dropped_total{{{sel},reason="not_json"}}', "values": "0+60x40"},
            {"series": f'shiftwatch_messages_dropped_total{{{sel},reason="too_large"}}', "values": "0+1x40"},
            # 10% of head2's samples have bad times; head1's rejections are spikes only.
            {"series": f'shiftwatch_samples_rejected_total{{{sel},stream="{fill_b}",reason="bad_time"}}',
             "values": "0+6x60"},
            {"series": f'shiftwatch_samples_rejected_total{{{sel},stream="{fill_a}",reason="spike"}}',
             "values": "0+30x60"},
            # ... and readings a new stream's warm-up set aside before a shift (warmup_shift):
            # real readings, not bad input, so no alert either.
            {"series": f'shiftwatch_samples_rejected_total{{{sel},stream="{fill_a}",reason="warmup_shift"}}',
             "values": "0+30x60"},
            # head2's readings repeat one value from minute 10 to minute 30 (a stuck sensor is
            # possible), head1's never.
            {"series": f'shiftwatch_stream_repeating{{{sel},stream="{fill_b}"}}', "values": "0x9 1x20 0x30"},
            {"series": f'shiftwatch_stream_repeating{{{sel},stream="{fill_a}"}}', "values": "0x60"},
        ], "alert_rule_test": [
            {"eval_time": "13m", "alertname": "ShiftwatchStreamRepeating", "exp_alerts": []},  # not yet for 5m
            {"eval_time": "20m", "alertname": "ShiftwatchStreamRepeating",
             "exp_alerts": [_alert("ShiftwatchStreamRepeating", **a, stream=fill_b)]},
            {"eval_time": "35m", "alertname": "ShiftwatchStreamRepeating", "exp_alerts": []},
            {"eval_time": "40m", "alertname": "ShiftwatchStreamStale", "exp_alerts": []},
            {"eval_time": "55m", "alertname": "ShiftwatchStreamStale",
             "exp_alerts": [_alert("ShiftwatchStreamStale", **a, stream=fill_a)]},
            {"eval_time": "5m", "alertname": "ShiftwatchMessagesDropped", "exp_alerts": []},
            {"eval_time": "30m", "alertname": "ShiftwatchMessagesDropped",
             "exp_alerts": [_alert("ShiftwatchMessagesDropped", instance="edge1:9650", reason="not_json")]},
            {"eval_time": "10m", "alertname": "ShiftwatchSamplesRejected", "exp_alerts": []},
            {"eval_time": "45m", "alertname": "ShiftwatchSamplesRejected",
             "exp_alerts": [_alert("ShiftwatchSamplesRejected", instance="edge1:9650", stream=fill_b)]},
        ]},
        {"interval": "1m", "input_series": [
            # Two shards on one box: the rules keep each shard's alerts apart.
            {"series": f'shiftwatch_messages_dropped_total{{{sel},shard="0",reason="not_json"}}',
             "values": "0+1x40"},
            {"series": f'shiftwatch_messages_dropped_total{{{sel},shard="1",reason="not_json"}}',
             "values": "0+60x40"},
            {"series": f'shiftwatch_broker_connected{{{sel},shard="0"}}', "values": "1x10"},
            {"series": f'shiftwatch_broker_connected{{{sel},shard="1"}}', "values": "1 0x10"},
            # Shard 1 started with a shard.of the others do not run: held from minute 1 on.
            {"series": f'shiftwatch_shard_of_disputed{{{sel},shard="0"}}', "values": "0x10"},
            {"series": f'shiftwatch_shard_of_disputed{{{sel},shard="1"}}', "values": "0 1x10"},
        ], "alert_rule_test": [
            {"eval_time": "4m", "alertname": "ShiftwatchShardCountDisputed", "exp_alerts": []},  # not yet for 5m
            {"eval_time": "7m", "alertname": "ShiftwatchShardCountDisputed",
             "exp_alerts": [_alert("ShiftwatchShardCountDisputed", **a, shard="1")]},
            {"eval_time": "30m", "alertname": "ShiftwatchMessagesDropped",
             "exp_alerts": [_alert("ShiftwatchMessagesDropped", instance="edge1:9650", shard="1",
                                   reason="not_json")]},
            {"eval_time": "5m", "alertname": "ShiftwatchBrokerDisconnected",
             "exp_alerts": [_alert("ShiftwatchBrokerDisconnected", **a, shard="1")]},
        ]},
        {"interval": "1m", "input_series": [
            {"series": 'up{job="node",instance="edge1:9100"}', "values": "1x20"},
        ], "alert_rule_test": [
            {"eval_time": "5m", "alertname": "ShiftwatchAbsent", "exp_alerts": []},
            {"eval_time": "15m", "alertname": "ShiftwatchAbsent",
             "exp_alerts": [_alert("ShiftwatchAbsent", job="shiftwatch")]},
        ]},
    ]
    spec = tmp_path / "shiftwatch.rules.test.yml"
    spec.write_text(yaml.safe_dump({"rule_files": [str(RULES)], "evaluation_interval": "1m",
                                    "tests": tests}, sort_keys=False))
    res = subprocess.run([promtool(), "test", "rules", str(spec)], check=False, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stdout + res.stderr
    assert "SUCCESS" in res.stdout


# -------------------------------------------------------------- dashboard
def test_the_dashboard_is_a_well_formed_grafana_dashboard() -> None:
    # Grafana's dashboard JSON model (Grafana documentation, "JSON model"):
    # panels with unique ids, grid positions on a 24-column grid and targets.
    dash = json.loads(DASHBOARD.read_text())
    assert dash["title"] and dash["uid"] and isinstance(dash["schemaVersion"], int)
    ids = [p["id"] for p in dash["panels"]]
    assert len(ids) == len(set(ids))
    variables = {v["name"] for v in dash["templating"]["list"]}
    assert {"datasource", "job", "stream"} <= variables
    for p in dash["panels"]:
        g = p["gridPos"]
        assert 0 <= g["x"] and g["x"] + g["w"] <= 24 and g["h"] > 0, p["title"]
        if p["type"] in ("row", "text"):
            continue
        assert p["datasource"]["uid"] == "${datasource}" and p["targets"], p["title"]
        for t in p["targets"]:
            assert t["expr"].strip() and t["refId"]
            used = set(re.findall(r"\$(\w+)", t["expr"]))
            assert used <= variables | {"__rate_interval", "__range"}, (p["title"], used)
    titles = " ".join(p["title"].lower() for p in dash["panels"])
    for wanted in ("level", "sigma", "alert records", "broker", "ingest", "drops"):
        assert wanted in titles, wanted
    # The level panel is repeated per unit (Grafana documentation, "Configure repeating panels":
    # repeat names a variable with several values), with the unit in its title and axis label,
    # so no axis mixes units.
    levels = [p for p in dash["panels"] if p["title"].startswith("Level")]
    per_unit = next(p for p in levels if p.get("repeat") == "unit")
    assert "$unit" in per_unit["title"] and per_unit["fieldConfig"]["defaults"]["custom"]["axisLabel"] == "$unit"
    assert 'unit="$unit"' in per_unit["targets"][0]["expr"]
    unit_var = next(v for v in dash["templating"]["list"] if v["name"] == "unit")
    assert unit_var["multi"] and unit_var["includeAll"]
    assert "shiftwatch_stream_display_info" in unit_var["query"]["query"]
    # Streams without a unit have a panel of their own; every level query shows one unit only.
    assert any('unit!=""' in p["targets"][0]["expr"] and "unless" in p["targets"][0]["expr"] for p in levels)
    # Confirmed steps and planned changes are marked from the metrics (Grafana documentation,
    # "Annotations": a Prometheus query whose series become annotations).
    marks = {a["name"]: a for a in dash["annotations"]["list"]}
    assert 'phase="confirmed"' in marks["Confirmed steps"]["expr"]
    assert 'phase="planned"' in marks["Planned changes"]["expr"]
    for a in marks.values():
        assert a["datasource"]["uid"] == "${datasource}" and a["enable"] and a["step"]
    # The caution is on the board itself, at the top (a dashboard's description is not shown).
    top = min(dash["panels"], key=lambda p: (p["gridPos"]["y"], p["gridPos"]["x"]))
    assert top["type"] == "text" and top["gridPos"]["w"] == 24
    text = top["options"]["content"]
    for words in ("not a safety function", "safety instrumented system", "interlock", "site procedures",
                  "local codes and licensed practice"):
        assert words in text.lower() or words in text, words


def test_the_rules_say_what_the_daemon_does_and_point_to_a_readme_section_that_exists() -> None:
    text = RULES.read_text()
    headings = {line.lstrip("#").strip() for line in (ROOT / "README.md").read_text().splitlines()
                if line.startswith("#")}
    named = re.findall(r'see the README, "([^"]+)"', text)
    assert named and all(n in headings for n in named), (named, sorted(headings))
    # The README ("State, restarts and signals") and the daemon pause reading at the queue bound: nothing is dropped.
    falling = text.split("ShiftwatchFallingBehind")[1].split("- alert:")[0]
    assert "dropped (reason queue_full)" not in falling and "stops reading from the broker" in falling


def test_every_dashboard_query_is_valid_promql(tmp_path: Path) -> None:
    queries = dashboard_queries()
    rules = {"groups": [{"name": "dashboard", "rules": [
        {"record": f"dashboard:query_{i}", "expr": fill_grafana_variables(q)} for i, q in enumerate(queries)]}]}
    path = tmp_path / "dashboard-queries.yml"
    path.write_text(yaml.safe_dump(rules))
    res = subprocess.run([promtool(), "check", "rules", str(path)], check=False, capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stdout + res.stderr
    assert f"SUCCESS: {len(queries)} rules found" in res.stdout


# ------------------------------------------------ names on the real endpoint
STREAMS = """\
  - topic: brackenfield/line2/filler/+/fill
    format: json
    value: weight_g
    time: ts
    unit: g
    label: "fill weight on filler {1}"
"""


@pytest.fixture
def fed_daemon(daemon_factory, collector, publisher) -> Iterator[tuple[Any, Any]]:
    """The real daemon after a step, a duplicate time and a bad message (so every family has samples)."""
    d = daemon_factory(STREAMS).start()
    alerts = collector("sw/alerts/#")
    topic = "brackenfield/line2/filler/head7/fill"
    x = 500.0 + 0.6 * np.random.default_rng(11).standard_normal(800)
    x[500:] += 1.2
    for i, v in enumerate(x):
        publisher.publish(topic, json.dumps({"weight_g": round(float(v), 3), "ts": int((T0 + i) * 1000)}))
        if i == 300:
            publisher.publish(topic, json.dumps({"weight_g": 500.0, "ts": int((T0 + i) * 1000)}))  # duplicate_time
            publisher.publish(topic, b"not json")
    assert alerts.wait_for(lambda items: any(isinstance(b, dict) and b.get("phase") == "confirmed"
                                             for _, b in items))
    yield d, alerts
    d.stop()


def test_every_metric_the_dashboard_and_rules_use_is_on_the_real_endpoint(fed_daemon) -> None:
    d, _ = fed_daemon
    deadline = time.monotonic() + 20
    while True:
        text = d.scrape()
        exposed = {s.name for fam in text_string_to_metric_families(text) for s in fam.samples}
        if "shiftwatch_last_shift_timestamp_seconds" in exposed and \
                "shiftwatch_samples_rejected_total" in exposed and "shiftwatch_messages_dropped_total" in exposed:
            break
        assert time.monotonic() < deadline, sorted(exposed)
        time.sleep(0.1)
    used: dict[str, set[str]] = {}
    for q in dashboard_queries():
        for n in metric_names(q):
            used.setdefault(n, set()).add("dashboard")
    for r in load_rules():
        for n in metric_names(r["expr"]):
            used.setdefault(n, set()).add(f"rule {r['alert']}")
    missing = {n: sorted(where) for n, where in used.items() if n not in exposed and n not in PROMETHEUS_OWN}
    assert not missing, f"used but not exposed by the daemon: {missing}"
    # The names are real sample names, with the suffixes the exposition gives
    # them: counters end in _total, the histogram is used through _bucket.
    assert "shiftwatch_alert_delay_seconds_bucket" in used
    assert all(not n.endswith("_total") or n in exposed for n in used)
    # The dashboard covers what the issue lists.
    for wanted in ("shiftwatch_level", "shiftwatch_sigma", "shiftwatch_alert_records_total",
                   "shiftwatch_broker_connected", "shiftwatch_messages_received_total",
                   "shiftwatch_messages_dropped_total", "shiftwatch_stream_display_info"):
        assert "dashboard" in used.get(wanted, set()), wanted


def test_alerts_name_the_stream_by_its_label_in_the_record_and_the_log(fed_daemon) -> None:
    d, alerts = fed_daemon
    conf = alerts.records("confirmed")[0]
    assert conf["label"] == "fill weight on filler head7"
    # "fill weight on filler head7 stepped up 1.2 g (2 sigma) at 2026-09-21 00:21:40Z, detected 9 s
    # later: ..." (the samples are stamped on another day than today, so the date is given)
    m = re.fullmatch(r"CONFIRMED fill weight on filler head7 stepped up ([\d.]+) g \(([\d.]+) sigma\) "
                     r"at (\d{4}-\d\d-\d\d \d\d:\d\d:\d\d)Z, detected ([\d.]+) s later: ([\d.]+) -> ([\d.]+) g",
                     conf["summary"])
    assert m, conf["summary"]
    assert float(m.group(1)) == pytest.approx(abs(conf["delta"]), rel=0.01)
    assert float(m.group(2)) == pytest.approx(conf["delta_sigma"], abs=0.05)
    assert m.group(3) == conf["shift_at"][:10] + " " + conf["shift_at"][11:19]
    from shiftwatch.core.timefmt import parse_time

    lag = parse_time(conf["detected_at"]) - parse_time(conf["shift_at"])
    assert float(m.group(4)) == pytest.approx(lag, abs=0.51)
    assert d.stop() == 0
    log = d.log_text()
    assert conf["summary"] in log
    assert "[stream brackenfield/line2/filler/head7/fill, id " in log


def test_the_level_panels_and_the_step_marks_select_what_they_say(tmp_path: Path) -> None:
    # promtool's PromQL unit tests (Prometheus documentation, "Unit testing for rules",
    # promql_expr_test): the dashboard's own queries, Grafana's variables filled in,
    # evaluated on synthetic series at one-minute steps.
    dash = json.loads(DASHBOARD.read_text())
    levels = {p["title"]: p["targets"][0]["expr"] for p in dash["panels"] if p["title"].startswith("Level")}
    marks = {a["name"]: a["expr"] for a in dash["annotations"]["list"]}
    sel = 'job="shiftwatch",instance="edge1:9650"'
    fill, oven, bare = ("brackenfield/line2/filler/head1/fill", "brackenfield/line2/oven/zone3",
                        "brackenfield/line2/spare")

    def fill_in(expr: str, unit: str = "g") -> str:
        return fill_grafana_variables(expr).replace('unit="g"', f'unit="{unit}"')

    series = [
        {"series": f'shiftwatch_level{{{sel},stream="{fill}"}}', "values": "500x10"},
        {"series": f'shiftwatch_level{{{sel},stream="{oven}"}}', "values": "180x10"},
        {"series": f'shiftwatch_level{{{sel},stream="{bare}"}}', "values": "3x10"},
        {"series": f'shiftwatch_stream_display_info{{{sel},stream="{fill}",label="fill weight head1",unit="g"}}',
         "values": "1x10"},
        {"series": f'shiftwatch_stream_display_info{{{sel},stream="{oven}",unit="Cel"}}', "values": "1x10"},
        {"series": f'shiftwatch_stream_display_info{{{sel},stream="{bare}"}}', "values": "1x10"},
        # head1's first confirmed step at 3m (the series appears), a second at 6m; a planned change at 8m.
        {"series": f'shiftwatch_alert_records_total{{{sel},stream="{fill}",phase="confirmed"}}',
         "values": "_ _ _ 1 1 1 2 2 2 2 2"},
        {"series": f'shiftwatch_alert_records_total{{{sel},stream="{fill}",phase="planned"}}',
         "values": "0 0 0 0 0 0 0 0 1 1 1"},
    ]
    head1 = {"job": "shiftwatch", "instance": "edge1:9650", "stream": fill}
    info = {"label": "fill weight head1", "unit": "g"}

    def lbl(d: dict[str, str]) -> str:
        return "{" + ",".join(f'{k}="{v}"' for k, v in sorted(d.items())) + "}"

    per_unit = next(e for t, e in levels.items() if "$unit" in t)
    no_unit = next(e for t, e in levels.items() if "without a unit" in t)
    checks = [
        {"expr": fill_in(per_unit), "eval_time": "5m",
         "exp_samples": [{"labels": lbl({**head1, **info}), "value": 500}]},
        {"expr": fill_in(per_unit, "Cel"), "eval_time": "5m",
         "exp_samples": [{"labels": lbl({**head1, "stream": oven, "unit": "Cel"}), "value": 180}]},
        {"expr": fill_in(no_unit), "eval_time": "5m",
         "exp_samples": [{"labels": f'shiftwatch_level{lbl({**head1, "stream": bare})}', "value": 3}]},
    ]
    conf = lbl({**head1, **info, "phase": "confirmed"})
    for t, want in (("2m", []), ("3m", [{"labels": conf, "value": 1}]), ("4m", []), ("5m", []),
                    ("6m", [{"labels": conf, "value": 1}]), ("7m", [])):
        checks.append({"expr": fill_in(marks["Confirmed steps"]), "eval_time": t, "exp_samples": want})
    planned = lbl({**head1, **info, "phase": "planned"})
    for t, want in (("7m", []), ("8m", [{"labels": planned, "value": 1}]), ("9m", [])):
        checks.append({"expr": fill_in(marks["Planned changes"]), "eval_time": t, "exp_samples": want})
    spec = tmp_path / "dashboard.test.yml"
    spec.write_text(yaml.safe_dump({"rule_files": [], "evaluation_interval": "1m", "tests": [
        {"interval": "1m", "input_series": series, "promql_expr_test": checks}]}, sort_keys=False))
    res = subprocess.run([promtool(), "test", "rules", str(spec)], check=False, capture_output=True,
                         text=True, timeout=120)
    assert res.returncode == 0, res.stdout + res.stderr
    assert "SUCCESS" in res.stdout
