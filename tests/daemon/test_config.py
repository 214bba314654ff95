"""Configuration: one place validates it; errors name the key path and the line."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

from shiftwatch.config import ConfigError, json_schema, load_config, parse_config, topic_matches

ROOT = Path(__file__).resolve().parents[2]


def error_of(text: str) -> str:
    with pytest.raises(ConfigError) as exc:
        parse_config(text, file="plant.yaml")
    return str(exc.value)


def test_the_shipped_example_is_valid_and_means_what_it_says() -> None:
    cfg = load_config(ROOT / "config" / "shiftwatch.example.yaml")
    assert cfg.broker.client_id == "shiftwatch-line2"
    assert cfg.broker.session_expiry == 86400.0
    filler = cfg.settings_for("brackenfield/line2/filler/head3/fill")
    assert filler.min_shift_sigma == 1.5 and filler.false_alarm_every == 7 * 86400
    assert cfg.settings_for("brackenfield/line2/capper/torque").min_shift_sigma == 1.0
    assert cfg.stream_for("brackenfield/line2/capper/torque").unit == "N m"
    assert cfg.metrics.listen == "127.0.0.1:9650"  # loopback by default


def test_the_shipped_schema_is_generated_from_the_same_definitions() -> None:
    shipped = json.loads((ROOT / "config" / "shiftwatch.schema.json").read_text())
    assert shipped == json_schema()
    props = shipped["properties"]
    assert set(props) == {"broker", "streams", "detection", "alerts", "metrics", "state", "display",
                          "shard", "cluster"}
    assert props["detection"]["properties"]["test"]["enum"] == ["multi_cusum", "glr", "cusum", "page_hinkley", "adwin"]
    assert props["streams"]["items"]["required"] == ["topic"]


@pytest.mark.parametrize("text, expected", [
    ("detection:\n  min_shift_sigm: 1\n",
     "plant.yaml:2: detection.min_shift_sigm: unknown key; did you mean 'min_shift_sigma'?"),
    ("streams:\n  - topic: a/b\n    detection:\n      min_shift_sigma: -1\n",
     "plant.yaml:4: the 1st stream (streams[0]): detection.min_shift_sigma: must be positive, got -1"),
    ("streams:\n  - topic: a/b\n  - topic: c/#/d\n",
     "plant.yaml:3: the 2nd stream (streams[1]): topic: '#' must be a whole last level of the filter: 'c/#/d'"),
    ("streams:\n  - format: json\n", "plant.yaml:2: the 1st stream (streams[0]): topic: is required"),
    ("broker:\n  url: http://x\n",
     "plant.yaml:2: broker.url: must start with mqtt:// or mqtts://, got 'http://x'"),
    ("shard:\n  number: 0\n  of: 3\n  hashed_levels: [2, 0]\n",
     ("plant.yaml:4: shard.hashed_levels: must be a list of topic level numbers counted from 1, e.g. "
      "[2, 3, 4], got [2, 0]")),
    ("shard:\n  number: 0\n  of: 3\n  hashed_levels: [2, 3, 2]\n",
     "plant.yaml:4: shard.hashed_levels: names a level twice: [2, 3, 2]"),
    ("broker:\n  mqtt_version: 4\n",
     "plant.yaml:2: broker.mqtt_version: must be text, one of '5', '3.1.1', got 4"),
    ("broker:\n  receive_maximum: 70000\n",
     "plant.yaml:2: broker.receive_maximum: must be 1 to 65535, got 70000"),
    ("detection: {false_alarm_every: soon}\n",
     "plant.yaml:1: detection.false_alarm_every: not a duration: 'soon'"),
    ("metrics: {listen: nowhere}\n",
     ("plant.yaml:1: metrics.listen: must be HOST:PORT (e.g. \"127.0.0.1:9650\", a port of 0 to 65535), "
      "got 'nowhere'")),
    ("alerts: {topic_prefix: 'a/+/b'}\n", "plant.yaml:1: alerts.topic_prefix: must be a plain topic"),
    ('alerts: {topic_prefix: "a/\\x01b"}\n', "plant.yaml:1: alerts.topic_prefix: must be a plain topic"),
    ("alerts: {topic_prefix: '" + "l/" * 32 + "x'}\n",
     "plant.yaml:1: alerts.topic_prefix: must be a plain topic of at most 32 levels"),
    ("brokr: {}\n", "plant.yaml:1: brokr: unknown key; did you mean 'broker'?"),
    ("streams: {topic: a}\n", "plant.yaml:1: streams: must be a list of stream entries"),
    ("detection: [1, 2]\n", "plant.yaml:1: detection: must be a mapping of keys to values"),
    ("detection:\n  warmup_samples: 1000\n",
     "plant.yaml:2: detection.window_samples: must be at least twice warmup_samples"),
    ("a: [\n", "plant.yaml:2: not valid YAML"),
    # Two YAML documents (a Kubernetes manifest, say): PyYAML's problem alone read "but found another
    # document"; its context says what was expected (PyYAML's own two-part message).
    ("streams:\n  - topic: a\n---\nkind: Service\n",
     "plant.yaml:3: not valid YAML: expected a single document in the stream, but found another document"),
    ("detection: {}\ndetection: {}\n", "plant.yaml:2: detection: key appears twice"),
])
def test_errors_name_the_line_and_the_key_path(text: str, expected: str) -> None:
    assert error_of(text).startswith(expected)


def test_per_stream_overrides_layer_on_the_defaults() -> None:
    cfg = parse_config("streams:\n  - topic: a/+\n    detection: {test: cusum}\n"
                       "detection: {min_shift_sigma: 2, false_alarm_every: 30d}\n")
    s = cfg.settings_for("a/x")
    assert (s.test, s.min_shift_sigma, s.false_alarm_every) == ("cusum", 2.0, 30 * 86400.0)
    assert cfg.settings_for("b").test == "multi_cusum"


def test_topic_filters_follow_mqtt_rules() -> None:
    # MQTT 5.0 specification, section 4.7 (topic filters and wildcards).
    assert topic_matches("sport/tennis/player1/#", "sport/tennis/player1")
    assert topic_matches("sport/tennis/player1/#", "sport/tennis/player1/ranking")
    assert topic_matches("sport/+/player1", "sport/tennis/player1")
    assert not topic_matches("sport/+", "sport/tennis/player1")
    assert topic_matches("+/+", "/finance")
    assert not topic_matches("sport/tennis/+", "sport/tennis")


def test_check_prints_resolved_settings_without_secrets(cli, tmp_path: Path) -> None:
    pw = tmp_path / "broker.password"
    pw.write_text("s3cret-line2\n")
    os.chmod(pw, 0o644)
    cfg = tmp_path / "plant.yaml"
    cfg.write_text(f"broker:\n  username: sw\n  password_file: {pw}\n"
                   f"streams:\n  - topic: a/+\nstate:\n  dir: {tmp_path}\nmetrics:\n  listen: 127.0.0.1:0\n")
    res = cli("check", "--config", str(cfg), "--no-network")
    assert res.returncode == 0, res.stderr
    # Durations are printed in a form the file accepts back.
    assert "min_shift_sigma: 1.0" in res.stdout and "false_alarm_every: 7d" in res.stdout
    assert "s3cret" not in res.stdout + res.stderr
    assert "readable by other users" in res.stderr
    bad = tmp_path / "bad.yaml"
    bad.write_text("detection:\n  test: ewma\n")
    res = cli("check", "--config", str(bad))
    assert res.returncode == 2
    assert f"{bad}:2: detection.test: 'ewma' is not one of multi_cusum, glr, cusum, page_hinkley, adwin" in res.stderr


def test_schema_command_prints_the_shipped_schema(cli) -> None:
    res = cli("schema")
    assert res.returncode == 0
    assert json.loads(res.stdout) == json_schema()


def test_senml_streams_find_their_entry_after_a_restart() -> None:
    # A SenML stream is named topic/name; restore and reload look its entry up
    # by that name, and names may hold '/' themselves.
    cfg = load_config(ROOT / "config" / "shiftwatch.example.yaml")
    for name in ("brackenfield/line2/oven/senml/zone3_temp", "brackenfield/line2/oven/senml/urn:x/zone4"):
        spec = cfg.stream_for(name)
        assert spec is not None and spec.format == "senml"
    # ... but a JSON stream's topic with an extra level is not taken for it.
    assert cfg.stream_for("brackenfield/line2/capper/torque/extra") is None


@pytest.mark.parametrize("text, expected", [
    ("alerts: {qos: 3}\n", "plant.yaml:1: alerts.qos: must be 0, 1 or 2, got 3"),
    ("detection: {min_shift_sigma: 10}\n", "plant.yaml:1: detection.min_shift_sigma: must be at most 4"),
    ("detection: {baseline_guard: 300}\n", "plant.yaml:1: detection.baseline_guard: must be below"),
    # A floor whose square underflows (IEEE 754 doubles: normal down to about 2.2e-308) made
    # a flat stream's statistics divide by zero and stop the daemon.
    ("detection: {min_sigma: 1.0e-300}\n", "plant.yaml:1: detection.min_sigma: must be null or a finite number"),
])
def test_settings_that_would_break_detection_are_refused(text: str, expected: str) -> None:
    assert error_of(text).startswith(expected)


def test_the_lowest_sigma_floor_accepted_keeps_a_flat_stream_running() -> None:
    """At the lowest ``min_sigma`` check accepts, a stream that holds one value and then
    steps is still processed, and the step is confirmed (1.0e-300 raised ZeroDivisionError)."""
    import numpy as np

    from shiftwatch.core.engine import StreamEngine
    from shiftwatch.core.settings import MIN_SIGMA_LOWEST

    spec = parse_config(f"detection: {{min_sigma: {MIN_SIGMA_LOWEST:.1e}}}\n").detection
    eng = StreamEngine("flat", spec)
    t = np.arange(1000.0)
    x = np.where(t < 600, 5.0, 6.0)
    phases = [r.phase for r in eng.process(t, x).records]
    assert "confirmed" in phases


def test_labels_name_streams_the_way_operators_do() -> None:
    cfg = load_config(ROOT / "config" / "shiftwatch.example.yaml")
    assert cfg.label_for("brackenfield/line2/filler/head3/fill") == "fill weight on filler head3"
    assert cfg.label_for("brackenfield/line2/oven/senml/zone3_temp") == "tunnel oven zone3_temp"
    assert cfg.label_for("brackenfield/line2/capper/torque") == "capper torque"
    assert cfg.label_for("brackenfield/line9/unknown") is None
    cfg = parse_config("streams:\n  - topic: 'plant/+/+/#'\n    label: '{2} on {1} ({#})'\n")
    assert cfg.label_for("plant/line2/filler7/weight/net") == "filler7 on line2 (weight/net)"
    assert parse_config("streams:\n  - topic: a/b\n").label_for("a/b") is None
    schema = json_schema()["properties"]["streams"]["items"]["properties"]["label"]
    assert "summaries" in schema["description"]


@pytest.mark.parametrize("text, expected", [
    ("streams:\n  - topic: plant/+/fill\n    label: 'filler {2}'\n",
     "plant.yaml:3: the 1st stream (streams[0]): label: placeholder {2} cannot be filled: the topic filter 'plant/+/fill' has 1 '+' level"),
    ("streams:\n  - topic: plant/fill\n    label: 'fill {#}'\n",
     "plant.yaml:3: the 1st stream (streams[0]): label: placeholder {#} cannot be filled: the topic filter 'plant/fill' does not end in '#'"),
    ("streams:\n  - topic: plant/fill\n    label: 'fill {name}'\n",
     "plant.yaml:3: the 1st stream (streams[0]): label: placeholder {name} cannot be filled: only SenML streams have a name"),
    ("streams:\n  - topic: plant/+/fill\n    label: 'filler {head}'\n",
     "plant.yaml:3: the 1st stream (streams[0]): label: placeholder {head} cannot be filled: use {1}, {2}, ..."),
    ("streams:\n  - topic: plant/+/fill\n    label: 'filler {1'\n",
     "plant.yaml:3: the 1st stream (streams[0]): label: unbalanced brace in 'filler {1'"),
    ("streams:\n  - topic: plant/+/fill\n    label: ''\n", "plant.yaml:3: the 1st stream (streams[0]): label: must not be empty"),
])
def test_bad_labels_are_refused_with_their_key_path(text: str, expected: str) -> None:
    assert error_of(text).startswith(expected), error_of(text)


FORMS = "(use a number with a unit: 250ms, 30s, 10min (or 10m), 12h, 7d or 2w)"


@pytest.mark.parametrize("text, expected", [
    # The first-hour report: a bare 7 passed as 7 seconds, and a replay gave 258 dismissals.
    ("detection:\n  false_alarm_every: 7\n", "plant.yaml:2: detection.false_alarm_every: 7 has no unit " + FORMS),
    ("detection:\n  false_alarm_every: '7'\n",
     "plant.yaml:2: detection.false_alarm_every: '7' has no unit " + FORMS),
    ("detection:\n  max_time_ahead: 600\n", "plant.yaml:2: detection.max_time_ahead: 600 has no unit"),
    ("streams:\n  - topic: a\n  - topic: b\n  - topic: c\n    detection: {max_time_behind: 2.5}\n",
     "plant.yaml:5: the 3rd stream (streams[2]): detection.max_time_behind: 2.5 has no unit"),
    ("broker:\n  session_expiry: 86400\n", "plant.yaml:2: broker.session_expiry: 86400 has no unit"),
    ("state:\n  snapshot_every: 60\n", "plant.yaml:2: state.snapshot_every: 60 has no unit"),
])
def test_a_duration_without_a_unit_is_refused_with_the_accepted_forms(text: str, expected: str) -> None:
    assert error_of(text).startswith(expected), error_of(text)


def test_durations_with_units_mean_what_they_say() -> None:
    cfg = parse_config("detection: {false_alarm_every: 7d, max_time_ahead: 10m, max_time_behind: 90 min}\n"
                       "broker: {session_expiry: 12h}\nstate: {snapshot_every: 250ms}\n")
    d = cfg.detection
    assert (d.false_alarm_every, d.max_time_ahead, d.max_time_behind) == (604800.0, 600.0, 5400.0)
    assert (cfg.broker.session_expiry, cfg.state.snapshot_every) == (43200.0, 0.25)


@pytest.mark.parametrize("text, expected", [
    # YAML reads an unquoted 5 as a number.
    ("broker:\n  mqtt_version: 5\n",
     'plant.yaml:2: broker.mqtt_version: must be text, got the number 5; write it in quotes: "5"'),
    ("metrics:\n  listen: 43143\n",
     'plant.yaml:2: metrics.listen: must be text in the form HOST:PORT, e.g. "127.0.0.1:9650", got 43143'),
    ("streams:\n  - topic: a\n  - topic: b\n  - topic: c\n    unit: 5\n",
     "plant.yaml:5: the 3rd stream (streams[2]): unit: must be text, got 5"),
    ("streams:\n" + "  - topic: a\n" * 11 + "  - {topic: b, formt: json}\n",
     "plant.yaml:13: the 12th stream (streams[11]): formt: unknown key; did you mean 'format'?"),
    ("display:\n  time_zone: Europe/Berln\n",
     "plant.yaml:2: display.time_zone: unknown time zone 'Europe/Berln'; did you mean 'Europe/Berlin'?"),
    ("display:\n  time_zone: 2\n",
     "plant.yaml:2: display.time_zone: must be an IANA time zone name such as 'Europe/Berlin'"),
])
def test_errors_say_what_to_write_instead(text: str, expected: str) -> None:
    assert error_of(text).startswith(expected), error_of(text)


def test_the_display_time_zone_defaults_to_utc_and_takes_iana_names() -> None:
    assert parse_config("{}\n").display.time_zone == "UTC"
    assert parse_config("display: {time_zone: America/Chicago}\n").display.time_zone == "America/Chicago"


def test_the_schema_holds_the_limits_check_enforces() -> None:
    import re

    det = json_schema()["properties"]["detection"]["properties"]
    # check refuses min_shift_sigma above 4 (test_settings_that_would_break_detection_are_refused).
    assert det["min_shift_sigma"]["maximum"] == 4 and det["min_shift_sigma"]["exclusiveMinimum"] == 0
    pattern = re.compile(det["false_alarm_every"]["pattern"])
    assert det["false_alarm_every"]["type"] == "string"
    assert all(pattern.match(t) for t in ("7d", "250ms", "10 min", "1.5h"))
    assert not any(pattern.match(t) for t in ("7", "60", "soon"))
    behind = det["max_time_behind"]["anyOf"]
    assert {"type": "null"} in behind and any(re.compile(b["pattern"]).match("2d") for b in behind if "pattern" in b)


# Broker URLs: the authority is host[:port] (RFC 3986, section 3.2); a port is decimal digits
# and TCP ports run 1 to 65535 (RFC 793; port 0 is reserved and means "any" to the socket
# API, so a client that connects to it reaches the default port instead: the tester's check
# said "accepted a connection" for mqtt://127.0.0.1:0, from the broker on 1883).  An MQTT
# connection has no path, query or fragment (MQTT 3.1.1 and 5.0 name host and port only).
@pytest.mark.parametrize("url, why", [
    ("mqtt://127.0.0.1:99999", "port 99999 is outside 1 to 65535"),
    ("mqtt://127.0.0.1:0", "port 0 is outside 1 to 65535"),
    ("mqtt://127.0.0.1:abc", "port 'abc' is not a number"),
    ("mqtt://:1883", "has no host"),
    ("mqtt://[zz]:1", "'[zz]' is not an IPv6 address"),
    ("mqtt://h:1/path", "must not have a path"),
    ("mqtt://h:1?x=1", "must not have a query"),
    ("mqtt://h:1#frag", "must not have a fragment"),
    ("mqtt://h:1:2", "port '1:2' is not a number"),
    ("mqtt://bad host:1", "'bad host' is not a host name"),
])
def test_a_broker_url_the_client_cannot_use_is_refused_at_load(url: str, why: str) -> None:
    msg = error_of(f'streams: [{{topic: a/b}}]\nbroker:\n  url: "{url}"\n')
    assert msg.startswith("plant.yaml:3: broker.url: "), msg
    assert why in msg, msg


@pytest.mark.parametrize("url, host, port, tls", [
    ("mqtt://127.0.0.1:1883", "127.0.0.1", 1883, False),
    ("mqtt://broker.brackenfield.example", "broker.brackenfield.example", 1883, False),  # MQTT's port (IANA)
    ("mqtts://broker.brackenfield.example", "broker.brackenfield.example", 8883, True),  # MQTT over TLS (IANA)
    ("mqtt://[::1]:1884", "::1", 1884, False),  # RFC 3986, 3.2.2: an IPv6 literal in brackets
    ("mqtt://h:65535/", "h", 65535, False),  # an empty path is no path
])
def test_a_good_broker_url_gives_the_host_and_port_the_client_connects_to(url: str, host: str, port: int,
                                                                          tls: bool) -> None:
    from shiftwatch.mqtt import parse_url

    cfg = parse_config(f'streams: [{{topic: a/b}}]\nbroker: {{url: "{url}"}}\n', file="plant.yaml")
    assert parse_url(cfg.broker.url) == (host, port, tls)


# YAML 1.1, which PyYAML implements, reads a float only with a dot: 1e-12 and 1e0 are text
# to it, while YAML 1.2's core schema (section 10.3.2 of the 1.2.2 specification) reads
# them as floats.  A numeric key takes such a plain scalar as the number it spells; PyYAML
# itself is the reference for which forms it leaves as text.
@pytest.mark.parametrize("form", ["1e-12", "1E-12", "5e-3", "+1e0", "1e0", "2e+0", "1.5e0"])
def test_a_float_yaml_1_1_reads_as_text_is_taken_as_the_number_it_spells(form: str) -> None:
    import yaml

    key = "min_sigma" if form.lstrip("+").startswith(("1e-", "1E-", "5e-")) else "min_shift_sigma"
    spec = parse_config(f"streams: [{{topic: a/b}}]\ndetection: {{{key}: {form}}}\n", file="plant.yaml")
    got = getattr(spec.detection, key)
    assert got == float(form)  # Python's float() as the reference for the value
    if "." not in form:
        assert isinstance(yaml.safe_load(form), str)  # text to PyYAML: the case this covers


def test_a_quoted_number_or_a_number_word_stays_refused() -> None:
    # Quoted, it is text on purpose; nan, 1_0e0 and 1e are not decimal floats of YAML 1.2.
    for form in ('"1e-12"', "nan", "1_0e0", "1e", "e5", "1e-12x"):
        msg = error_of(f"streams: [{{topic: a/b}}]\ndetection: {{min_sigma: {form}}}\n")
        assert msg.startswith("plant.yaml:2: detection.min_sigma: "), msg


# Filter subsumption: every topic the second filter matches, the first matches too (MQTT
# 3.1.1, section 4.7 and MQTT 5.0, section 4.7: '+' one level, '#' the parent and every
# level below it ("sport/#" matches "sport"), and a wildcard at the first level matches no
# topic that starts with '$').
@pytest.mark.parametrize("first, second, covers", [
    ("#", "plant/line2/+/fill", True),
    ("plant/#", "plant", True),  # 4.7.1.2: "sport/#" also matches "sport"
    ("plant/+/#", "plant", False),
    ("plant/+/fill", "plant/line2/fill", True),
    ("plant/+/fill", "plant/+/fill", True),
    ("plant/line2/fill", "plant/+/fill", False),
    ("plant/+", "plant/#", False),
    ("plant/+/+", "plant/+", False),
    ("+/+", "plant/line2", True),
    ("#", "$SYS/broker/load", False),  # 4.7.2: wildcards at the first level skip $ topics
    ("+/broker/load", "$SYS/broker/load", False),
    ("$SYS/#", "$SYS/broker/load", True),
])
def test_filter_subsumption_follows_the_mqtt_matching_rules(first: str, second: str, covers: bool) -> None:
    from shiftwatch.config import filter_covers

    assert filter_covers(first, second) is covers
    # Cross-checked with the matcher the daemon uses, on the topics the second filter names
    # with its wildcards filled in (a sample, not a proof).
    if covers:
        for topic in (second.replace("/#", "/x/y").replace("#", "x").replace("+", "x"),
                      second.replace("/#", "").replace("+", "q")):
            if topic and topic_matches(second, topic):
                assert topic_matches(first, topic), topic


def test_entries_an_earlier_entry_shadows_are_named() -> None:
    from shiftwatch.config import shadowed_entries

    cfg = parse_config("streams:\n  - topic: brackenfield/line2/#\n  - topic: brackenfield/line2/oven/+\n"
                       "  - topic: brackenfield/line3/+\n  - topic: brackenfield/+/capper\n",
                       file="plant.yaml")
    assert shadowed_entries(cfg) == [(1, 0)]
