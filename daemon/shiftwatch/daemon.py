"""The long-running daemon: MQTT in, alert records and metrics out, state on disk.

The main thread owns every :class:`StreamEngine`.  paho's thread only puts
messages on a bounded queue; the main thread drains it in small batches,
decodes, groups samples per stream, runs the engines (the same ones
``shiftwatch replay`` uses), publishes the records through the on-disk
outbox, acknowledges the processed messages, and now and then snapshots the
engines' state.
"""

from __future__ import annotations

import dataclasses
import functools
import gc
import json
import logging
import math
import secrets
import signal
import sys
import threading
import time
from collections import OrderedDict, deque
from collections.abc import Callable
from pathlib import Path
from types import FrameType
from typing import Any, Literal

import numpy as np

from shiftwatch import heap
from shiftwatch.config import Config, ConfigError, StreamConfig, load_config, topic_matches
from shiftwatch.core.calm import CalmPool
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.records import ADVISORY, AlertRecord
from shiftwatch.core.screen import REASONS as SAMPLE_REASONS
from shiftwatch.decode import REASONS as DECODE_REASONS
from shiftwatch.decode import Decoded, DecodeProblem, decode, decode_many, stream_name
from shiftwatch.display import alert_summary, repeat_text
from shiftwatch.floor import FloorDesk
from shiftwatch.fsutil import explain_os_error
from shiftwatch.handover import Handover, is_handover
from shiftwatch.journal import Journal, JournalGroup, JournalSingles
from shiftwatch.keeper import ClusterKeeper
from shiftwatch.lease import ShardLease
from shiftwatch.levels import LevelBoard
from shiftwatch.localstate import LocalState
from shiftwatch.metrics import FloorMetrics, Metrics, MetricsServer, StreamStats
from shiftwatch.moved import MovedStreams
from shiftwatch.mqtt import BrokerError, Inbox, Message, MqttLink, read_password
from shiftwatch.natsio import ClusterError
from shiftwatch.notify import sd_notify, watchdog_interval
from shiftwatch.outbox import Outbox
from shiftwatch.partition import Ownership
from shiftwatch.shardcount import ShardCount
from shiftwatch.sparkplug import NAMESPACE as SPARKPLUG_NAMESPACE
from shiftwatch.sparkplug import SparkplugSessions, rebirth_request
from shiftwatch.statestore import StateStore
from shiftwatch.status import StatusBoard
from shiftwatch.termtext import log_text as _printable
from shiftwatch.termtext import one_line as _one_line

#: Messages taken from the queue per processing round (acks go out after each
#: round).  Large rounds give each stream's engine longer batches; a round also
#: ends once its payloads reach ROUND_BYTES, which bounds its transient memory.
#: That bound matters beyond the round: state that streams keep is allocated
#: among the round's short-lived objects and pins their memory afterwards (10,000
#: streams fed batch payloads held about 2.5 kB more each with 2 MB rounds than
#: with 800 kB ones).  800 kB still holds DRAIN single-sample JSON messages.
DRAIN = 20000
ROUND_BYTES = 800_000
#: Bounds of the queue between paho's thread and the main thread: messages,
#: and payload bytes (80 rounds of ROUND_BYTES).  While the queue is full
#: paho's thread reads nothing more, and the broker keeps the rest.
QUEUE_MAX = 100_000
QUEUE_BYTES = 64_000_000
#: A round of at least BUSY_ROUND messages means the daemon is behind; the
#: next round then lets messages collect for up to GATHER_S seconds while they
#: come fast (see Inbox.take), until the broker's window of unacknowledged
#: messages is full.
BUSY_ROUND = 64
GATHER_S = 0.1
#: The topic-to-stream-entry cache holds topics of at most SPEC_CACHE_TOPIC
#: characters, and is emptied once it holds SPEC_CACHE_MIN + max_streams
#: (a topic gives one stream or more, so every live topic fits).
SPEC_CACHE_TOPIC = 512
SPEC_CACHE_MIN = 1000
#: At most this many "new stream" lines per NEW_STREAM_EVERY seconds; the rest are summed up.
NEW_STREAM_LINES = 10
#: The pool of calm streams (shiftwatch.core.calm): a calm stream's samples reach its
#: engine in batches of 48 to 64 (fewer where its engine's baseline is refined sooner),
#: or after 22.5 to 30 s, whichever comes first; at once where a chart could trip.
POOL_SAMPLES = 64
POOL_AGE_S = 30.0
#: An idle round feeds waiting samples for up to this long (oldest first, at most
#: POOL_IDLE_BATCH streams looked at), so an alert that comes meanwhile waits little.
POOL_IDLE_S = 0.02
#: Streams with up to this many samples in a round go through the pool; more make a
#: batch the engine takes in one call anyway.
POOL_LAYERS = 4
#: A stream's arrays from one message of a round reach its engine with the message's
#: arrival time as one float, not as the array of it the journal keeps: screening then
#: holds the batch to the arrival limits on its first and last time only
#: (core/screen.py, ARRIVAL_ENDS), the same decisions.  False: the array, the reference
#: (tests/daemon/test_one_arrival.py).
ONE_ARRIVAL = True
POOL_IDLE_BATCH = 2000
NEW_STREAM_EVERY = 10.0


class RateLimitedLog:
    """At most one line per key per ``every`` seconds; says how many were held back.

    A line held back is counted, and the count comes out within the window
    even when nothing more of that kind arrives: :meth:`flush` (called after
    every processing round, and at shutdown) writes one summary line per key
    whose window has ended with lines held back.  The summary opens a new
    window, so a key still writes at most one line per ``every`` seconds.

    Examples
    --------
    >>> import io
    >>> out = io.StringIO()
    >>> log = logging.getLogger("doctest.rlog")
    >>> log.handlers[:] = [logging.StreamHandler(out)]
    >>> log.propagate = False
    >>> rl = RateLimitedLog(log)
    >>> rl.warning("nan", "sample set aside (nan)", now=100.0)
    >>> rl.warning("nan", "sample set aside (nan)", now=103.0)   # held back
    >>> rl.flush(now=105.0)                                      # the window has not ended
    >>> rl.flush(now=110.0)
    >>> print(out.getvalue(), end="")
    sample set aside (nan)
    1 more like this in the last 10 s, held back (the last line written: sample set aside (nan))
    """

    def __init__(self, log: logging.Logger, every: float = 10.0) -> None:
        self.log = log
        self.every = every
        self._last: dict[str, float] = {}
        self._held: dict[str, int] = {}
        self._text: dict[str, str] = {}
        self._extra: dict[str, dict[str, Any] | None] = {}

    def warning(self, key: str, text: str | Callable[[], str], now: float, *,
                exc_info: bool = False, extra: dict[str, Any] | None = None,
                level: int = logging.WARNING) -> None:
        """Log ``text`` (or what the callable returns: built only for a line that is written).

        ``extra`` are the line's fields (stream, event id) for the JSON log format;
        ``level`` the line's level (the summaries of held-back lines are warnings).
        """
        last = self._last.get(key)
        if last is not None and now - last < self.every:
            self._held[key] = self._held.get(key, 0) + 1
            return
        if callable(text):
            text = text()
        held = self._held.pop(key, 0)
        if len(self._last) > 1000:  # keep the tables bounded whatever the keys
            self._last.clear()
            self._held.clear()
            self._text.clear()
            self._extra.clear()
        self._last[key] = now
        self._text[key] = text
        self._extra[key] = extra
        more = f" ({held} more like this in the last {self.every:.0f} s)" if held else ""
        self.log.log(level, text + more, exc_info=exc_info, extra=extra)

    def flush(self, now: float, *, all_held: bool = False) -> None:
        """Write the summary of each key whose window has ended with lines held back
        (of every key holding some, with ``all_held``: at shutdown)."""
        if not self._held:
            return
        for key in [k for k, last in self._last.items()
                    if self._held.get(k) and (all_held or now - last >= self.every)]:
            held = self._held.pop(key)
            self._last[key] = now
            self.log.warning(f"{held} more like this in the last {self.every:.0f} s, held back "
                             f"(the last line written: {self._text.get(key, key)})",
                             extra=self._extra.get(key))


class _SyncThenAck:
    """Forces the outbox to disk, then acknowledges the round's messages, in its own thread.

    An alert record must be durable before the messages that produced it are
    acknowledged (a crash in between then means they are delivered again).
    The fsync can take milliseconds; the main thread hands the round over and
    goes on with the next.  Rounds are handled in the order given, so no
    message is acknowledged ahead of an earlier round's records.
    """

    def __init__(self, sync: Callable[[], None], ack: Callable[[list[Message]], None],
                 log: logging.Logger, purge: Callable[[], None] | None = None) -> None:
        self._sync = sync
        self._ack = ack
        self._purge = purge
        self._log = log
        self._jobs: deque[tuple[bool, list[Message] | None]] = deque()
        self._purge_queued = False
        self._cv = threading.Condition()
        self._open = 0  # rounds handed over and not finished
        self._thread: threading.Thread | None = None

    def idle(self) -> bool:
        return self._open == 0

    def submit(self, sync: bool, msgs: list[Message]) -> None:
        with self._cv:
            self._queue((sync, msgs))

    def purge_soon(self) -> None:
        """Have the thread delete the files of delivered records (at most one such job queued).

        Called from paho's thread when the broker acknowledges a record: the
        deletion then never holds up the reading of the next message.
        """
        with self._cv:
            if not self._purge_queued:
                self._purge_queued = True
                self._queue((False, None))

    def start(self) -> None:
        """Start the thread, once, at start-up: a thread started on the way of a round
        could fail under a task limit and take the daemon down with it.  Until then
        (a Daemon used without start()) jobs are done in the caller's thread."""
        if self._thread is None:
            t = threading.Thread(target=self._run, name="shiftwatch-outbox-sync", daemon=True)
            t.start()
            self._thread = t

    def _queue(self, job: tuple[bool, list[Message] | None]) -> None:
        self._jobs.append(job)
        self._open += 1
        if self._thread is None:
            self._run_one()
            return
        self._cv.notify_all()

    def wait_idle(self, timeout: float) -> bool:
        """Wait until every round handed over is done; False on timeout."""
        with self._cv:
            return self._cv.wait_for(lambda: self._open == 0, timeout)

    def _run(self) -> None:
        while True:
            with self._cv:
                self._cv.wait_for(lambda: bool(self._jobs))
            self._run_one()

    def _run_one(self) -> None:
        """Do the oldest job (the caller holds no lock)."""
        with self._cv:
            sync, msgs = self._jobs.popleft()
            if msgs is None:
                self._purge_queued = False
        try:
            if msgs is None:
                if self._purge is not None:
                    self._purge()
            else:
                if sync:
                    self._sync()
                self._ack(msgs)
        except Exception:  # noqa: BLE001  the thread must never die
            self._log.exception("error while writing the outbox or acknowledging messages")
        with self._cv:
            self._open -= 1
            self._cv.notify_all()


class Daemon:
    """One shiftwatch process.

    Parameters
    ----------
    cfg : the validated configuration.
    config_path : where it came from (re-read on SIGHUP).
    logger : where log lines go.
    metrics : the metrics holder (a fresh registry by default).
    """

    def __init__(self, cfg: Config, *, config_path: str | None = None,
                 logger: logging.Logger | None = None, metrics: Metrics | None = None,
                 env: dict[str, str] | None = None, pool: bool = True) -> None:
        self.cfg = cfg
        self.config_path = config_path
        self.log = logger or logging.getLogger("shiftwatch")
        self.metrics = metrics or Metrics(
            const_labels=None if cfg.shard is None else {"shard": str(cfg.shard.number)})
        self.env = env
        self.inbox = Inbox(QUEUE_MAX, QUEUE_BYTES)
        self.engines: dict[str, StreamEngine] = {}
        # The ``topic`` of the config entry each engine was made for: a stream name
        # that stream_name() had to change may match no filter of its entry any more.
        self._filters: dict[str, str] = {}
        self._spec_cache: dict[str, tuple[StreamConfig, str] | None] = {}
        state_dir = Path(cfg.state.dir)
        self.store = StateStore(state_dir / "snapshots", logger=self.log)
        # The journal of samples processed since the last snapshot (see shiftwatch.journal).
        # state.keep: cluster: the journal and snapshots live in the NATS cluster instead
        # (shiftwatch.clusterstate); the outbox stays local as well (see ClusterKeeper.load).
        self.in_cluster = cfg.state.keep == "cluster"
        self.journal = Journal(state_dir / "snapshots", logger=self.log, background=True) \
            if cfg.state.journal and not self.in_cluster else None
        self.shard_prefix = cfg.shard.prefix if cfg.shard is not None else ""
        self.nats: Any = None  # shiftwatch.natsio.NatsIO, with a cluster section
        self.cluster: Any = None  # shiftwatch.clusterstate.ClusterState, with state.keep: cluster
        self.lease: ShardLease | None = None
        # Calm streams whose samples wait for one batch (see shiftwatch.core.calm).  Not in
        # cluster mode, where every round's samples go to the cluster per stream anyway.
        self.pool = CalmPool(max_samples=POOL_SAMPLES, max_age=POOL_AGE_S) \
            if pool and not self.in_cluster else None
        # Cluster mode, after each connection to the broker: take nothing for
        # cluster.redelivery_wait, then take all that came in one round with each
        # stream's samples in time order (see _connection).
        self._hold_until = 0.0
        self._sort_round = False
        self._taken_early: list[Message] = []  # taken as a hold began (see round())
        # A round the cluster did not take (its state could not be loaded, or its samples
        # not journaled): (what failed, its messages, the groups fed, a flag), retried first.
        self._held_round: tuple[str, list[Message], list[JournalGroup], bool] | None = None
        self.writer_id = secrets.token_hex(6)
        # A shard with its state in the cluster asks the shard that wrote a moved stream
        # last to pass on what it still holds of it, and answers such asks (see
        # shiftwatch.handover).
        self.handover = Handover(cfg.shard.number, self.writer_id, cfg.shard.topic_prefix,
                                 cfg.cluster.handover_wait) \
            if cfg.shard is not None and cfg.cluster is not None and self.in_cluster else None
        self.outbox = Outbox(state_dir / "outbox", max_items=cfg.alerts.outbox_max, logger=self.log)
        #: The site's time zone for times shown to people (records stay UTC).
        self.tz = cfg.display.time_zone
        self._lock = threading.Lock()
        self._mid_key: dict[int, str | None] = {}
        self._early_acks: OrderedDict[int, None] = OrderedDict()
        self._stop = threading.Event()
        self._reload = threading.Event()
        self._connected_changed = threading.Event()
        self.rlog = RateLimitedLog(self.log)
        #: Streams that moved here and wait for their last writer; the handover's asks and
        #: answers (shiftwatch.moved).
        self.moved = MovedStreams(
            self.handover, writer=self.writer_id, cluster_name=cfg.cluster.name if cfg.cluster else None,
            redelivery_wait=cfg.cluster.redelivery_wait if cfg.cluster is not None else 0.0,
            shard_prefix=self.shard_prefix, owner=lambda: self.owner,
            moved_from=lambda topic, now, written: self.shards.moved_from(topic, now, written),
            hold_until=lambda: self._hold_until, load=lambda names: self.keeper.load(names),
            loaded=lambda n: n in self.engines,
            publish=lambda topic, payload: self._publish(topic, payload, qos=1, retain=False),
            send=self._send_nats, count_drop=self._count_drop, metrics=self.metrics, rlog=self.rlog,
            log=self.log)
        self.link: MqttLink | None = None
        #: The retained levels of the streams (shiftwatch.levels).
        self.levels = LevelBoard(self.prefix, self.engines, label_for=self._label,
                                 publish=self._publish_level,
                                 linked=lambda: self.link is not None,
                                 connected=lambda: self.link is not None and self.link.connected)
        self.server: MetricsServer | None = None
        self.records_published = 0
        self._last_trim = 0.0
        self._busy = False
        self._acker = _SyncThenAck(self._sync_outbox, self._ack, self.log, purge=self._purge_outbox)
        # Messages per round: the broker's window of unacknowledged ones (MQTT 5),
        # DRAIN while a backlog larger than that waits (see round()).
        self._round_max = DRAIN if cfg.broker.mqtt_version != "5" else min(DRAIN, cfg.broker.receive_maximum)
        self._trim_pending = False
        # The window of "new stream" lines (see _new_stream_line).
        self._new_since = -math.inf
        self._new_lines = self._new_held = 0
        self._new_last = ""
        # Planned windows, holds and acknowledgements (shiftwatch.floor, core/plans.py).
        self.floor = FloorDesk(self.prefix, state_dir / "snapshots", FloorMetrics(self.metrics.registry),
                               self.log, self._publish_floor, warn=self._warn_floor)
        #: What the status page shows beyond the metrics (records, rates, held samples).
        self.status = StatusBoard(self.metrics.streams, self._label, time_zone=self.tz)
        self.metrics.label_for = self.status.label
        self.status.add_provider(self._floor_fields)
        #: Sparkplug B edge nodes and devices: aliases, seq, and the streams a death made stale.
        self.sparkplug = SparkplugSessions(max_sessions=cfg.metrics.max_streams)
        self._sparkplug_streams: set[str] = set()
        self.status.add_provider(self._stale_fields)
        #: The shard count this shard runs and the streams it owns by it (shiftwatch.shardcount).
        self.shards = ShardCount(cfg.shard, config=lambda: self.cfg, adopt=self._adopt_count,
                                 moved_away=lambda: self.keeper.let_go_moved(),
                                 keep_topic=lambda n: n in self.engines or n in self.moved.deferred,
                                 topic_bound=2 * cfg.metrics.max_streams + SPEC_CACHE_MIN,
                                 lease=lambda: self.lease, cluster=lambda: self.cluster,
                                 handover=self.handover, metrics=self.metrics, status=self.status,
                                 log=self.log)
        #: With state in the cluster: streams loaded, parked, journaled, handed on to other
        #: shards, let go and snapshotted (shiftwatch.keeper); other shards' samples either way.
        self.keeper = ClusterKeeper(
            engines=self.engines, filters=self._filters, cluster=lambda: self.cluster,
            config=lambda: self.cfg, shards=self.shards, moved=self.moved, levels=self.levels,
            status=self.status, prefix=self.prefix, run_stream=self._run_stream, emit=self.emit,
            publish=lambda topic, payload, qos: self._publish(topic, payload, qos=qos, retain=False),
            outbox_pending=self.outbox.pending, count_drop=self._count_drop, metrics=self.metrics,
            rlog=self.rlog, log=self.log)
        # Streams fed since the last snapshot to the cluster (added by _feed, saved by the keeper).
        self._fed_since_snapshot = self.keeper.fed_since_snapshot
        #: With state kept locally: the engines restored from the state directory, the
        #: journal replayed, each round journaled, the snapshots (shiftwatch.localstate).
        self.local = LocalState(
            engines=self.engines, filters=self._filters, store=self.store, journal=self.journal,
            config=lambda: self.cfg, floor=self.floor, status=self.status, pool=self.pool, tz=self.tz,
            engine_for=lambda name, spec, unit: self.engine_for(name, spec, unit),
            emit=lambda rec, arrived: self.emit(rec, arrived), metrics=self.metrics, log=self.log)
        # This round's groups made from one message's arrays: stream -> (the arrivals array
        # _add_columns filled, the message's arrival time); see ONE_ARRIVAL.
        self._one_arrival: dict[str, tuple[np.ndarray, float]] = {}

    @property
    def owner(self) -> Ownership | None:
        """With shard.hashed_levels: the streams the mapping for shard.of partitions gives
        this shard (see shiftwatch.shardcount)."""
        return self.shards.owner

    def _label(self, name: str) -> str | None:
        """The configured label of a stream (the status board caches it)."""
        return self.cfg.label_for(name, self._filters.get(name))

    def _floor_fields(self, name: str) -> dict[str, Any] | None:
        """The status page's acknowledgement and hold fields, from the floor desk (called
        from the render thread: the desk's view is thread-safe)."""
        view = self.floor.view(name)
        out: dict[str, Any] = {}
        if view.events:
            last = view.events[-1]
            out["ack"] = {"acked": last.acked_at is not None, "by": last.acked_by, "note": last.note,
                          "at": last.acked_at}
        window = view.hold if view.hold is not None else (view.plans[0] if view.plans else None)
        if window is not None:
            out["hold"] = {"kind": "hold" if window is view.hold else "planned change",
                           "until": window.end, "note": window.note}
        return out or None

    def _stale_fields(self, name: str) -> dict[str, Any] | None:
        """The status page's stale flag of a Sparkplug B stream (None for other streams)."""
        if name not in self._sparkplug_streams:
            return None
        return {"stale": self.sparkplug.stale.get(name) is not None}

    def stale_since(self, stream: str) -> float | None:
        """When the Sparkplug edge node or device of ``stream`` died (epoch seconds), while
        the stream is stale (until the next birth); None for a live stream or another format.
        Read by the main thread's callers; the metrics show it as shiftwatch_stream_stale."""
        return self.sparkplug.stale.get(stream)

    # ------------------------------------------------------------ topics
    @property
    def prefix(self) -> str:
        return self.cfg.alerts.topic_prefix

    def status_topic(self) -> str:
        """``<prefix>/status``; a shard's is ``<prefix>/status/shard-<number>``, so one
        shard's last will does not say the others are offline."""
        if self.cfg.shard is not None:
            return f"{self.prefix}/status/shard-{self.cfg.shard.number}"
        return f"{self.prefix}/status"

    def spec_for(self, topic: str) -> StreamConfig | None:
        route = self._route(topic)
        return None if route is None else route[0]

    def _route(self, topic: str) -> tuple[StreamConfig, str] | None:
        """The stream configuration of a topic and its stream name (for readings
        without a SenML name), cached per topic."""
        route: tuple[StreamConfig, str] | None | Literal[False] = self._spec_cache.get(topic, False)
        if route is False:
            spec = next((s for s in self.cfg.streams if topic_matches(s.topic, topic)), None)
            route = None if spec is None else (spec, stream_name(topic, None))
            # Topics come from publishers: a flood of new (or 64 KiB long) ones must
            # not grow the cache without bound.
            if len(topic) <= SPEC_CACHE_TOPIC:
                if len(self._spec_cache) >= SPEC_CACHE_MIN + self.cfg.metrics.max_streams:
                    self._spec_cache.clear()
                self._spec_cache[topic] = route
        return route

    # ----------------------------------------------------------- signals
    def request_stop(self, *_: Any) -> None:
        self._stop.set()

    def request_reload(self, *_: Any) -> None:
        self._reload.set()

    def install_signal_handlers(self) -> None:
        def stop(signum: int, frame: FrameType | None) -> None:
            self._stop.set()

        def hup(signum: int, frame: FrameType | None) -> None:
            self._reload.set()

        signal.signal(signal.SIGTERM, stop)
        signal.signal(signal.SIGINT, stop)
        signal.signal(signal.SIGHUP, hup)

    # ------------------------------------------------------------- start
    def restore(self) -> None:
        """Load the last snapshot, then replay the journal of what was processed after
        it (see LocalState.restore)."""
        self.local.restore()

    # ----------------------------------------------------------- cluster
    def _join_cluster(self) -> None:
        """With a cluster section: connect, claim the shard (waiting while another
        daemon holds it), and prepare the cluster state.  Raises ClusterError."""
        cc = self.cfg.cluster
        if cc is None:
            return
        from shiftwatch.clusterstate import ClusterState
        from shiftwatch.natsio import NatsIO, nats_available

        if not nats_available():
            raise ClusterError("the cluster section needs the NATS client: pip install "
                               "'shiftwatch[nats]' (nats-py)")
        password = None
        if cc.password_file:
            try:
                password = Path(cc.password_file).read_text().splitlines()[0]
            except (OSError, IndexError) as exc:
                raise ClusterError(f"cluster.password_file {cc.password_file} cannot be read "
                                   f"({exc})") from None
        shard = self.cfg.shard
        who = f"shiftwatch-{self.cfg.broker.client_id}"
        self.nats = NatsIO(list(cc.servers), name=who, timeout=cc.timeout, user=cc.username,
                           password=password)
        self.nats.start()
        self.nats.connect()
        self.log.info("connected to the NATS cluster %s", self.nats.where)
        if shard is not None:
            self.lease = ShardLease(self.nats, name=cc.name, shard=shard.number, lease=cc.lease,
                                    replicas=cc.replicas, logger=self.log,
                                    count=(shard.of, shard.hashed_levels) if shard.hashed_levels else None)
            self._setup_retried(self.lease.setup)
            if not self.lease.claim(self._stop):
                return
        if self.in_cluster:
            self.cluster = ClusterState(self.nats, name=cc.name, replicas=cc.replicas, logger=self.log,
                                        writer=self.writer_id,
                                        shard=shard.number if shard is not None else None)
            self._setup_retried(self.cluster.setup)
            self.log.info("stream state in the cluster (journal stream %s, bucket %s, %d replica(s))",
                          self.cluster.stream, self.cluster.bucket, cc.replicas)
            if self.handover is not None:
                self._setup_retried(lambda: self.nats.subscribe(self.moved.answer_subject(self.writer_id),
                                                                self.moved.answers.append))

    def _setup_retried(self, setup: Callable[[], None], attempts: int = 5) -> None:
        """Make the cluster's buckets or stream, trying again a few times: shards that
        start together race to make them, and a bucket just made by another may not
        answer for a moment."""
        for attempt in range(attempts):
            try:
                setup()
                return
            except ClusterError as exc:
                if attempt == attempts - 1 or self._stop.is_set():
                    raise
                self.log.warning("%s; trying again in 2 s", exc)
                self._stop.wait(2.0)

    def _adopt_count(self, of: int, hashed_levels: tuple[int, ...] | None) -> None:
        """A shard count taken up (shiftwatch.shardcount): into the running configuration."""
        assert self.cfg.shard is not None
        self.cfg = dataclasses.replace(self.cfg, shard=dataclasses.replace(
            self.cfg.shard, of=of, hashed_levels=hashed_levels))

    def _lease_lost(self) -> int:
        """The shard's lease is gone: stop at once, acknowledging nothing more."""
        assert self.lease is not None
        self.log.error("shard %d is no longer ours (%s); stopping without acknowledging anything "
                       "more, so the next owner carries on", self.lease.shard, self.lease.lost)
        self.inbox.close()
        if self.link is not None:
            self.link.stop()
        self._close_server_and_cluster(release=False)
        return 3

    def _start_failed(self) -> int:
        """A start that failed after the shard's lease was claimed (say, the metrics port
        was taken) gives the lease back: the restarted daemon would otherwise wait for
        it to expire, up to cluster.lease, on every attempt."""
        self._close_server_and_cluster(release=True)
        return 2

    def _close_server_and_cluster(self, *, release: bool) -> None:
        """Close the metrics endpoint, give the lease back (``release``), close NATS."""
        if self.server is not None:
            self.server.close()
        if release and self.lease is not None:
            self.lease.release()
        if self.nats is not None:
            self.nats.close()

    def _stop_unstarted(self) -> int:
        self.log.info("stopped before the shard was ours")
        if self.nats is not None:
            self.nats.close()
        return 0

    def start(self) -> None:
        """Everything up to the point where messages flow: state, metrics, broker, outbox.

        Every thread the daemon needs is started here, where a failure (under a task
        limit, say) stops the start with one clear line; none is started later.
        """
        self._acker.start()
        if self.journal is not None:
            self.journal.start_background()
        self._join_cluster()
        if self._stop.is_set():
            return
        self.shards.take_up()
        if not self.in_cluster:
            self.restore()
        settle_heap()
        mtls = self.cfg.metrics.tls
        try:
            self.server = self.metrics.serve(
                self.cfg.metrics.listen, certfile=mtls.cert_file if mtls else None,
                keyfile=mtls.key_file if mtls else None,
                client_cafile=mtls.client_ca_file if mtls else None, pages=self.status)
        except OSError as exc:
            what = "metrics.tls: " if mtls else ""
            raise OSError(f"metrics endpoint {self.cfg.metrics.listen}: {what}{exc}") from None
        scheme = "https" if mtls else "http"
        host = f"[{self.server.host}]" if ":" in self.server.host else self.server.host
        self.log.info("metrics on %s://%s:%d/metrics, status page on %s://%s:%d/status%s", scheme,
                      host, self.server.port, scheme, host, self.server.port,
                      " (client certificates required)" if mtls and mtls.client_ca_file else "")
        password = read_password(self.cfg.broker, self.env)
        self.link = MqttLink(
            self.cfg.broker,
            subscriptions=[self.shard_prefix + s.topic for s in self.cfg.streams] + [self.floor.command_filter],
            status_topic=self.status_topic(),
            inbox=self.inbox,
            on_drop=self._count_handover_drop,
            on_published=self._published,
            on_connection=self._connection,
            logger=self.log,
            password=password,
            on_takeover=self.metrics.client_id_conflicts.inc,
            strip=self.shard_prefix,
        )
        # Alert records left in the outbox by an earlier run go out first.
        pending = self.outbox.pending()
        for item in pending:
            self._publish(item.topic, item.payload, qos=item.qos, retain=item.retain, key=item.key)
        if pending:
            self.log.info("re-sending %d alert record(s) kept in the outbox", len(pending))
        self.link.start()
        self.metrics.outbox_depth.set(len(self.outbox))
        name_os_threads()
        sd_notify("READY=1\nSTATUS=watching", env=self.env)

    # -------------------------------------------------------------- loop
    def run(self, *, install_signals: bool = True) -> int:
        """Run until SIGTERM/SIGINT (or :meth:`request_stop`); returns the exit status."""
        if install_signals:
            self.install_signal_handlers()
        self.log.info("shiftwatch starting. %s", ADVISORY)
        # Hand the interpreter lock between paho's thread and this one every
        # 0.5 ms rather than every 5 ms: an alert (or an acknowledgement) then
        # never waits long for the other thread to yield.
        sys.setswitchinterval(0.0005)
        try:
            self.start()
            if self._stop.is_set():  # stopped while waiting for the shard's lease
                return self._stop_unstarted()
        except ClusterError as exc:
            self.log.error("cannot start: %s", exc)
            return self._start_failed()
        except BrokerError as exc:
            self.log.error("%s", exc)
            return self._start_failed()
        except OSError as exc:
            self.log.error("cannot start: %s", exc)
            return self._start_failed()
        except RuntimeError as exc:  # "can't start new thread": a task limit too tight
            self.log.error("cannot start: %s (is the service's task limit, TasksMax=, too low?)", exc)
            return self._start_failed()
        wd = watchdog_interval(self.env)
        next_wd = time.monotonic()
        next_snap = time.monotonic() + self.cfg.state.snapshot_every
        next_check = time.monotonic() + 1.0
        while not self._stop.is_set():
            if self.lease is not None and self.lease.lost is not None:
                return self._lease_lost()
            self.round(timeout=0.2)
            self.status.tick()
            if self.journal is not None:
                self.journal.sync_if_due()
            now = time.monotonic()
            if now >= next_check:
                self.local.check_journal()
                if self.shards.rechecking:
                    self.shards.recheck()
                if self.link is not None:
                    self.link.retry_subscriptions()
                next_check = now + 1.0
            if wd is not None and now >= next_wd:
                sd_notify("WATCHDOG=1", env=self.env)
                next_wd = now + wd / 2
            if now >= next_snap or self.local.journal_half_full():
                self.snapshot()
                settle_heap()
                next_snap = now + self.cfg.state.snapshot_every
            if self._reload.is_set():
                self._reload.clear()
                self.reload()
        return self.shutdown()

    def round(self, timeout: float = 0.2) -> int:
        """Take what is queued (waiting up to ``timeout`` for the first message) and process it."""
        # Under load (the last round was long) let a round's messages collect
        # first; otherwise take what is there at once, for the alerts' sake.
        gather = GATHER_S if self._busy else 0.0
        limit = self._round_max
        if len(self.inbox) > limit:
            # A backlog past the broker's window (Mosquitto sends past it once
            # acknowledgements flow): larger rounds spread each round's fixed
            # costs over more messages and give each engine more samples a call.
            limit = DRAIN
        if self._held_round is not None:
            self._retry_held_round()
            return 0
        if self.shards.held:
            # Started with a count no other live shard agrees with: nothing is taken (the
            # messages stay unacknowledged with the broker) until it is taken up.
            self._stop.wait(timeout)
            self._gauges()
            return 0
        if self.handover is not None:
            if self.moved.answers:
                self.moved.take_answers()
            # Answers owed for asks of rounds now in the cluster (the round before this one,
            # or held after a reconnect; see shiftwatch.handover).
            self.moved.send_answers()
        if self.moved.deferred:
            self.moved.release()
        round_bytes = ROUND_BYTES
        sort = False
        if self._sort_round:
            held = self._hold_until - time.monotonic()
            if held > 0:  # waiting for the redeliveries (see _connection)
                self._stop.wait(min(held, timeout))
                self.levels.send_due()
                self._gauges()
                return 0
            self._sort_round = False
            sort = True
            limit, round_bytes = max(limit, len(self.inbox)), max(ROUND_BYTES, self.inbox.nbytes)
        msgs = self.inbox.take(limit, round_bytes, timeout, gather=gather)
        if self._sort_round and not sort:
            # The connection came up while this round waited for its first message: the
            # hold began meanwhile, and what was taken waits for the sorted round with the rest.
            self._taken_early += msgs
            return 0
        if sort and self._taken_early:
            msgs, self._taken_early = self._taken_early + msgs, []
        if msgs and self._reload.is_set():
            # A reload signalled while these were on their way applies to them: a shard
            # stopped (SIGSTOP) through a change of the number of shards takes the reload
            # and its backlog at once, and the backlog came under the mapping the reload
            # brings.  Processed first under the old shard.of, the samples of streams that
            # had come back to this shard were taken for another shard's.
            self._reload.clear()
            self.reload()
        self._busy = len(msgs) >= BUSY_ROUND
        if self._new_held:
            self._flush_new_streams(time.monotonic())
        if not msgs:
            self._pool_due(idle=True)
            self.status.serve_windows(self.engines)
            self.levels.send_due()
            self.rlog.flush(time.time())
            self._gauges()
            if self._trim_pending:  # the burst is over: trim now, it costs nothing
                self._trim_heap(idle=True)
            return 0
        self.process(msgs, in_time_order=sort)
        self._pool_due()
        self.status.serve_windows(self.engines)
        self.levels.send_due()
        self.rlog.flush(time.time())
        self._gauges()
        if sum(len(m.payload) for m in msgs) > ROUND_BYTES // 4:
            self._trim_heap()
        return len(msgs)

    def _retry_held_round(self) -> None:
        """Cluster mode: the round the cluster did not take, before anything newer (a
        sample fed after newer ones would be set aside as out of order)."""
        assert self._held_round is not None
        kind, msgs, fed, flag = self._held_round
        if kind == "load":
            self._held_round = None
            self.process(msgs, in_time_order=flag)
        elif self.keeper.journal(fed, time.time()):
            self._held_round = None
            self._finish(msgs, flag)
        if self._held_round is not None:
            self._stop.wait(0.5)  # the cluster is not answering: no hurry
        self.levels.send_due()
        self.rlog.flush(time.time())
        self._gauges()

    def _trim_heap(self, *, idle: bool = False) -> None:
        """Give memory freed after a large round back to the system (glibc keeps it
        otherwise, and the daemon's resident size would stay at its peak).  At
        most once every ten seconds while busy, and once more when the queue runs
        dry; a no-op where malloc_trim does not exist."""
        now = time.monotonic()
        if not idle and now - self._last_trim < 10.0:
            self._trim_pending = True
            return
        self._last_trim = now
        self._trim_pending = False
        trim = heap.malloc_trim()
        if trim is not None:
            trim(0)

    def _gauges(self) -> None:
        self.metrics.queue_depth.set(len(self.inbox))
        if self.pool is not None:
            self.metrics.samples_waiting.set(self.pool.total_waiting())
        self.metrics.outbox_depth.set(len(self.outbox))

    def shutdown(self) -> int:
        """SIGTERM: process what is queued, snapshot, let the outbox drain, say offline, disconnect."""
        # Process what was queued when the stop came, no more: under load the
        # inbox refills, and what arrives now is delivered again after the
        # restart (it is not acknowledged).
        # (None while the shard's count is not taken up: they stay with the broker.)
        left = 0 if self.shards.held else len(self.inbox)
        self.log.info("stopping: processing %d queued message(s)", left)
        while left > 0:
            msgs = self.inbox.take(min(left, DRAIN), ROUND_BYTES, 0.0)
            if not msgs:
                break
            self.process(msgs)
            left -= len(msgs)
        # Nothing more is taken: paho's thread reads on (the outbox's
        # acknowledgements come in) and hands nothing over, and what the broker
        # sends now stays unacknowledged, so it is delivered again after the restart.
        self.inbox.close()
        # Every stream's retained level says the daemon is gone, so a dashboard
        # reading it does not take it for one that is watched (a crash leaves the
        # levels as they were; <prefix>/status, the last will, then says offline).
        self.levels.go_offline(self.engines)
        self._pool_empty()
        if not self._acker.wait_idle(10.0):
            self.log.warning("stopping: the outbox is still being written; its rounds stay unacknowledged")
        self.snapshot()
        if self.journal is not None:
            self.journal.close()
            self.journal.stop_background()
        deadline = time.monotonic() + 5.0
        while ((len(self.outbox) or self.levels.due) and self.link is not None and self.link.connected
               and time.monotonic() < deadline):
            self.levels.send_due()
            time.sleep(0.02)
        if self.link is not None:
            self.link.stop()
        self._purge_outbox()  # the files of the records delivered last
        if self.server is not None:
            self.server.close()
        if self.lease is not None:
            self.lease.release()
        if self.nats is not None:
            self.nats.close()
        if len(self.outbox):
            self.log.warning("%d alert record(s) stay in the outbox for the next start", len(self.outbox))
        self.rlog.flush(time.time(), all_held=True)
        sd_notify("STOPPING=1", env=self.env)
        self.log.info("stopped")
        return 0

    # -------------------------------------------------------- processing
    def process(self, msgs: list[Message], *, in_time_order: bool = False) -> None:
        """Decode, group per stream, run the engines, publish; then acknowledge the messages.

        ``in_time_order``: each stream's samples are fed sorted by time, not in the
        order they arrived (the round after a hold for redeliveries, cluster mode)."""
        now = time.time()
        published_before = self.records_published
        self.metrics.messages_received.inc(len(msgs))
        if self._one_arrival:
            self._one_arrival.clear()
        # Messages per stream configuration, so each set is decoded in one call.
        by_spec: dict[int, tuple[StreamConfig, list[Message], list[str]]] = {}
        commands = [m for m in msgs if self.floor.is_command(m.topic)]
        if commands:
            # Before the round's samples, and written to disk before its acknowledgement.
            for rec in self.floor.handle(commands, now, self.engines, self._label):
                self.emit(rec, now)
        handover = [m for m in msgs if is_handover(m.payload)] if self.handover is not None else None
        if handover:
            self.moved.messages([(m.payload, m.topic) for m in handover], now)
        for m in msgs:
            if commands and self.floor.is_command(m.topic):
                continue
            if handover and is_handover(m.payload):
                continue
            route = self._route(m.topic)
            if route is None:
                self._count_drop("no_matching_stream")
                continue
            spec, topic_stream = route
            entry = by_spec.get(id(spec))
            if entry is None:
                entry = by_spec[id(spec)] = (spec, [], [])
            entry[1].append(m)
            entry[2].append(topic_stream)
        # stream -> [spec, unit, times, values, arrival times]; foreign: another shard's streams
        groups: dict[str, list[Any]] = {}
        foreign: dict[str, list[Any]] = {}
        for spec, ms, names in by_spec.values():
            decoded = self._decode(spec, ms, now)
            for m, topic_stream, dec in zip(ms, names, decoded):
                if dec is None:
                    continue
                if dec.problems:
                    self._decode_problems(m.topic, dec.problems, now)
                arrived = m.arrived
                into = groups if self.owner is None or self.owner.owns(m.topic) else foreign
                readings = dec.readings
                if dec.columns is not None:  # a clean JSON array, as arrays (see decode())
                    ts, vs = dec.columns
                    self._add_columns(into, topic_stream, spec, spec.unit, m.topic, ts, vs, arrived)
                    continue
                if dec.senml is not None:  # a clean SenML pack, as arrays per name
                    pack = dec.senml
                    streams = [stream_name(m.topic, n) for n in pack.names]
                    if len(set(streams)) == len(streams):
                        for name, unit, ts, vs in zip(streams, pack.units, pack.times, pack.values):
                            self._add_columns(into, name, spec, unit or spec.unit, m.topic, ts, vs, arrived)
                        continue
                    readings = pack.readings()  # two names, one stream: in record order
                for r in readings:
                    if r.time is None and spec.time is not None:
                        # Set aside (no_time, counted with the problems above): placed at its
                        # arrival it would stand after every sample of a backlog stamped
                        # earlier, and those would all be rejected as out_of_order.
                        continue
                    if r.name is None:
                        name = topic_stream
                    elif spec.format == "sparkplug_b":
                        name = r.name  # already the stream's name (group/node/[device/]metric)
                    else:
                        name = stream_name(m.topic, r.name)
                    g = into.get(name)
                    if g is None:
                        g = into[name] = [spec, r.unit or spec.unit, [], [], []]
                        if self.owner is not None:
                            self.shards.note_topic(name, m.topic)
                    elif type(g[2]) is not list:
                        g[2:5] = [c.tolist() for c in g[2:5]]
                    g[2].append(arrived if r.time is None else r.time)
                    g[3].append(r.value)
                    g[4].append(arrived)
        singles = self._pool_round(groups, now) if self.pool is not None and len(self.pool) else None
        if self.cluster is not None:
            try:
                self.keeper.load([n for n in groups if n not in self.engines
                                  and n not in self.moved.deferred], defer=True)
            except ClusterError as exc:
                # Nothing is fed (a fresh engine would start without the stream's history)
                # and nothing acknowledged: the round is held and processed again first
                # (the broker's redelivery would come after newer samples).
                self.rlog.warning("cluster_load", f"{exc}; the round is held and tried again",
                                  now)
                self._held_round = ("load", msgs, [], in_time_order)
                return
            if self.handover is not None:
                self.moved.send_asks()
            if self.moved.deferred and not self.keeper.park(groups, now):
                self._held_round = ("load", msgs, [], in_time_order)  # nothing fed yet: all again
                return
        if foreign and not self.keeper.take_foreign(foreign, now):
            self._held_round = ("load", msgs, [], in_time_order)  # nothing fed yet: all again
            return
        fed: list[JournalGroup] = []
        # State in the cluster: each stream's journal message leaves as soon as its
        # engine is fed, so the cluster stores it while the next streams are fed; the
        # round is still acknowledged only once every message is stored.
        pub = self.cluster.journal_round() if self.cluster is not None else None
        for name, (spec, unit, times, values, arrivals, *prior) in groups.items():
            if name in self.moved.deferred:
                continue  # parked in the cluster (see ClusterKeeper.park)
            if in_time_order and len(times) > 1:
                order = sorted(range(len(times)), key=times.__getitem__)
                times = [times[i] for i in order]
                values = [values[i] for i in order]
                arrivals = [arrivals[i] for i in order]
            try:
                jg = self._run_stream(name, spec, unit, times, values, arrivals, now,
                                      prior=prior[0] if prior else None)
                if jg is not None:
                    fed.append(jg)
                    if pub is not None:
                        pub.add(jg)
            except Exception:  # noqa: BLE001  a defect must cost one stream's batch, never the daemon
                self._count_drop("internal_error", len(values) + (len(prior[0][0]) if prior else 0))
                self.rlog.warning("internal_error", "internal error while processing stream "
                                  f"{_printable(name)}; its batch was set aside", now,
                                  exc_info=True)
        # The round's samples reach the journal before their acknowledgements
        # leave, so a sample the broker forgets is never one the engines forget.
        self.local.journal_round(fed, singles)
        self.metrics.messages_processed.inc(len(msgs))
        wrote = self.records_published != published_before
        if fed and self.cluster is not None and not self.keeper.journal(fed, now, started=pub):
            # Fed but not in the cluster's journal: held unacknowledged, and journaled
            # before anything newer is taken (see round()).
            self._held_round = ("journal", msgs, fed, wrote)
            return
        self._finish(msgs, wrote)

    def _add_columns(self, into: dict[str, list[Any]], name: str, spec: StreamConfig, unit: str | None,
                     topic: str, ts: np.ndarray | None, vs: np.ndarray, arrived: float) -> None:
        """A stream's samples from one message, as arrays (times None: the arrival time), into
        its group of the round.  A group of more than POOL_LAYERS samples keeps arrays (its
        engine takes them in one call); a smaller one keeps lists, which the pool's layers
        index sample by sample."""
        n = vs.shape[0]
        g = into.get(name)
        if g is None:
            g = into[name] = [spec, unit, [], [], []]
            if self.owner is not None:
                self.shards.note_topic(name, topic)
            if n > POOL_LAYERS:
                arr = np.empty(n)
                arr.fill(arrived)  # np.full's array, without its Python wrapper
                g[2:5] = [arr if ts is None else ts, vs, arr]
                if ONE_ARRIVAL:
                    self._one_arrival[name] = (arr, arrived)
                return
        if type(g[2]) is not list:
            g[2] = np.concatenate((g[2], np.full(n, arrived) if ts is None else ts))
            g[3] = np.concatenate((g[3], vs))
            g[4] = np.concatenate((g[4], np.full(n, arrived)))
            return
        g[2].extend([arrived] * n if ts is None else ts.tolist())
        g[3].extend(vs.tolist())
        g[4].extend([arrived] * n)

    # ---------------------------------------------------------- handover
    # (see shiftwatch.moved)
    def _send_nats(self, subject: str, payload: bytes) -> None:
        """A handover answer by plain NATS (nothing before the daemon has joined the cluster)."""
        if self.nats is not None:
            self.nats.send(subject, payload)

    def _finish(self, msgs: list[Message], wrote: bool) -> None:
        """Acknowledge a processed round (after the outbox is on disk when it wrote records)."""
        if self.link is None:
            if wrote:
                self._sync_outbox()
        elif wrote or not self._acker.idle():
            # The round's records must be on disk before its messages are
            # acknowledged; another thread waits for the disk, so the next
            # round (and its alerts) need not.  Later rounds queue behind it.
            self._acker.submit(wrote, msgs)
        else:
            self.link.ack_all(msgs)

    def _sync_outbox(self) -> None:
        try:
            self.outbox.sync()
        except OSError as exc:
            self._outbox_failed(exc, time.time())

    def _purge_outbox(self) -> None:
        try:
            self.outbox.purge()
        except OSError as exc:
            self._outbox_failed(exc, time.time())

    def _ack(self, msgs: list[Message]) -> None:
        if self.link is not None:
            self.link.ack_all(msgs)

    def _decode(self, spec: StreamConfig, ms: list[Message], now: float) -> list[Decoded | None]:
        """Decode the messages of one stream entry; None for a message whose decoding failed.

        decode never raises on a payload: a defect costs the messages it hits only.
        """
        if spec.format == "sparkplug_b":
            return [self._sparkplug_message(spec, m, now) for m in ms]
        kwargs: dict[str, Any] = {"value_path": spec.value, "time_path": spec.time,
                                  "max_bytes": self.cfg.broker.max_payload_bytes, "columns": True}
        try:
            return list(decode_many([m.payload for m in ms], spec.format, now=[m.arrived for m in ms],
                                    **kwargs))
        except Exception:  # noqa: BLE001, S110  decoded one by one below, each failure counted
            pass
        out: list[Decoded | None] = []
        for m in ms:
            try:
                out.append(decode(m.payload, spec.format, now=m.arrived, **kwargs))
            except Exception:  # noqa: BLE001  a defect costs this message only; counted and logged
                self._count_drop("internal_error")
                self.rlog.warning("internal_error", f"internal error while decoding a message on "
                                  f"{_printable(m.topic)}; it was set aside", now, exc_info=True)
                out.append(None)
        return out

    def _sparkplug_message(self, spec: StreamConfig, m: Message, now: float) -> Decoded | None:
        """Decode one Sparkplug B message through the edge-node sessions, and act on what it
        says: births and deaths logged, stale flags set and cleared, seq gaps counted, skipped
        metrics counted, a rebirth asked for when the entry allows it."""
        try:
            out = self.sparkplug.feed(m.topic, m.payload, m.arrived,
                                      max_bytes=self.cfg.broker.max_payload_bytes)
        except Exception:  # noqa: BLE001  a defect costs this message only; counted and logged
            self._count_drop("internal_error")
            self.rlog.warning("internal_error", f"internal error while decoding a Sparkplug message on "
                              f"{_printable(m.topic)}; it was set aside", now, exc_info=True)
            return None
        sp = self.metrics.sparkplug()
        if out.used and out.kind is not None:
            sp.messages.labels(out.kind).inc()
        for kind, n in out.skipped.items():
            sp.metrics_skipped.labels(kind).inc(n)
        for stream in out.stale:
            sp.set_stale(stream, True)
        for stream in out.fresh:
            sp.set_stale(stream, False)
        for r in out.readings:
            if r.name is not None and r.name not in self._sparkplug_streams \
                    and len(self._sparkplug_streams) < 4 * self.cfg.metrics.max_streams:
                self._sparkplug_streams.add(r.name)
                if not self.sparkplug.is_stale(r.name):
                    sp.set_stale(r.name, False)
        if out.note is not None:
            more = f"; {len(out.stale)} stream(s) stale" if out.stale else ""
            more += f"; {len(out.fresh)} stream(s) live again" if out.fresh else ""
            self.rlog.warning(f"sparkplug:{out.kind}", out.note + more, now,
                              level=logging.WARNING if out.stale else logging.INFO)
        if out.seq_gap is not None:
            sp.seq_gaps.inc()
            expected, got = out.seq_gap
            self.rlog.warning("sparkplug:seq", f"Sparkplug message on {_printable(m.topic)} has seq "
                              f"{got}, expected {expected}: messages of this edge node were lost "
                              "or reordered on the way", now)
        if out.rebirth is not None and spec.rebirth_requests and self.link is not None:
            self._ask_rebirth(*out.rebirth, now)
        problems = out.problems
        if not spec.rebirth_requests and any(p.reason == "sparkplug_no_birth" for p in problems):
            problems = [p if p.reason != "sparkplug_no_birth" else p._replace(
                message=p.message + "; its next birth (when it reconnects) brings it back, or set "
                "rebirth_requests: true to ask for one") for p in problems]
        return Decoded(out.readings, problems)

    def _ask_rebirth(self, group: str, node: str, now: float) -> None:
        """Publish an NCMD asking the edge node for its births (at most once per 30 s per
        node); never for a group or node name that is not a plain topic level."""
        levels = f"{group}/{node}"
        if stream_name(levels, None) != levels or levels.count("/") != 1 \
                or not self.sparkplug.may_ask_rebirth((group, node), now):
            return
        try:
            self._send(f"{SPARKPLUG_NAMESPACE}/{group}/NCMD/{node}", rebirth_request(int(now * 1000)),
                       qos=0, retain=False)
        except (ValueError, RuntimeError) as exc:  # paho refuses what it cannot send
            self.rlog.warning("sparkplug:rebirth-failed", f"rebirth request to Sparkplug edge node "
                              f"{_printable(levels)} not sent: {_one_line(exc)}", now)
            return
        self.metrics.sparkplug().rebirth_requests.inc()
        self.rlog.warning(f"sparkplug:rebirth:{levels}", f"asked Sparkplug edge node "
                          f"{_printable(levels)} for its births again (NCMD Node Control/Rebirth)",
                          now, level=logging.INFO)

    def _decode_problems(self, topic: str, problems: list[DecodeProblem], now: float) -> None:
        for p in problems:
            self._count_drop(p.reason)

            def text(p: DecodeProblem = p) -> str:
                return f"message on {_printable(topic)} set aside ({p.reason}): {p.message}"

            self.rlog.warning(f"decode:{p.reason}", text, now)

    def engine_for(self, name: str, spec: StreamConfig, unit: str | None) -> StreamEngine | None:
        eng = self.engines.get(name)
        if eng is None:
            if len(self.engines) >= self.cfg.metrics.max_streams:
                return None
            eng = self.engines[name] = StreamEngine(name, spec.detection, unit=unit)
            self._filters[name] = spec.topic
            self.floor.attach(name, eng)
            self._new_stream_line(name, spec.detection.warmup_samples)
        return eng

    def _new_stream_line(self, name: str, warmup: int) -> None:
        """One "new stream" line each, up to NEW_STREAM_LINES per NEW_STREAM_EVERY seconds;
        past that they are counted and summed up in one line (a SenML pack of 10,000
        names gave 10,000 lines)."""
        now = time.monotonic()
        self._flush_new_streams(now)
        if self._new_lines < NEW_STREAM_LINES:
            self._new_lines += 1
            self.log.info("new stream %s (warming up on %d samples)", _printable(name), warmup,
                          extra={"stream": name})
        else:
            self._new_held += 1
            self._new_last = name

    def _flush_new_streams(self, now: float) -> None:
        """Close the window of new-stream lines when it is over, with the line that sums up
        the streams it held back."""
        if now - self._new_since < NEW_STREAM_EVERY:
            return
        if self._new_held:
            self.log.info("%d more new stream(s) in the last %.0f s, not listed one by one (the last: "
                          "%s); each warms up on its own samples; shiftwatch_streams counts them",
                          self._new_held, NEW_STREAM_EVERY, _printable(self._new_last))
        self._new_since, self._new_lines, self._new_held = now, 0, 0

    def _run_stream(self, name: str, spec: StreamConfig, unit: str | None, times_list: list[float],
                    values_list: list[float], arrivals_list: list[float], now: float, *,
                    prior: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None) -> JournalGroup | None:
        """Feed a stream this round's samples (after ``prior``, the samples it had waiting
        in the pool); returns the round's samples to journal."""
        eng = self.engine_for(name, spec, unit)
        if eng is None:
            self._count_drop("stream_cap", len(values_list))
            self.rlog.warning("stream_cap", f"stream limit of {self.cfg.metrics.max_streams} reached; "
                              f"samples of new stream {_printable(name)} set aside", now)
            return None
        times = np.asarray(times_list, dtype=np.float64)
        values = np.asarray(values_list, dtype=np.float64)
        arrivals = np.asarray(arrivals_list, dtype=np.float64)
        held = self.floor.split_held(name, times)
        if held is not None:
            # Not process readings: kept from the engine (no detection, not in the baseline).
            keep = ~held
            times, values, arrivals = times[keep], values[keep], arrivals[keep]
        group = JournalGroup(name, unit, times, values, arrivals, self._filters.get(name, spec.topic)) \
            if times.shape[0] else None
        if prior is not None and prior[0].shape[0]:
            times, values, arrivals = (np.concatenate((p, a)) for p, a in zip(prior, (times, values, arrivals)))
        if times.shape[0]:
            # A stream that brought more than POOL_LAYERS samples this round would leave the
            # pool again on its next such round: it joins after a round of few samples, and
            # saves calm_terms(), join() and take() on each of its batches.
            one = self._one_arrival.get(name) if self._one_arrival else None
            self._feed(name, eng, times, values, arrivals, now, rejoin=len(values_list) <= POOL_LAYERS,
                       arrived=one[1] if one is not None and one[0] is arrivals else None)
        return group

    def _feed(self, name: str, eng: StreamEngine, times: np.ndarray, values: np.ndarray,
              arrivals: np.ndarray, now: float, *, rejoin: bool = True, arrived: float | None = None) -> None:
        """Run a stream's engine on samples; publish its records; let it join the pool
        of calm streams when it is calm (``rejoin``).  ``arrived``: the one arrival time
        every sample has, when known (see ONE_ARRIVAL)."""
        res = eng.process(times, values, arrivals if arrived is None else arrived)
        for rej in res.rejected:
            if rej.reason != "spike":  # one key per reason: many streams cannot multiply the lines

                def text(r: str = rej.reason) -> str:
                    return f"sample of {_printable(name)} set aside ({r}): {SAMPLE_REASONS[r]}"

                self.rlog.warning(f"sample:{rej.reason}", text, now, extra={"stream": name})
        for rec in res.records:
            j = int(np.searchsorted(times, rec.as_of))
            self.emit(rec, float(arrivals[min(j, len(arrivals) - 1)]))
        if res.repeats:
            self._repeat_lines(name, eng, res.repeats, now)
        self.levels.changed(name, eng)
        self.metrics.update_stream(name, StreamStats.from_engine(eng))
        if self.in_cluster:  # read by the snapshots to the cluster only
            self._fed_since_snapshot.add(name)
        if rejoin and self.pool is not None and not (self.floor.holding() and self.floor.concerned_by_hold(name)):
            terms = eng.calm_terms()
            if terms is not None:
                self.pool.join(name, terms)

    def _repeat_lines(self, name: str, eng: StreamEngine, spans: Any, now: float) -> None:
        """One line when a stream's readings start repeating one value improbably long (a
        stuck sensor is possible: core/repeats.py), and one when they vary again; rate-limited
        as the set-aside lines are (one line per kind every 10 s, the rest summed up).  No
        alert record: a record is about a step in level."""
        who = self.cfg.label_for(name, self._filters.get(name)) or _printable(name)
        for span in spans:

            def text(s: Any = span) -> str:
                return repeat_text(s, who, eng.unit, self.tz, today=now)

            self.rlog.warning("repeating" if span.until is None else "repeating_ended", text, now,
                              extra={"stream": name},
                              level=logging.WARNING if span.until is None else logging.INFO)

    # ------------------------------------------------------- calm streams
    def _pool_round(self, groups: dict[str, list[Any]], now: float) -> JournalSingles | None:
        """The round's samples of pooled (calm) streams go through the pool's charts
        together, a layer at a time (every such stream's first sample, then the second of
        those with two, ...), and into the journal as columns; a stream whose charts could
        trip, whose sample is not plain or whose batch is full is fed at once, with the
        rest of its round.  A stream with more than POOL_LAYERS samples this round (a batch
        its engine takes in one call anyway), one a hold names, or one whose samples are not
        plain numbers leaves the pool and goes the per-stream way, its waiting samples
        first.  Takes the pooled streams out of ``groups``."""
        pool = self.pool
        assert pool is not None
        holds = self.floor.holding()
        active: list[tuple[str, list[Any]]] = []
        for name, g in groups.items():
            if name not in pool:
                continue
            if (len(g[2]) > POOL_LAYERS or (holds and self.floor.concerned_by_hold(name))
                    or not all(map(_plain_number, g[2])) or not all(map(_plain_number, g[3]))):
                g.append(pool.take(name))
                continue
            active.append((name, g))
        if not active:
            return None
        for name, _ in active:
            del groups[name]
        filters = self._filters
        newest = self.floor.newest
        names: list[str] = []
        units: list[str | None] = []
        tops: list[str | None] = []
        ts: list[float] = []
        xs: list[float] = []
        arr: list[float] = []
        mono = time.monotonic()
        layer = 0
        while active:
            lt = [g[2][layer] for _, g in active]
            lx = [g[3][layer] for _, g in active]
            la = [g[4][layer] for _, g in active]
            ln = [n for n, _ in active]
            names += ln
            units += [g[1] for _, g in active]
            tops += [filters.get(n, g[0].topic) for n, g in active]
            ts += lt
            xs += lx
            arr += la
            for name, tv in zip(ln, lt):  # as FloorDesk.split_held keeps it
                if tv > newest.get(name, -math.inf):
                    newest[name] = tv
            handed = pool.offer(ln, np.array(lt, dtype=np.float64), np.array(lx, dtype=np.float64),
                                np.array(la, dtype=np.float64), now=mono)
            later: list[tuple[str, list[Any]]] = []
            for (name, g), h in zip(active, handed.tolist()):
                rest = layer + 1
                if h:
                    # Fed now with the rest of its round, which is journaled with it here.
                    if len(g[2]) > rest:
                        names += [name] * (len(g[2]) - rest)
                        units += [g[1]] * (len(g[2]) - rest)
                        tops += [filters.get(name, g[0].topic)] * (len(g[2]) - rest)
                        ts += g[2][rest:]
                        xs += g[3][rest:]
                        arr += g[4][rest:]
                    self._feed_waiting(name, now, then=(g[2][rest:], g[3][rest:], g[4][rest:]))
                elif len(g[2]) > rest:
                    later.append((name, g))
            active = later
            layer += 1
        return JournalSingles(names, units, tops, np.array(ts, dtype=np.float64),
                              np.array(xs, dtype=np.float64), np.array(arr, dtype=np.float64))

    def _feed_waiting(self, name: str, now: float, *, rejoin: bool = True,
                      then: tuple[list[float], list[float], list[float]] | None = None) -> None:
        """A pooled stream leaves the pool: its engine takes the samples that waited (and
        ``then``, more of the round's samples after them)."""
        assert self.pool is not None
        t, x, a = self.pool.take(name)
        if then is not None and then[0]:
            t, x, a = (np.concatenate((w, np.asarray(m, dtype=np.float64))) for w, m in zip((t, x, a), then))
        eng = self.engines.get(name)
        if eng is None or not t.shape[0]:
            return
        try:
            self._feed(name, eng, t, x, a, now, rejoin=rejoin)
        except Exception:  # noqa: BLE001  as in process(): one stream's batch, never the daemon
            self._count_drop("internal_error", len(x))
            self.rlog.warning("internal_error", "internal error while processing stream "
                              f"{_printable(name)}; its batch was set aside", now, exc_info=True)

    def _pool_due(self, *, idle: bool = False) -> None:
        """Feed the pooled streams whose samples waited their longest, and those whose
        status page is open (it shows the engine's samples).  When the round found
        nothing to do (``idle``), feed the others too, oldest first, for up to
        POOL_IDLE_S: a daemon with time to spare keeps every engine current."""
        pool = self.pool
        if pool is None or not len(pool):
            return
        now = time.time()
        mono = time.monotonic()
        before = self.records_published
        for name in pool.due(mono if not idle else math.inf, most=None if not idle else POOL_IDLE_BATCH):
            self._feed_waiting(name, now)
            if idle and time.monotonic() - mono > POOL_IDLE_S:
                break
        for name in self.status.watched():
            if pool.waiting(name):
                self._feed_waiting(name, now)
        if self.records_published != before:
            # Not expected (waiting samples cannot trip a chart), but a record made here
            # reaches the disk now: its samples' round was acknowledged already.
            self._sync_outbox()

    def _pool_empty(self) -> None:
        """Every pooled stream's engine takes its waiting samples, and none joins again
        until it is fed next (before a reload or a stop)."""
        if self.pool is None:
            return
        now = time.time()
        for name in self.pool.names():
            self._feed_waiting(name, now, rejoin=False)

    def emit(self, rec: AlertRecord, arrived: float) -> None:
        """Publish an alert record (through the outbox) and log its summary."""
        self.floor.note(rec)
        d = rec.to_dict()
        label = self.cfg.label_for(rec.stream, self._filters.get(rec.stream))
        if label is not None:
            d["label"] = label
        d["summary"] = alert_summary(rec, label, self.tz, today=time.time())
        payload = json.dumps(d).encode()
        topic = f"{self.prefix}/alerts/{rec.stream}"
        # Handed to paho first, then written to the outbox, which is forced to
        # disk at the end of the round, before the round's messages are
        # acknowledged: the publication waits for no disk (a crash before the
        # write leaves the messages unacknowledged, so the record is made and
        # sent again).  When the disk refuses it, the record is still published
        # (paho keeps it in memory until the broker acknowledges it).
        mid = self._send(topic, payload, qos=self.cfg.alerts.qos, retain=False)
        key: str | None = None
        try:
            key = self.outbox.add(topic, payload, qos=self.cfg.alerts.qos, sync=False).key
            if not self.outbox.on_disk:
                self.metrics.outbox_failures.inc()
        except OSError as exc:
            self._outbox_failed(exc, time.time())
        if mid is not None:
            self._track(mid, key)
        self.records_published += 1
        self.metrics.alert_delay.observe(max(0.0, time.time() - arrived))
        eng = self.engines.get(rec.stream) if rec.phase == "detected" else None
        self.status.record(rec, None if eng is None else eng.held_samples())
        fields = {"stream": rec.stream, "event_id": rec.id, "phase": rec.phase}
        if label is None:
            self.log.info("%s [id %s]", d["summary"], rec.id, extra=fields)
        else:
            self.log.info("%s [stream %s, id %s]", d["summary"], _printable(rec.stream), rec.id,
                          extra=fields)

    def _publish_floor(self, topic: str, payload: bytes, durable: bool) -> None:
        """A command's reply (as it is), or an acknowledgement record (through the outbox,
        as alert records go)."""
        if not durable:
            self._publish(topic, payload, qos=1, retain=False)
            return
        mid = self._send(topic, payload, qos=self.cfg.alerts.qos, retain=False)
        key: str | None = None
        try:
            key = self.outbox.add(topic, payload, qos=self.cfg.alerts.qos, sync=False).key
        except OSError as exc:
            self._outbox_failed(exc, time.time())
        if mid is not None:
            self._track(mid, key)
        self.records_published += 1  # the round's outbox is synced before its acknowledgement

    def _warn_floor(self, key: str, text: str, now: float) -> None:
        self.rlog.warning(key, text, now)

    def _publish_level(self, topic: str, payload: bytes, level: bool) -> None:
        """A retained level (``level``: counted against LEVELS_IN_FLIGHT), or the empty
        message that clears one (shiftwatch.levels)."""
        self._publish(topic, payload, qos=1, retain=True, level=level)

    def _publish(self, topic: str, payload: bytes, *, qos: int, retain: bool, key: str | None = None,
                 level: bool = False) -> None:
        mid = self._send(topic, payload, qos=qos, retain=retain)
        if mid is not None:
            self._track(mid, key, level=level)

    def _send(self, topic: str, payload: bytes, *, qos: int, retain: bool) -> int | None:
        """Hand a publication to paho; its mid, or None when not started (records
        then stay in the outbox for the next start)."""
        if self.link is None:
            return None
        return self.link.publish(topic, payload, qos=qos, retain=retain)

    def _track(self, mid: int, key: str | None, *, level: bool = False) -> None:
        """Remember which outbox record (if any) publication ``mid`` carries, so the
        broker's acknowledgement removes it, also one that came in already; and
        whether it is a level, which counts against LEVELS_IN_FLIGHT until then."""
        with self._lock:
            if mid in self._early_acks:
                del self._early_acks[mid]
                if key is not None:
                    self._delivered(key)
            else:
                self._mid_key[mid] = key
                if level:
                    self.levels.sent_out(mid)

    def _delivered(self, key: str) -> None:
        """The broker has the record: out of the outbox now, its file deleted by the
        outbox thread (neither paho's thread nor the main loop waits for the disk)."""
        self.outbox.remove(key, defer=True)
        self._acker.purge_soon()

    # ------------------------------------------------ callbacks (paho thread)
    def _published(self, mid: int) -> None:
        with self._lock:
            if mid in self._mid_key:
                key = self._mid_key.pop(mid)
                self.levels.answered(mid)
                if key is not None:
                    self._delivered(key)
            else:
                self._early_acks[mid] = None
                while len(self._early_acks) > 1000:
                    self._early_acks.popitem(last=False)

    def _connection(self, up: bool) -> None:
        self.metrics.broker_connected.set(1 if up else 0)
        cc = self.cfg.cluster
        if up and self.in_cluster and cc is not None and cc.redelivery_wait > 0:
            if self.link is not None and not self.link.session_resumed:
                # A new session: no connection before this one left anything
                # unacknowledged, so nothing can come again.  (Waiting here made a shard
                # started moments before a reshard or a kill take nothing meanwhile.)
                self._hold_until = 0.0
                self._sort_round = False
            else:
                # NATS sends the messages a lost connection (ours, or a dead owner's) left
                # unacknowledged again only when its MQTT ack_wait has passed, after newer
                # ones.  Fed in arrival order they would come after their stream's newer
                # samples and be set aside as out of order: wait for them, then sort.
                self._hold_until = time.monotonic() + cc.redelivery_wait
                self._sort_round = True
                self.log.info("session resumed: processing waits cluster.redelivery_wait (%s s) so that "
                              "what the connection before left unacknowledged comes first",
                              f"{cc.redelivery_wait:g}")
        if not up:
            with self._lock:  # (see LevelBoard.connection_lost)
                self.levels.connection_lost()

    def _count_drop(self, reason: str, n: int = 1) -> None:
        self.metrics.messages_dropped.labels(reason).inc(n)

    def _outbox_failed(self, exc: OSError, now: float) -> None:
        self.metrics.outbox_failures.inc()
        self.rlog.warning("outbox", f"alert outbox in {self.outbox.directory} could not be written "
                          f"({explain_os_error(exc, self.outbox.directory)}); records are still published, but one not yet "
                          f"acknowledged by the broker would not survive a restart", now)

    def _count_handover_drop(self, reason: str) -> None:
        """A message paho's thread could not hand over: it was received all the same."""
        self.metrics.messages_received.inc()
        self._count_drop(reason)

    # --------------------------------------------------------- snapshots
    def snapshot(self) -> bool:
        """Save every engine's state; a new journal starts with the snapshot."""
        if self.cluster is not None:
            return self.keeper.snapshot()
        return self.local.snapshot()

    def reload(self) -> None:
        """SIGHUP: re-read the configuration; streams that stay keep their state."""
        if self.config_path is None:
            self.log.warning("reload asked for, but the configuration did not come from a file")
            return
        try:
            new = load_config(self.config_path)
        except ConfigError as exc:
            self.log.error("reload refused, keeping the running configuration: %s", exc)
            return
        except Exception as exc:  # noqa: BLE001  a defect in reading must never cost the running daemon
            self.log.error("reload refused, keeping the running configuration: %s: cannot be read "
                           "(%s: %s)", self.config_path, type(exc).__name__, exc)
            return
        if not new.streams:
            from shiftwatch.config import NO_STREAMS  # what check and run say of such a file too

            # An empty (or emptied) file would drop every stream and its state at once:
            # much more likely a file caught half-written than a wish.
            self.log.error("reload refused, keeping the running configuration: %s %s", self.config_path,
                           NO_STREAMS)
            return
        # Engines are kept, renewed or dropped below as they stand with every sample taken.
        self._pool_empty()
        old_filters = {s.topic for s in self.cfg.streams} | {self.floor.command_filter}
        new_filters = {s.topic for s in new.streams} | {self.floor.command_filter}
        kept = dropped = renewed = ended = 0
        for name in list(self.engines):
            f = self._filters.get(name)
            old_spec = self.cfg.stream_for(name, f)
            spec = new.stream_for(name, f)
            if spec is None or old_spec is None or spec.detection != old_spec.detection \
                    or spec.unit != old_spec.unit:
                # The engine goes: an event it has open ends with a record (undecided),
                # so no detected record is left without a follow-up.
                now = time.time()
                rec = self.engines[name].end_event(now)
                if rec is not None:
                    self.emit(rec, now)
                    ended += 1
            if spec is None:
                del self.engines[name]
                self.floor.forget(name)
                self._filters.pop(name, None)
                self.metrics.remove_stream(name)
                self.status.forget(name)
                self.sparkplug.forget_stream(name)
                self.levels.clear(name)
                dropped += 1
                continue
            if old_spec is None or spec.detection != old_spec.detection or spec.unit != old_spec.unit:
                self.engines[name] = StreamEngine(name, spec.detection, unit=spec.unit)
                self.floor.attach(name, self.engines[name])  # windows and holds outlive a reload
                renewed += 1
            else:
                kept += 1
            self._filters[name] = spec.topic
        # Only what the README says a reload changes: the other sections (the
        # prefix of the status topic and last will, the broker link, the
        # endpoint, the state directory) stay as they were until the next start.
        self.cfg = dataclasses.replace(self.cfg, streams=new.streams, detection=new.detection)
        self._spec_cache.clear()
        self.shards.reload(new)
        self.status.forget_labels()
        if self.link is not None:
            p = self.shard_prefix
            self.link.set_subscriptions(sorted(p + f for f in new_filters),
                                        added=sorted(p + f for f in new_filters - old_filters),
                                        removed=sorted(p + f for f in old_filters - new_filters))
        if ended:
            self.outbox.sync()
            self.log.info("%d open event(s) ended undecided: their streams were removed or restarted "
                          "with new settings", ended)
        self.log.info("configuration reloaded: %d stream(s) kept, %d restarted with new settings, "
                      "%d removed; filters added %d, removed %d", kept, renewed, dropped,
                      len(new_filters - old_filters), len(old_filters - new_filters))
        # The journal holds samples fed to the engines as they were: a snapshot
        # now keeps it from being replayed into engines made for other settings.
        self.snapshot()


def name_os_threads() -> None:
    """Give each thread of this process but the main one its Python name (cut to the 15
    bytes Linux keeps) in the operating system, where ``top -H``, ``ps -L`` and
    ``/proc/<pid>/task/<tid>/comm`` show it: every thread is called after the process
    otherwise (Python before 3.14 names none), and the shard benchmark reads these names
    to tell the threads' CPU apart.  Called once every thread is started; a thread gone
    meanwhile, or a system without ``/proc``, is passed over."""
    for t in threading.enumerate():
        if t is threading.main_thread() or t.native_id is None:
            continue
        try:
            with open(f"/proc/self/task/{t.native_id}/comm", "w") as f:
                f.write(t.name.encode("utf-8")[:15].decode("utf-8", "ignore"))
        except OSError:
            pass


@functools.lru_cache(maxsize=1)
def settle_heap() -> None:
    """Collect cyclic garbage, then exempt every object alive now from later collections.

    The engines' state (thousands of objects per thousand streams) lives as
    long as the daemon, and each full collection of the cyclic garbage
    collector would walk all of it: tens of milliseconds with 10,000
    streams, in the middle of a round, in front of an alert.  ``gc.freeze``
    moves what is alive to a generation the collector leaves alone; objects
    are still freed by reference counting when the daemon drops them, and
    nothing the engines hold forms cycles.  Called after start-up and after
    each snapshot, when a pause costs least, so streams added later are
    settled too.
    """
    gc.collect()
    gc.freeze()


def _plain_number(v: Any) -> bool:
    """A float, or an int a float holds exactly: what the pool takes as it is."""
    return type(v) is float or (type(v) is int and -(1 << 53) <= v <= 1 << 53)


__all__ = ["DECODE_REASONS", "Daemon", "alert_summary"]
