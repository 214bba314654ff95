"""`shiftwatch check` tries what it can without side effects: the state directory, the
metrics port, the files the daemon reads, and the broker.

The first-hour report: a `state.dir` that was a file and a metrics port already in use
both passed `check` and failed at start.  Every test here runs the real command line in a
subprocess against a private Mosquitto (or a port nothing listens on).
"""

from __future__ import annotations

import os
import socket
import subprocess
from pathlib import Path

import pytest

from shiftwatch.broker import MosquittoBroker, free_port


def write(tmp_path: Path, text: str, name: str = "plant.yaml") -> Path:
    p = tmp_path / name
    p.write_text(text)
    os.chmod(p, 0o600)
    return p


def test_a_state_dir_that_is_a_file_and_a_taken_port_are_problems(cli, tmp_path: Path, broker) -> None:
    not_a_dir = tmp_path / "state"
    not_a_dir.write_text("oops\n")
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen(1)
        port = taken.getsockname()[1]
        cfg = write(tmp_path, f"broker: {{url: '{broker.url}'}}\nstreams:\n  - topic: a/+\n"
                    f"metrics: {{listen: '127.0.0.1:{port}'}}\nstate: {{dir: '{not_a_dir}'}}\n")
        res = cli("check", "--config", str(cfg))
    assert res.returncode == 1, res.stderr
    assert f"state.dir {not_a_dir}: is a file, not a directory" in res.stderr
    assert f"metrics.listen 127.0.0.1:{port}: cannot listen there: Address already in use" in res.stderr
    assert f"ok: broker {broker.url}: accepted a connection" in res.stdout
    assert "2 problem(s)" in res.stderr


def test_a_good_configuration_passes_and_check_leaves_nothing_behind(cli, tmp_path: Path, broker) -> None:
    state = tmp_path / "var" / "lib" / "shiftwatch"
    port = free_port()
    cfg = write(tmp_path, f"broker: {{url: '{broker.url}', client_id: line2}}\nstreams:\n  - topic: a/+\n"
                f"metrics: {{listen: '127.0.0.1:{port}'}}\nstate: {{dir: '{state}'}}\n")
    res = cli("check", "--config", str(cfg))
    assert res.returncode == 0, res.stderr
    assert f"ok: state.dir {state}: does not exist yet; the daemon will make it in {tmp_path}" in res.stdout
    assert f"ok: metrics.listen 127.0.0.1:{port}: free" in res.stdout
    assert f"ok: broker {broker.url}: accepted a connection" in res.stdout
    assert not (tmp_path / "var").exists()  # nothing created
    with socket.socket() as s:  # the port was released
        s.bind(("127.0.0.1", port))


def test_a_broker_that_does_not_answer_is_a_problem_unless_the_network_is_skipped(cli, tmp_path: Path) -> None:
    url = f"mqtt://127.0.0.1:{free_port()}"  # nothing listens there
    cfg = write(tmp_path, f"broker: {{url: '{url}'}}\nstreams:\n  - topic: a/+\n"
                f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path}'}}\n")
    res = cli("check", "--config", str(cfg))
    assert res.returncode == 1
    assert f"broker {url}: cannot connect: connection refused (is the broker running" in res.stderr
    res = cli("check", "--config", str(cfg), "--no-network")
    assert res.returncode == 0, res.stderr
    assert f"ok: broker {url}: not tried (--no-network)" in res.stdout


def test_an_unreadable_password_file_and_a_wrong_password_are_problems(cli, tmp_path: Path) -> None:
    try:
        b = MosquittoBroker(workdir=tmp_path / "broker", users={"sw-line2": "right"}).start()
    except RuntimeError as exc:
        pytest.fail(f"cannot start the test broker: {exc}")
    try:
        missing = tmp_path / "no-such.password"
        cfg = write(tmp_path, f"broker: {{url: '{b.url}', username: sw-line2, password_file: '{missing}'}}\n"
                    f"streams:\n  - topic: a/+\nmetrics: {{listen: '127.0.0.1:0'}}\n"
                    f"state: {{dir: '{tmp_path}'}}\n")
        res = cli("check", "--config", str(cfg))
        assert res.returncode == 1
        assert f"broker.password_file {missing}: cannot be read: No such file or directory" in res.stderr
        wrong = write(tmp_path, "wrong\n", "wrong.password")
        cfg = write(tmp_path, f"broker: {{url: '{b.url}', username: sw-line2, password_file: '{wrong}'}}\n"
                    f"streams:\n  - topic: a/+\nmetrics: {{listen: '127.0.0.1:0'}}\n"
                    f"state: {{dir: '{tmp_path}'}}\n")
        res = cli("check", "--config", str(cfg))
        assert res.returncode == 1
        assert "refused the connection: Not authorized (user 'sw-line2'; check broker.username" in res.stderr
        assert "wrong" not in res.stdout.replace(str(wrong), "") + res.stderr.replace(str(wrong), "")
        right = write(tmp_path, "right\n", "right.password")
        cfg = write(tmp_path, f"broker: {{url: '{b.url}', username: sw-line2, password_file: '{right}'}}\n"
                    f"streams:\n  - topic: a/+\nmetrics: {{listen: '127.0.0.1:0'}}\n"
                    f"state: {{dir: '{tmp_path}'}}\n")
        res = cli("check", "--config", str(cfg))
        assert res.returncode == 0, res.stderr
        assert f"ok: broker.password_file {right}: readable" in res.stdout
    finally:
        b.stop()


def refused_by_check_and_run(cli, cfg: Path) -> list[subprocess.CompletedProcess[str]]:
    """check, check --no-network and run on ``cfg``, each required to exit 2 (a usage error)."""
    out = []
    for args in (["check", "--config", str(cfg)], ["check", "--config", str(cfg), "--no-network"],
                 ["run", "--config", str(cfg)]):
        res = cli(*args)
        assert res.returncode == 2, (args, res.stdout, res.stderr)
        out.append(res)
    return out


@pytest.mark.parametrize("url", ["mqtt://127.0.0.1:99999", "mqtt://127.0.0.1:0", "mqtt://:1883",
                                 "mqtt://127.0.0.1:abc", "mqtt://[zz]:1"])
def test_check_and_run_refuse_a_broker_url_without_a_traceback(cli, tmp_path: Path, url: str) -> None:
    """The tester's URLs passed validation, then check, check --no-network and run ended
    in ValueError or BrokerError tracebacks (or, for port 0, connected to 1883)."""
    cfg = write(tmp_path, f"streams: [{{topic: a/b}}]\nbroker: {{url: \"{url}\"}}\n"
                f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path}'}}\n")
    for res in refused_by_check_and_run(cli, cfg):
        assert f"{cfg}:2: broker.url: " in res.stderr, res.stderr
        assert "Traceback" not in res.stderr and "accepted a connection" not in res.stdout


@pytest.mark.parametrize("text", ["", "# every line commented out\n", "streams: []\n",
                                  "streams:\ndetection: {min_shift_sigma: 1.5}\n"])
def test_check_and_run_refuse_a_file_without_streams_as_a_reload_does(cli, tmp_path: Path, text: str) -> None:
    """check called these valid and probed the default broker, run then watched nothing,
    and a SIGHUP reload refused the same files (test_hardening.py): all three say the same."""
    from shiftwatch.config import NO_STREAMS

    cfg = write(tmp_path, text)
    for res in refused_by_check_and_run(cli, cfg):
        assert f"{cfg} {NO_STREAMS}" in res.stderr, res.stderr
        assert "broker" not in res.stdout and "valid" not in res.stdout
        assert "Traceback" not in res.stderr


def test_check_refuses_dev_null(cli) -> None:
    from shiftwatch.config import NO_STREAMS

    res = cli("check", "--config", "/dev/null", "--no-network")
    assert res.returncode == 2, res.stdout + res.stderr
    assert f"/dev/null {NO_STREAMS}" in res.stderr


def test_check_warns_of_an_entry_an_earlier_entry_shadows(cli, tmp_path: Path) -> None:
    cfg = write(tmp_path, "streams:\n  - {topic: '#', format: number}\n"
                "  - {topic: brackenfield/line2/capper/torque, format: number, unit: N m}\n"
                f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path}'}}\n")
    res = cli("check", "--config", str(cfg), "--no-network")
    assert res.returncode == 0, res.stderr
    assert ("warning: the 2nd stream (streams[1], topic 'brackenfield/line2/capper/torque') can never "
            "apply: the 1st stream's filter '#' matches every topic it matches") in res.stderr, res.stderr


def test_replay_says_which_streams_no_entry_matched(cli, tmp_path: Path) -> None:
    """Historian tags are not MQTT topics: with entries for topics, the tags got the
    detection defaults without a word."""
    cfg = write(tmp_path, "streams:\n  - {topic: brackenfield/line2/filler/+/fill, format: json}\n"
                "detection: {min_shift_sigma: 1.5}\n")
    rows = "".join(f"2026-03-02T06:{i // 60:02d}:{i % 60:02d}Z,{tag},{10 + (i * 7 % 11) * 0.1}\n"
                   for i in range(240) for tag in ("FT-201.PV", "TT-305.PV", "PT-110.PV", "LT-7.PV",
                                                    "brackenfield/line2/filler/head1/fill"))
    data = write(tmp_path, "time,stream,value\n" + rows, "history.csv")
    res = cli("replay", "--config", str(cfg), str(data))
    assert res.returncode == 0, res.stderr
    assert (f"note: 4 of 5 streams matched no stream entry of {cfg} (FT-201.PV, LT-7.PV, PT-110.PV, ...): "
            "the settings of its detection section applied to them") in res.stderr, res.stderr
