"""Shards behind a real 3-server NATS cluster whose server (the one the shards' MQTT
connections use) stays down for longer than a restart: how soon the shards take
samples again once it answers, and what is lost meanwhile.

The scenario of ``test_shards.py`` (``shardrun.ShardRun``: real ``nats-server``
processes with JetStream, 3 replicas and MQTT; real ``shiftwatch run --shard k``
daemons as subprocesses; paho publishing over MQTT), in a file of its own so that,
with the suite's workers, it can run beside the other long shard files.  When the
cluster cannot start the test fails, it never skips.

References outside the project:

- MQTT 3.1.1 section 4.3.2 (OASIS standard): a QoS 1 message not acknowledged by the
  receiver is delivered again; that is what brings the samples published during the
  outage to the shards once they are back.
- paho-mqtt 2.x ``Client.reconnect_delay_set`` (its docstring): after a lost connection
  the client waits ``min_delay``, doubling the wait after every failed attempt up to
  ``max_delay``.  With 1 s doubling to 30 s the attempts come 1, 3, 7, 15, 31 and 61 s
  after the loss (the sums of the waits), which is why a server back 34 s after it was
  killed was not tried again for another 27 s.
- At-least-once delivery with a key to drop repeats is common practice for event
  streams; the record's ``id`` (with ``phase``) is that key.
- nats-server 2.9 itself for a server whose JetStream has no meta leader (the other
  servers of its cluster not started): its MQTT side takes the TCP connection, fails to
  look the session up ("unable to connect: lookup sessions stream ... timeout" in its
  log, after about 4 s) and closes the connection before any CONNACK, as it does while
  a restarted server's JetStream catches up.
"""

from __future__ import annotations

import re
import subprocess
import sys
import time
from pathlib import Path

from shiftwatch.broker import wait_until

from .killrun import metric, scrape
from .natskit import NatsCluster, free_port_block
from .shardrun import Plan, publish_with, run_three_shards

#: How long the server stays down: just past the attempt paho made 31 s after the loss
#: with the old backoff, so that its next one (61 s) came 27 s after the server was back.
OUTAGE = 34.0
#: The bound on the wait for every shard's connection once the server answers again.
#: Generous for attempts at least every few seconds (and NATS's MQTT side refusing a
#: connection or two while its JetStream catches up, 4 s each at most, nats-server's
#: log says), short of the 27 s the old backoff left.
BACK_WITHIN = 18.0


def test_shards_reconnect_soon_after_a_long_server_outage(tmp_path: Path, cluster: NatsCluster) -> None:
    plan = Plan(samples=800, rate=100.0)
    r = run_three_shards(tmp_path, cluster, "longdown", plan)
    seen: dict[str, float] = {}

    def outage() -> None:
        offsets = {k: len(r.shard(k).log()) for k in range(3)}
        cluster.kill(0)  # the server the shards' MQTT connections use
        time.sleep(OUTAGE)
        cluster.restart(0)
        back = time.monotonic()
        if not wait_until(cluster.jetstream_ready, 60, every=0.5):
            raise RuntimeError("JetStream did not answer within 60 s of the restart")

        def reconnected() -> bool:
            return all("connected to broker" in r.shard(k).log()[offsets[k]:] for k in range(3))

        if not wait_until(reconnected, BACK_WITHIN, every=0.2):
            raise RuntimeError(f"not every shard connected within {BACK_WITHIN:.0f} s of the "
                               f"server's restart:\n{r.log_tails()}")
        seen["connected"] = time.monotonic() - back

    try:
        _counts, tally = publish_with(r, outage, wait=OUTAGE + 120, settle=180, still_for=60.0)
        logs = r.log_tails()
    finally:
        r.close()
    print(tally.line() + f"; every shard connected {seen.get('connected', float('nan')):.1f} s after "
          "the server was started again")
    # What the issue asks of a server outage the cluster's other two servers cover: no step
    # missed, none under two ids; the samples of the outage come with the redeliveries
    # (a delivery NATS holds back past cluster.redelivery_wait is set aside as out of
    # order, counted, so the bound on samples is a loose one, as in test_shards.py).
    assert tally.shifts_missed == 0, f"{tally.line()}\n{logs}"
    assert tally.shifts_with_two_ids == 0, f"{tally.line()}\n{logs}"
    assert tally.lost <= tally.published // 4, f"{tally.line()}\n{logs}"


def test_a_broker_closing_connections_before_accepting_them_is_tried_again_every_few_seconds(
        tmp_path: Path) -> None:
    # NATS's MQTT side closes a connection before its CONNACK while its JetStream cannot
    # answer (a restarted server catching up; here a server whose cluster peers are not
    # started yet).  Each such attempt doubled paho's wait (to 30 s), so a daemon that met a
    # few of them tried again only 30 s later although the server was ready long before:
    # the 7th attempt came about 90 s after the first.  Now, with nothing for the operator
    # to fix, the wait stays within 4 s (after the 4 s the server takes to close).
    cluster = NatsCluster(3, 3, base=tmp_path / "nats")
    lone = cluster.servers[0]
    daemon = None
    try:
        lone.start()
        assert wait_until(lone.ready, 30), lone.log_path.read_text()[-2000:]
        port = free_port_block(1)
        config = tmp_path / "shiftwatch.yaml"
        config.write_text(
            f"broker:\n  url: {lone.mqtt_url}\n  client_id: sw-notready\n  mqtt_version: \"3.1.1\"\n"
            "streams:\n  - topic: brackenfield/+/+/fill\n    format: json\n    value: v\n    time: ts\n"
            f"    unit: g\nmetrics:\n  listen: 127.0.0.1:{port}\nstate:\n  dir: {tmp_path / 'state'}\n")
        log_path = tmp_path / "shiftwatch.log"
        with open(log_path, "wb") as log:
            daemon = subprocess.Popen([sys.executable, "-m", "shiftwatch", "run", "--config", str(config)],
                                      stdout=log, stderr=subprocess.STDOUT)
        failed = re.compile(r"^(ERROR broker .*retrying with backoff|INFO broker .*attempt \d+ failed the "
                            r"same way)", re.MULTILINE)

        def attempts() -> int:
            return len(failed.findall(log_path.read_text(errors="replace")))

        # The bound is well past the 7th attempt every 4 s would make (about 30 s) and well
        # short of the doubling's (about 90 s).
        assert wait_until(lambda: attempts() >= 7, 60), log_path.read_text(errors="replace")[-3000:]
        text = log_path.read_text(errors="replace")
        assert "the connection was closed before the broker accepted it" in text, text[-3000:]
        assert "unable to connect" in lone.log_path.read_text(errors="replace")
        # The cluster complete: the daemon is let in and says so, and its metric says so.
        cluster.servers[1].start()
        cluster.servers[2].start()
        assert wait_until(lambda: "connected to broker" in log_path.read_text(errors="replace"), 60), \
            log_path.read_text(errors="replace")[-3000:]
        assert wait_until(lambda: metric(scrape(port), "shiftwatch_broker_connected") == 1.0, 30)
        assert "Traceback" not in log_path.read_text(errors="replace")
    finally:
        if daemon is not None:
            daemon.terminate()
            daemon.wait(30)
        cluster.stop()
