"""The shard examples in config/: the NATS settings are accepted by the real
nats-server and hold the mapping the shard tests use; the Kubernetes StatefulSet
is well formed and its shiftwatch configuration validates."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest
import yaml

from shiftwatch.config import parse_config

from .natskit import find_nats_server, partition_mapping
from .shardrun import HASHED_LEVELS

ROOT = Path(__file__).resolve().parents[2]
NATS_EXAMPLE = ROOT / "config" / "nats-partitions.conf"
STATEFULSET = ROOT / "config" / "shiftwatch.statefulset.yaml"


def test_the_nats_example_is_valid_for_nats_server(tmp_path: Path) -> None:
    exe = find_nats_server()
    if exe is None:
        pytest.fail("nats-server is not installed (tests/install-and-test.sh installs it)")
    shutil.copy(NATS_EXAMPLE, tmp_path / "nats-partitions.conf")
    main = tmp_path / "nats.conf"
    main.write_text(f'server_name: check\njetstream {{ store_dir: "{tmp_path / "js"}" }}\n'
                    'include "nats-partitions.conf"\n')
    res = subprocess.run([exe, "-t", "-c", str(main)], capture_output=True, text=True, timeout=30,
                         check=False)
    assert res.returncode == 0 and "is valid" in res.stdout + res.stderr, res.stdout + res.stderr
    # The tests' clusters use the documented mapping (natskit.partition_mapping).
    assert partition_mapping(3) in NATS_EXAMPLE.read_text()


def test_the_statefulset_example_runs_one_shard_per_pod() -> None:
    # Kubernetes API objects (kubernetes.io, "StatefulSets", "Downward API"): apps/v1
    # StatefulSet with a pod template; the pod index label exists from Kubernetes 1.28.
    docs = list(yaml.safe_load_all(STATEFULSET.read_text()))
    kinds = {d["kind"]: d for d in docs}
    assert set(kinds) == {"ConfigMap", "StatefulSet"}
    sts = kinds["StatefulSet"]
    assert sts["apiVersion"] == "apps/v1"
    cfg = parse_config(kinds["ConfigMap"]["data"]["shiftwatch.yaml"], file="statefulset")
    assert cfg.shard is not None and cfg.cluster is not None and cfg.state.keep == "cluster"
    assert sts["spec"]["replicas"] == cfg.shard.of
    assert cfg.shard.metrics_port == "same" and cfg.broker.mqtt_version == "3.1.1"
    pod = sts["spec"]["template"]["spec"]
    c = pod["containers"][0]
    assert c["command"][-2:] == ["--shard", "$(SHARD)"]
    env = {e["name"]: e for e in c["env"]}
    assert env["SHARD"]["valueFrom"]["fieldRef"]["fieldPath"] == \
        "metadata.labels['apps.kubernetes.io/pod-index']"
    labels = sts["spec"]["template"]["metadata"]["labels"]
    assert sts["spec"]["selector"]["matchLabels"].items() <= labels.items()
    # The hashed levels are those of the mapping the example and the shard tests use
    # (the partition function is checked against the real server in test_shards.py).
    assert cfg.shard.hashed_levels == HASHED_LEVELS
    # The configuration's redelivery wait is above the NATS example's ack_wait.
    assert cfg.cluster.redelivery_wait > 5.0 and 'ack_wait: "5s"' in NATS_EXAMPLE.read_text()
