"""The shard and cluster sections: their errors, the per-shard view, and a cluster
that cannot be reached (one line naming it, no traceback)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from shiftwatch.broker import free_port
from shiftwatch.config import ConfigError, for_shard, parse_config
from shiftwatch.metrics import WithLabels

BASE = "streams:\n  - topic: brackenfield/+/+/fill\n"


@pytest.mark.parametrize("text, expected", [
    ("shard: {number: 3, of: 3}\n", "plant.yaml:3: shard.number: must be 0 to shard.of - 1 (2), got 3"),
    ("shard: {of: 3}\n", "plant.yaml:3: shard.number: is required"),
    ("shard: {number: 0, of: 2, topic_prefix: 'part/+'}\n",
     "plant.yaml:3: shard.topic_prefix: must be plain topic levels without + or #, got 'part/+'"),
    ("state: {keep: cluster}\n",
     ("plant.yaml:3: state.keep: cluster needs a cluster section (cluster.servers: the NATS servers "
      "that hold the state)")),
    ("cluster: {servers: [mqtt://a:1883]}\n",
     "plant.yaml:3: cluster.servers: must be a list of nats://host:port (or tls://) URLs"),
    ("cluster: {servers: [nats://a:4222], replicas: 7}\n", "plant.yaml:3: cluster.replicas: must be 1 to 5, got 7"),
    ("cluster: {servers: [nats://a:4222], lease: 1s}\n",
     "plant.yaml:3: cluster.lease: must be at least 3s (it is renewed every third)"),
    ("cluster: {servers: [nats://a:4222], name: 'a.b'}\n",
     "plant.yaml:3: cluster.name: must be 1 to 64 letters, digits, - or _, got 'a.b'"),
])
def test_bad_shard_and_cluster_settings_name_the_key(text: str, expected: str) -> None:
    with pytest.raises(ConfigError) as err:
        parse_config(BASE + text, file="plant.yaml")
    assert str(err.value) == expected


def test_a_shard_gets_its_own_directory_client_id_and_port() -> None:
    cfg = parse_config(BASE + "broker: {client_id: bf}\nmetrics: {listen: '127.0.0.1:9650'}\n"
                       "state: {dir: /var/lib/shiftwatch}\nshard: {number: 0, of: 4}\n")
    two = for_shard(cfg, 2)
    assert two.shard is not None and two.shard.number == 2 and two.shard.prefix == "part/2/"
    assert two.state.dir == "/var/lib/shiftwatch/shard-2"
    assert two.broker.client_id == "bf-shard-2"
    assert two.metrics.listen == "127.0.0.1:9652"
    with pytest.raises(ConfigError, match="--shard must be 0 to 3"):
        for_shard(cfg, 4)
    with pytest.raises(ConfigError, match="--shard needs a shard section"):
        for_shard(parse_config(BASE), 1)
    assert for_shard(parse_config(BASE)) == parse_config(BASE)  # one box: unchanged


def test_the_shard_label_is_on_every_series() -> None:
    # Prometheus text exposition format 0.0.4 (prometheus.io, "Exposition formats"):
    # labels in braces after the name; prometheus_client's own parser reads it back.
    from prometheus_client import CollectorRegistry, Counter, Gauge, generate_latest
    from prometheus_client.parser import text_string_to_metric_families

    reg = CollectorRegistry()
    Counter("bottles", "Bottles.", ["line"], registry=reg).labels("2").inc()
    Gauge("fill_level", "Fill level.", registry=reg).set(3)
    text = generate_latest(WithLabels(reg, {"shard": "1"})).decode()
    samples = [s for fam in text_string_to_metric_families(text) for s in fam.samples]
    assert samples and all(s.labels.get("shard") == "1" for s in samples)
    assert any(s.labels.get("line") == "2" for s in samples)


def test_an_unreachable_cluster_is_one_line_and_exit_status_2(tmp_path: Path) -> None:
    port = free_port()  # nothing listens there
    cfg = tmp_path / "sw.yaml"
    cfg.write_text(BASE + f"broker: {{url: 'mqtt://127.0.0.1:{free_port()}', mqtt_version: '3.1.1'}}\n"
                   f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / 'state'}', keep: cluster}}\n"
                   "shard: {number: 0, of: 2}\n"
                   f"cluster: {{servers: ['nats://127.0.0.1:{port}'], timeout: 2s}}\n")
    cfg.chmod(0o600)
    out = subprocess.run([sys.executable, "-m", "shiftwatch", "run", "--config", str(cfg), "--shard", "1"],
                         capture_output=True, text=True, timeout=60, check=False)
    assert out.returncode == 2, out.stdout + out.stderr
    text = out.stdout + out.stderr
    assert "Traceback" not in text
    assert f"cannot start: NATS cluster nats://127.0.0.1:{port} cannot be reached" in text, text


def test_a_held_stream_keeps_its_topic_through_a_reload_so_the_next_one_moves_it(tmp_path: Path) -> None:
    # A stream waiting for its last writer's answer (Daemon.moved.deferred) has no engine yet.
    # A reload pruned the stream-to-topic map down to the engines, so the held stream's
    # topic was forgotten, and a stream with no known topic counts as this shard's own:
    # at the next change of shard.of it stayed held here although the mapping had moved
    # it on (found by reading; the partitions here are NATS's, see shiftwatch.partition).
    from shiftwatch.config import load_config
    from shiftwatch.daemon import Daemon
    from shiftwatch.metrics import Metrics
    from shiftwatch.partition import partition_of

    topic = "brackenfield/line1/head6/fill"  # partition 0 of 3 and of 5, not of 4
    levels = (2, 3, 4)
    assert [partition_of(topic, levels, n) for n in (3, 5)] == [0, 0] and partition_of(topic, levels, 4) != 0

    def config(of: int) -> Path:
        path = tmp_path / f"of{of}.yaml"
        path.write_text("streams:\n  - {topic: 'brackenfield/+/+/fill', format: json, value: v, time: ts}\n"
                        f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / 'state'}'}}\n"
                        f"shard: {{number: 0, of: {of}, hashed_levels: [2, 3, 4]}}\n")
        return path

    d = Daemon(load_config(str(config(3))), config_path=str(config(3)), metrics=Metrics())
    d.shards.note_topic(topic, topic)
    d.moved.deferred[topic] = float("inf")
    d.shards.reload(load_config(str(config(5))))  # still this shard's
    assert topic in d.moved.deferred and d.shards.topic_of.get(topic) == topic
    d.shards.reload(load_config(str(config(4))))  # moved away: it waits here no more
    # (the samples parked for it stay in the cluster for its next owner:
    # test_shard_parking.py)
    assert topic not in d.moved.deferred
