"""Prometheus metrics of the daemon and the HTTP endpoint that serves them.

This is the only module that imports ``prometheus_client``.  Everything lives
on a :class:`~prometheus_client.CollectorRegistry` owned by a :class:`Metrics`
object, so nothing is registered globally and tests can build as many as they
like.

Per-stream figures are not kept in prometheus_client instruments.  The daemon
hands a :class:`StreamStats` snapshot to :meth:`Metrics.update_stream` after
each batch, and a collector turns the latest snapshots into metric families at
scrape time.  The counters therefore are the engine's own totals (restored from
snapshots after a restart) rather than a second count that could drift.

Names follow Prometheus conventions (base units, ``_total`` on counters,
``_seconds`` and ``_timestamp_seconds`` on times):

==========================================  =============================================
``shiftwatch_samples_total{stream}``         samples received, each once (see :class:`StreamStats`)
``shiftwatch_samples_rejected_total``        rejected samples, by ``stream`` and ``reason``
``shiftwatch_alert_records_total``           alert records, by ``stream`` and ``phase``
``shiftwatch_level{stream}``                 in-control level, in reading units
``shiftwatch_sigma{stream}``                 noise sigma, in reading units
``shiftwatch_test_statistic{stream}``        the sequential test's statistic
``shiftwatch_test_threshold{stream}``        the statistic's alarm threshold
``shiftwatch_last_shift_timestamp_seconds``  when the last confirmed shift started
``shiftwatch_stream_info{stream,state}``     1, labelled with the engine state
``shiftwatch_stream_display_info``           1, labelled with the stream's ``label`` and ``unit``
``shiftwatch_stream_repeating{stream}``      1 while the readings repeat one value improbably long
``shiftwatch_streams``                       streams tracked
==========================================  =============================================

Missing values are omitted, never exported as NaN: ``shiftwatch_level`` and
``shiftwatch_sigma`` appear once the first warm-up has set a baseline, the test
gauges once a test has been designed (the threshold is known), and
``shiftwatch_last_shift_timestamp_seconds`` once a shift has been confirmed.
NaN would poison every sum and average over streams; an absent series is what
PromQL expects for "not known yet".
"""

from __future__ import annotations

import asyncio
import functools
import gzip
import logging
import math
import socket
import ssl
import threading
import time
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any, Protocol, Self
from urllib.parse import parse_qs, urlsplit

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram
from prometheus_client.exposition import choose_encoder, gzip_accepted
from prometheus_client.metrics_core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

__all__ = ["ALERT_DELAY_BUCKETS", "CONNECTION_TIMEOUT", "DEFAULT_LISTEN", "MAX_CONNECTIONS", "Metrics",
           "MetricsServer", "SparkplugMetrics", "StreamStats", "parse_listen"]

#: Where the endpoint listens unless configured otherwise: loopback only.
DEFAULT_LISTEN = "127.0.0.1:9650"

#: Buckets of ``shiftwatch_alert_delay_seconds``: 1 ms to 10 s in 1-2.5-5 steps.
ALERT_DELAY_BUCKETS: tuple[float, ...] = (
    0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)

#: Seconds a connection to the endpoint may last in all, from accept to the last byte of
#: the response (TLS handshake, request and response together), however slowly it sends.
#: Prometheus's own scrape_timeout defaults to 10 s.
CONNECTION_TIMEOUT = 10.0
#: Connections open at once, at most (the unit's LimitNOFILE leaves room for them).  A
#: scrape needs one for a few milliseconds; past the bound the oldest connection still
#: sending its request is closed to make room.
MAX_CONNECTIONS = 32


#: Shared by the snapshots of every stream that has no rejections or records yet.
_NONE: Mapping[str, int] = MappingProxyType({})


@dataclass(frozen=True, slots=True)
class StreamStats:
    """What the metrics show of one stream at one moment.

    Attributes
    ----------
    samples_total : samples received, rejected ones included, except those whose time is not
        newer than the stream's newest (a redelivery or a late sample): those count only in
        ``rejected_total``, so a message delivered twice never counts twice.
    rejected_total : rejected samples by reason code.
    records_total : alert records by phase.
    level, sigma : in-control level and noise sigma; None before the first baseline.
    statistic, threshold : the sequential test's statistic and threshold; the
        threshold is NaN while no test has been designed.
    last_shift_at : epoch seconds at which the last confirmed shift started, or None.
    state : the engine state (``warming_up``, ``watching``, ``event_open``).
    unit : the unit of the readings, when known.
    repeating : the run of one repeated reading the engine flags (a stuck sensor is possible;
        core/repeats.py), or None.
    """

    samples_total: int
    rejected_total: Mapping[str, int]
    records_total: Mapping[str, int]
    level: float | None
    sigma: float | None
    statistic: float
    threshold: float
    last_shift_at: float | None
    state: str
    unit: str | None = None
    repeating: Any = None

    @classmethod
    def from_engine(cls, engine: Any) -> StreamStats:
        """Copy the figures out of a ``StreamEngine`` (the counters are copied, not shared).

        One snapshot per stream is held at all times, so it is kept small:
        no per-instance dict, and empty counters share one empty mapping.

        Parameters
        ----------
        engine : a :class:`shiftwatch.core.engine.StreamEngine`.

        Returns
        -------
        StreamStats
        """
        if DIRECT_SNAPSHOT and cls is StreamStats:
            # The frozen dataclass's __init__ sets each field by object.__setattr__ (a
            # lookup of the slot through the class each time); here each slot's own
            # setter, bound once (_slot_setters): the same object, in a third of the time.
            st = object.__new__(cls)
            (set_samples, set_rejected, set_records, set_level, set_sigma, set_statistic, set_threshold,
             set_shift, set_state, set_unit, set_repeating) = _SETTERS
            set_samples(st, int(engine.samples_total))
            set_rejected(st, dict(engine.rejected_total) if engine.rejected_total else _NONE)
            set_records(st, dict(engine.records_total) if engine.records_total else _NONE)
            set_level(st, engine.level)
            set_sigma(st, engine.sigma)
            set_statistic(st, float(engine.statistic))
            set_threshold(st, float(engine.threshold))
            set_shift(st, engine.last_shift_at)
            set_state(st, str(engine.state))
            set_unit(st, engine.unit)
            set_repeating(st, engine.repeating)
            return st
        return cls(
            samples_total=int(engine.samples_total),
            rejected_total=dict(engine.rejected_total) if engine.rejected_total else _NONE,
            records_total=dict(engine.records_total) if engine.records_total else _NONE,
            level=engine.level,
            sigma=engine.sigma,
            statistic=float(engine.statistic),
            threshold=float(engine.threshold),
            last_shift_at=engine.last_shift_at,
            state=str(engine.state),
            unit=engine.unit,
            repeating=engine.repeating,
        )


#: ``StreamStats.from_engine`` sets the snapshot's slots through their own setters
#: (False: through the dataclass's ``__init__``, the reference).  The same snapshot
#: (tests/daemon/test_metrics_snapshot.py); 1.6 against 2.7 microseconds a stream and
#: round (timeit, 2026-12-05), which a shard in cluster mode pays for every stream fed.
DIRECT_SNAPSHOT = True


def _slot_setters() -> tuple[Callable[[StreamStats, Any], None], ...]:
    """Each field's slot setter, in the order ``from_engine`` unpacks them."""
    order = ("samples_total", "rejected_total", "records_total", "level", "sigma", "statistic", "threshold",
             "last_shift_at", "state", "unit", "repeating")
    if set(order) != set(StreamStats.__slots__):
        raise RuntimeError("StreamStats' fields changed: update metrics._slot_setters")
    return tuple(StreamStats.__dict__[name].__set__ for name in order)


_SETTERS = _slot_setters()


def _known(x: float | None) -> float | None:
    """The value as a float, or None when it is missing or NaN."""
    return None if x is None or math.isnan(x) else float(x)


def _fam_samples(names: list[str], stats: list[StreamStats]) -> Metric:
    f = CounterMetricFamily(
        "shiftwatch_samples", "Samples received for the stream, each once (a repeat or late time counts only as rejected).",
        labels=["stream"])
    for name, st in zip(names, stats):
        f.add_metric([name], float(st.samples_total))
    return f


def _fam_rejected(names: list[str], stats: list[StreamStats]) -> Metric:
    f = CounterMetricFamily(
        "shiftwatch_samples_rejected", "Samples rejected by screening, by reason.",
        labels=["stream", "reason"])
    for name, st in zip(names, stats):
        for reason in sorted(st.rejected_total):
            f.add_metric([name, reason], float(st.rejected_total[reason]))
    return f


def _fam_records(names: list[str], stats: list[StreamStats]) -> Metric:
    f = CounterMetricFamily(
        "shiftwatch_alert_records", "Alert records produced, by phase.",
        labels=["stream", "phase"])
    for name, st in zip(names, stats):
        for phase in sorted(st.records_total):
            f.add_metric([name, phase], float(st.records_total[phase]))
    return f


def _known_gauge(metric: str, text: str, field: str) -> Callable[[list[str], list[StreamStats]], Metric]:
    """A per-stream gauge of one StreamStats field, absent for a stream where it is unknown."""

    def family(names: list[str], stats: list[StreamStats]) -> Metric:
        f = GaugeMetricFamily(metric, text, labels=["stream"])
        for name, st in zip(names, stats):
            if (v := _known(getattr(st, field))) is not None:
                f.add_metric([name], v)
        return f

    return family


_fam_level = _known_gauge(
    "shiftwatch_level", "In-control level of the stream, in reading units "
    "(absent until the first warm-up ends).", "level")
_fam_sigma = _known_gauge(
    "shiftwatch_sigma", "Noise standard deviation of the stream, in reading units "
    "(absent until the first warm-up ends).", "sigma")
_fam_threshold = _known_gauge(
    "shiftwatch_test_threshold", "Alarm threshold of the stream's sequential test "
    "(absent until the test is set up).", "threshold")
_fam_last_shift = _known_gauge(
    "shiftwatch_last_shift_timestamp_seconds", "Start time of the last confirmed shift, "
    "in seconds since the Unix epoch (absent until a shift is confirmed).", "last_shift_at")


def _fam_statistic(names: list[str], stats: list[StreamStats]) -> Metric:
    f = GaugeMetricFamily(
        "shiftwatch_test_statistic", "Current statistic of the stream's sequential test "
        "(absent until the test is set up).", labels=["stream"])
    for name, st in zip(names, stats):
        if _known(st.threshold) is not None:
            f.add_metric([name], float(st.statistic))
    return f


def _fam_info(names: list[str], stats: list[StreamStats]) -> Metric:
    f = GaugeMetricFamily(
        "shiftwatch_stream_info", "Always 1; the state label is the engine state "
        "(warming_up, watching or event_open).", labels=["stream", "state"])
    for name, st in zip(names, stats):
        f.add_metric([name, st.state], 1.0)
    return f


def _display_info(labels: Callable[[str], str | None]) -> Callable[[list[str], list[StreamStats]], Metric]:
    """``shiftwatch_stream_display_info``: the label and unit of each stream, once, for panels.

    A stream without a configured label or a known unit has that label empty
    (which PromQL treats as absent).
    """

    def family(names: list[str], stats: list[StreamStats]) -> Metric:
        f = GaugeMetricFamily(
            "shiftwatch_stream_display_info", "Always 1; the label and unit labels are the "
            "stream's configured label and the unit of its readings (empty when none).",
            labels=["stream", "label", "unit"])
        for name, st in zip(names, stats):
            f.add_metric([name, labels(name) or "", st.unit or ""], 1.0)
        return f

    return family


def _fam_repeating(names: list[str], stats: list[StreamStats]) -> Metric:
    f = GaugeMetricFamily(
        "shiftwatch_stream_repeating", "1 while the stream's readings repeat one value for longer "
        "than its own noise and resolution make likely (a stuck sensor is possible), else 0.",
        labels=["stream"])
    for name, st in zip(names, stats):
        f.add_metric([name], 0.0 if st.repeating is None else 1.0)
    return f


def _fam_count(names: list[str], stats: list[StreamStats]) -> Metric:
    f = GaugeMetricFamily("shiftwatch_streams", "Streams currently tracked.")
    f.add_metric([], float(len(names)))
    return f


#: The per-stream families, in the order a full scrape shows them.
_FAMILIES = (_fam_samples, _fam_rejected, _fam_records, _fam_level, _fam_sigma, _fam_statistic,
             _fam_threshold, _fam_last_shift, _fam_info, _fam_repeating, _fam_count)


class _StreamCollector(Collector):
    """Builds one per-stream family from the latest snapshots at scrape time.

    There is one collector per family, so a scrape that asks for some names
    (``?name[]=...``) builds only those families, and a full scrape builds them
    one after the other.  With 10,000 streams the samples of all families,
    built at once in the scrape's thread, took some 20 MB while the main thread
    kept allocating the streams' state among them; that state then pinned the
    memory after the scrape (the daemon's resident size grew by about 2 kB a
    stream).
    """

    def __init__(self, metrics: Metrics, family: Callable[[list[str], list[StreamStats]], Metric]) -> None:
        self._metrics = metrics
        self._family = family

    def describe(self) -> list[Metric]:
        # Names only, so the registry can detect clashes without a scrape.
        return [self._family([], [])]

    def collect(self) -> Iterator[Metric]:
        streams = self._metrics._snapshot()
        names = sorted(streams)
        yield self._family(names, [streams[n] for n in names])


def parse_listen(listen: str) -> tuple[str, int]:
    """Split ``host:port`` (``[v6addr]:port`` for IPv6) into host and port.

    An empty host means loopback (``127.0.0.1``); listening on every interface
    has to be asked for with ``0.0.0.0`` or ``[::]``.

    Parameters
    ----------
    listen : the address, e.g. ``"127.0.0.1:9650"``; port 0 picks a free port.

    Returns
    -------
    tuple of (host, port)

    Raises
    ------
    ValueError
        If there is no port or the port is out of range.

    Examples
    --------
    >>> parse_listen("127.0.0.1:9650")
    ('127.0.0.1', 9650)
    >>> parse_listen("[::1]:0")
    ('::1', 0)
    >>> parse_listen(":9650")
    ('127.0.0.1', 9650)
    """
    host, sep, port = listen.rpartition(":")
    if not sep or not port.isdigit() or not 0 <= int(port) <= 65535:
        raise ValueError(f"listen address must be host:port, got {listen!r}")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    return (host or "127.0.0.1"), int(port)


class _Connection:
    """One accepted connection: its task, and whether it is still sending its request."""

    __slots__ = ("reading", "since", "task")

    def __init__(self, task: asyncio.Task[None]) -> None:
        self.task = task
        self.reading = True  # the TLS handshake or the request head is not complete yet
        self.since = time.monotonic()


_Key = tuple[str, tuple[str, ...], bool]
#: The ``accept`` of a render key that asks for a page of the status board, not the exposition.
_PAGE = "\x00page"
_log = logging.getLogger(__name__)


class PageSource(Protocol):
    """What the endpoint needs of the status board (:class:`shiftwatch.status.StatusBoard`)."""

    def page(self, path: str, query: str) -> tuple[int, bytes, str]: ...

    def want(self, name: str) -> bool: ...

    def has_stream(self, name: str) -> bool: ...


class WithLabels:
    """A registry seen with constant labels added to every sample (for the encoders,
    which only call ``collect()``; ``restricted_registry`` keeps the labels).

    >>> from prometheus_client import Counter, generate_latest
    >>> reg = CollectorRegistry()
    >>> Counter("bottles", "Bottles.", registry=reg).inc(3)
    >>> print(generate_latest(WithLabels(reg, {"shard": "2"})).decode().splitlines()[2])
    bottles_total{shard="2"} 3.0
    """

    def __init__(self, registry: Any, labels: dict[str, str]) -> None:
        self._registry = registry
        self._labels = labels

    def restricted_registry(self, names: list[str]) -> WithLabels:
        return WithLabels(self._registry.restricted_registry(names), self._labels)

    def collect(self) -> Iterator[Any]:
        for m in self._registry.collect():
            m.samples = [s._replace(labels={**s.labels, **self._labels}) for s in m.samples]
            yield m


class _Renderer:
    """Renders the exposition in a thread of its own, one render at a time, shared by every
    request that arrived before it started.

    A request joins the batch for its kind of output (format, names asked for,
    gzip); the thread takes all waiting batches, renders each once and hands the
    bytes to every request of it.  So each scrape sees figures gathered after it
    arrived, and any number of parallel scrapers cost one render at a time:
    with 10,000 streams a render is about 1.3 MB of text and a good part of a
    second of CPU, and eight scrapers each rendering in a thread of its own kept
    the main thread from the interpreter lock for seconds (alerts waited 5-6 s).
    After each render the thread rests as long as the render took, so scraping
    takes at most about half of one core however hard it is pushed.
    """

    def __init__(self, registry: CollectorRegistry, pages: PageSource | None = None) -> None:
        self._registry = registry
        self._pages = pages
        self._cv = threading.Condition()
        self._waiting: dict[_Key, list[tuple[asyncio.AbstractEventLoop, asyncio.Future[Any]]]] = {}
        self._closed = False
        self.renders = 0
        self._failures: dict[str, tuple[float, int]] = {}  # what failed: (when last logged, failures since)
        # Started here, with the endpoint: no thread is ever started while serving.
        self._thread = threading.Thread(target=self._run, name="metrics-render", daemon=True)
        self._thread.start()

    def submit(self, key: _Key, fut: asyncio.Future[Any]) -> None:
        with self._cv:
            self._waiting.setdefault(key, []).append((fut.get_loop(), fut))
            self._cv.notify()

    def close(self) -> None:
        with self._cv:
            self._closed = True
            self._cv.notify()
        self._thread.join()

    def _run(self) -> None:
        while True:
            with self._cv:
                self._cv.wait_for(lambda: self._closed or bool(self._waiting))
                if self._closed:
                    return
                batches, self._waiting = self._waiting, {}
            started = time.monotonic()
            for key, waiters in batches.items():
                try:
                    result: Any = self._render(*key)
                except Exception as exc:  # noqa: BLE001  a failed render fails its scrapes, never the thread
                    result = exc
                    self._log_failure(key, exc)
                for loop, fut in waiters:
                    try:
                        loop.call_soon_threadsafe(_settle, fut, result)
                    except RuntimeError:  # the endpoint's loop has closed
                        pass
                self.renders += 1
            took = time.monotonic() - started
            with self._cv:  # rest as long as the render took (or until closed)
                self._cv.wait_for(lambda: self._closed, timeout=min(took, 5.0))

    def _log_failure(self, key: _Key, exc: Exception) -> None:
        """Say why a render failed (its requests get a 500): one line per kind of request a
        minute, with the count of the failures not logged since."""
        what = f"the status page {key[1][0]}" if key[0] == _PAGE else "the metrics"
        now = time.monotonic()
        last, quiet = self._failures.get(what, (-math.inf, 0))
        if now - last < 60.0:
            self._failures[what] = (last, quiet + 1)
            return
        self._failures[what] = (now, 0)
        more = f" ({quiet} more failure(s) since the last line)" if quiet else ""
        _log.error("%s could not be rendered (answered HTTP 500): %s: %.300s%s", what,
                   type(exc).__name__, exc, more)

    def _render(self, accept: str, names: tuple[str, ...], zipped: bool) -> tuple[bytes, str, bool, int]:
        status = 200
        if accept == _PAGE and self._pages is not None:
            status, out, content_type = self._pages.page(*names)
        else:
            encoder, content_type = choose_encoder(accept)
            registry: Any = self._registry.restricted_registry(list(names)) if names else self._registry
            out = encoder(registry)
        if zipped:
            out = gzip.compress(out, compresslevel=1)
        return out, content_type, zipped, status


def _settle(fut: asyncio.Future[Any], result: Any) -> None:
    if fut.done():
        return
    if isinstance(result, BaseException):
        fut.set_exception(result)
    else:
        fut.set_result(result)


_STATUS = {200: "OK", 303: "See Other", 400: "Bad Request", 404: "Not Found", 405: "Method Not Allowed",
           414: "URI Too Long", 431: "Request Header Fields Too Large", 500: "Internal Server Error",
           503: "Service Unavailable"}

#: Longest request head (request line and headers) read; a longer one is cut off.
_MAX_HEAD = 16384


def _response(status: int, body: bytes, content_type: str = "text/plain; charset=utf-8",
              extra: tuple[tuple[str, str], ...] = (), *, head_only: bool = False) -> bytes:
    lines = [f"HTTP/1.1 {status} {_STATUS.get(status, '')}", f"Content-Type: {content_type}",
             f"Content-Length: {len(body)}", "Connection: close"]
    lines += [f"{k}: {v}" for k, v in extra]
    return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1") + (b"" if head_only else body)


class _Endpoint:
    """The metrics endpoint: one asyncio loop in one thread serves every connection.

    Each connection gets ``deadline`` seconds in all, from accept to the last
    byte of the response (TLS handshake, request, response), however slowly it
    sends: a client that trickles a byte every few seconds is cut at the
    deadline (the threaded server it replaces timed each read, so such a client
    stayed for ever, with a thread of its own).  At most ``max_connections`` are
    open at once; a new one past the bound closes the oldest that has not
    finished sending its request (a slow or silent client), or, when every one
    is being answered, gets a 503 and is closed.  No thread is made per
    connection, so slow clients cannot make the daemon start a thread it cannot
    have (under a task limit), and the file descriptors it takes stay within
    the bound.  The listening socket stays plain; TLS starts on each accepted
    connection, inside its deadline, so a silent client holds up no other.
    """

    def __init__(self, host: str, port: int, tls: ssl.SSLContext | None, deadline: float,
                 max_connections: int, registry: CollectorRegistry,
                 pages: PageSource | None = None) -> None:
        if max_connections < 1:
            raise ValueError(f"max_connections must be at least 1, got {max_connections}")
        family, _, _, _, sockaddr = socket.getaddrinfo(
            host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)[0]
        sock = socket.socket(family, socket.SOCK_STREAM)
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            sock.bind(sockaddr)
            sock.listen(128)
            sock.setblocking(False)
        except BaseException:
            sock.close()
            raise
        self.sock = sock
        self.server_address = sock.getsockname()
        self.tls = tls
        self.deadline = deadline
        self.max_connections = max_connections
        self.shed = 0  # connections closed or refused at the bound
        self._conns: dict[asyncio.Task[None], _Connection] = {}  # still reading or being answered
        self._held = 0  # accepted sockets not yet closed (shed ones included until they are)
        self._freed: asyncio.Event
        self._loop = asyncio.new_event_loop()
        self._loop.set_exception_handler(lambda loop, context: None)  # clients' faults are no events
        self._ready = threading.Event()
        self.pages = pages
        self.renderer: _Renderer | None = None
        self.thread: threading.Thread | None = None
        try:
            self.renderer = _Renderer(registry, pages)
            self.thread = threading.Thread(target=self._serve, name="metrics-http", daemon=True)
            self.thread.start()
            self._ready.wait()
        except BaseException:
            self.close()
            raise

    # ----------------------------------------------------------- the loop's thread
    def _serve(self) -> None:
        asyncio.set_event_loop(self._loop)
        self._freed = asyncio.Event()
        accepting = self._loop.create_task(self._accept())
        self._ready.set()
        try:
            self._loop.run_forever()
        finally:
            accepting.cancel()
            for task in list(self._conns):
                task.cancel()
            self._loop.run_until_complete(
                asyncio.gather(accepting, *self._conns, return_exceptions=True))

    async def _accept(self) -> None:
        """Accept one connection at a time; past the bound, make room first.

        The accepted socket is one over the bound for as long as it takes to
        close the oldest connection still sending its request; when every
        connection is being answered, the new one gets a 503 and is closed.
        Nothing more is accepted meanwhile (the kernel's backlog holds them),
        so the descriptors held never pass ``max_connections + 1``.
        """
        loop = self._loop
        while True:
            try:
                conn, _ = await loop.sock_accept(self.sock)
            except OSError:  # out of descriptors (another part of the process), or a reset
                await asyncio.sleep(0.1)
                continue
            if self._held >= self.max_connections:
                if not self._shed_one():
                    self.shed += 1
                    try:
                        conn.setblocking(False)
                        conn.send(_response(503, b"too many connections to the metrics endpoint\n"))
                    except OSError:
                        pass
                    conn.close()
                    continue
                while self._held >= self.max_connections:
                    self._freed.clear()
                    await self._freed.wait()
            self._held += 1
            task = loop.create_task(self._handle(conn))
            self._conns[task] = _Connection(task)
            # The bookkeeping is the task's done callback, not its own finally: a task
            # shed before it first ran never enters its try, and would leak its place.
            task.add_done_callback(functools.partial(self._done, conn=conn))

    def _done(self, task: asyncio.Task[None], conn: socket.socket) -> None:
        self._conns.pop(task, None)
        conn.close()  # no-op when the handler's transport has closed it already
        self._held -= 1
        self._freed.set()

    def _shed_one(self) -> bool:
        """Close the oldest connection still sending its request; False when there is none."""
        oldest = min((c for c in self._conns.values() if c.reading), key=lambda c: c.since, default=None)
        if oldest is None:
            return False
        del self._conns[oldest.task]
        oldest.task.cancel()
        self.shed += 1
        return True

    async def _handle(self, conn: socket.socket) -> None:
        task = asyncio.current_task()
        assert task is not None
        writer: asyncio.StreamWriter | None = None
        answered = False
        try:
            async with asyncio.timeout(self.deadline):
                # The TLS handshake, when there is one, is part of the connection's deadline.
                reader = asyncio.StreamReader(limit=_MAX_HEAD, loop=self._loop)
                protocol = asyncio.StreamReaderProtocol(reader, loop=self._loop)
                transport, _ = await self._loop.connect_accepted_socket(
                    lambda: protocol, sock=conn, ssl=self.tls,
                    ssl_handshake_timeout=self.deadline if self.tls is not None else None)
                writer = asyncio.StreamWriter(transport, protocol, reader, self._loop)
                try:
                    head = await reader.readuntil(b"\r\n\r\n")
                except asyncio.LimitOverrunError:
                    await self._refuse_long_head(reader, writer)
                    answered = True
                    return
                record = self._conns.get(task)
                if record is not None:
                    record.reading = False
                await self._answer(head, writer)
                answered = True
        except (Exception, asyncio.CancelledError):  # noqa: BLE001, S110  see below
            pass  # timed out, shed, hung up, a bad handshake or request: closed, nothing to tell
        finally:
            self._conns.pop(task, None)
            if writer is not None:  # else _done closes the socket
                if answered:
                    writer.close()
                else:
                    writer.transport.abort()
                try:
                    await asyncio.wait_for(writer.wait_closed(), 2.0)
                except (Exception, asyncio.CancelledError):  # noqa: BLE001  not closed cleanly: aborted
                    writer.transport.abort()

    async def _refuse_long_head(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        """Answer a request whose head passes :data:`_MAX_HEAD`: 414 when its request line alone
        does (a long status filter), else 431 (RFC 9110 15.5.15, RFC 6585 5); the connection was
        closed without an answer.  The rest the client sent is read and dropped until it closes
        (bounded by the connection's deadline): closing with unread bytes sends a reset, which
        can make the client lose the answer."""
        start = await reader.read(_MAX_HEAD)
        if b"\r\n" not in start:
            writer.write(_response(414, f"the request line is longer than {_MAX_HEAD:,} bytes; "
                                   "a shorter filter (q) or name is served\n".encode()))
        else:
            writer.write(_response(431, f"the request's headers are longer than {_MAX_HEAD:,} "
                                   "bytes\n".encode()))
        await writer.drain()
        if writer.can_write_eof():
            writer.write_eof()
        while await reader.read(65536):
            pass

    async def _answer(self, head: bytes, writer: asyncio.StreamWriter) -> None:
        lines = head.decode("latin-1").split("\r\n")
        parts = lines[0].split(" ")
        if len(parts) != 3:
            writer.write(_response(400, b"bad request\n"))
            return
        method, target, _ = parts
        headers = {}
        for line in lines[1:]:
            name, sep, value = line.partition(":")
            if sep:
                headers[name.strip().lower()] = value.strip()
        if method not in ("GET", "HEAD"):
            writer.write(_response(405, b"only GET and HEAD are served\n"))
            return
        url = urlsplit(target)
        accept = headers.get("accept", "")
        zipped = gzip_accepted(headers.get("accept-encoding", ""))
        head_only = method == "HEAD"
        pages = self.pages
        if pages is not None and (url.path == "/status" or url.path.startswith("/status/")
                                  or url.path == "/status.json"):
            await self._answer_page(pages, url.path, url.query, zipped, head_only, writer)
            return
        if url.path == "/" and pages is not None and "text/html" in accept:
            # A person's browser at the bare address gets the status page; scrapers (which
            # never ask for HTML) still get the exposition at / as before.
            writer.write(_response(303, b"the status page is at /status\n",
                                   extra=(("Location", "/status"),), head_only=head_only))
            return
        if url.path not in ("/metrics", "/"):
            writer.write(_response(404, b"not found; the metrics are at /metrics, the status page "
                                   b"at /status\n"))
            return
        names = tuple(sorted(parse_qs(url.query).get("name[]", [])))
        await self._rendered((accept, names, zipped), head_only, writer,
                             b"the metrics could not be rendered\n")

    async def _rendered(self, key: _Key, head_only: bool, writer: asyncio.StreamWriter,
                        failed: bytes, extra: tuple[tuple[str, str], ...] = ()) -> None:
        """Have the render thread make the answer to ``key`` and send it."""
        fut: asyncio.Future[tuple[bytes, str, bool, int]] = self._loop.create_future()
        assert self.renderer is not None
        self.renderer.submit(key, fut)
        try:
            body, content_type, zipped, status = await fut
        except Exception:  # noqa: BLE001  whatever failed the render, the request gets a 500
            writer.write(_response(500, failed))
            return
        if zipped:
            extra += (("Content-Encoding", "gzip"),)
        writer.write(_response(status, body, content_type, extra, head_only=head_only))
        await writer.drain()

    async def _answer_page(self, pages: PageSource, path: str, query: str, zipped: bool,
                           head_only: bool, writer: asyncio.StreamWriter) -> None:
        """The status page, its files and its JSON (see :mod:`shiftwatch.status`)."""
        from shiftwatch import status  # the page's module, imported only when a page is asked for

        extra = _PAGE_HEADERS
        if path.startswith("/status/assets/"):
            name = path.removeprefix("/status/assets/")
            if name not in status.ASSETS:
                writer.write(_response(404, b"not found\n"))
                return
            writer.write(_response(200, status.asset(name), status.ASSETS[name], extra,
                                   head_only=head_only))
            await writer.drain()
            return
        if path not in status.PAGE_PATHS:
            writer.write(_response(404, b"not found; the status page is at /status\n"))
            return
        if path == "/status/stream.json":
            # The main thread copies a stream's held samples after its rounds, once a page
            # asks for them: wait here (not in the render thread) for the first copy.
            name = parse_qs(query).get("name", [""])[0]
            if pages.has_stream(name):
                deadline = time.monotonic() + status.WINDOW_WAIT_S
                while not pages.want(name) and time.monotonic() < deadline:
                    await asyncio.sleep(0.02)
        await self._rendered((_PAGE, (path, query), zipped), head_only, writer,
                             b"the status page could not be rendered\n", extra)

    # ----------------------------------------------------------- from other threads
    def open_connections(self) -> int:
        return self._held

    def close(self) -> None:
        if self.thread is not None and self.thread.is_alive():
            self._loop.call_soon_threadsafe(self._loop.stop)
            self.thread.join()
        if not self._loop.is_closed():
            self._loop.close()
        if self.renderer is not None:
            self.renderer.close()
        self.sock.close()


#: Headers of the status page's answers: nothing may be loaded from anywhere but this
#: endpoint, and no answer is cached (the page asks again every few seconds).
_PAGE_HEADERS = (
    ("Content-Security-Policy", ("default-src 'none'; script-src 'self'; style-src 'self'; "
                                 "connect-src 'self'; img-src 'self'; base-uri 'none'; "
                                 "form-action 'none'; frame-ancestors 'none'")),
    ("X-Content-Type-Options", "nosniff"),
    ("Cache-Control", "no-store"),
    ("Referrer-Policy", "no-referrer"),
)


def _tls_context(certfile: str, keyfile: str, client_cafile: str | None) -> ssl.SSLContext:
    """The server's TLS context; with a client CA, a client certificate it signed is required."""
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    if client_cafile is not None:
        try:
            ctx.load_verify_locations(cafile=client_cafile)
        except OSError as exc:
            raise OSError(f"Cannot load client CA file {client_cafile!r}: {exc}") from None
        ctx.verify_mode = ssl.CERT_REQUIRED
    try:
        ctx.load_cert_chain(certfile=certfile, keyfile=keyfile)
    except OSError as exc:
        raise OSError(f"Cannot load server certificate file {certfile!r} or its private key "
                      f"file {keyfile!r}: {exc}") from None
    return ctx


class MetricsServer:
    """A running metrics endpoint; :meth:`close` stops it.

    Attributes
    ----------
    host : the address it is bound to.
    port : the port it is bound to (the chosen one when port 0 was asked for).
    """

    def __init__(self, endpoint: _Endpoint) -> None:
        self._endpoint = endpoint
        addr = endpoint.server_address
        self.host: str = str(addr[0])
        self.port: int = int(addr[1])

    @property
    def shed(self) -> int:
        """Connections closed or refused at the bound so far."""
        return self._endpoint.shed

    @property
    def open_connections(self) -> int:
        """Connections open now."""
        return self._endpoint.open_connections()

    @property
    def renders(self) -> int:
        """Renders of the exposition so far (one serves every scrape that waited for it)."""
        r = self._endpoint.renderer
        return 0 if r is None else r.renders

    def close(self) -> None:
        """Stop serving, close the socket and wait for the endpoint's threads."""
        self._endpoint.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class Metrics:
    """The daemon's metrics on a registry of their own.

    Parameters
    ----------
    registry : where to register; a fresh :class:`CollectorRegistry` by default.

    Attributes
    ----------
    registry : the registry everything is registered on.
    broker_connected : 1 while connected to the MQTT broker, else 0.
    messages_received : MQTT messages received.
    messages_processed : messages taken from the ingest queue and processed.
    messages_dropped : MQTT messages discarded, labelled by ``reason``.
    alert_delay : seconds from a sample's arrival to the publication of its alert.
    queue_depth : messages waiting in the ingest queue.
    samples_waiting : samples of calm streams waiting to reach their engines in one batch.
    outbox_depth : alert records waiting for the broker's acknowledgement.
    snapshot_failures : state snapshots that could not be written.
    snapshots : state snapshots written.
    outbox_failures : alert records or outbox updates that could not be written to disk.
    journal_failures : rounds of samples that could not be appended to the journal.
    states_set_aside : saved stream states that could not be used at start, and (state in the
        cluster) stream loads that found a damaged part, snapshot entries and the mapping
        record written anew.
    journal_damaged : sample journals found deleted, replaced or damaged.
    client_id_conflicts : takeovers of the MQTT session by another client with our client id.
    samples_handed_over : samples of another shard's streams written to their journal for it.
    handovers : streams that moved to this shard and waited for their last writer, by outcome.
    """

    def __init__(self, registry: CollectorRegistry | None = None, *,
                 const_labels: dict[str, str] | None = None) -> None:
        self.registry = registry if registry is not None else CollectorRegistry()
        #: Labels put on every series served (a shard's ``shard="<number>"``), so the
        #: series of many daemons stay apart whatever the scrape configuration.
        self.const_labels = dict(const_labels or {})
        self._lock = threading.Lock()
        self._streams: dict[str, StreamStats] = {}
        self._sparkplug: SparkplugMetrics | None = None
        reg = self.registry
        self.broker_connected = Gauge(
            "shiftwatch_broker_connected", "1 while connected to the MQTT broker, else 0.",
            registry=reg)
        self.messages_received = Counter(
            "shiftwatch_messages_received", "MQTT messages received.", registry=reg)
        self.messages_processed = Counter(
            "shiftwatch_messages_processed",
            "MQTT messages taken from the ingest queue and processed: decoded, their samples fed "
            "to the engines, their alert records published (the acknowledgement follows).",
            registry=reg)
        self.messages_dropped = Counter(
            "shiftwatch_messages_dropped", "MQTT messages discarded without processing, by reason.",
            labelnames=["reason"], registry=reg)
        self.alert_delay = Histogram(
            "shiftwatch_alert_delay_seconds",
            "Seconds from the arrival of the sample that completed an alert record "
            "to the record's publication.", buckets=ALERT_DELAY_BUCKETS, registry=reg)
        self.queue_depth = Gauge(
            "shiftwatch_ingest_queue_depth", "Messages received and waiting to be processed.",
            registry=reg)
        self.samples_waiting = Gauge(
            "shiftwatch_samples_waiting",
            "Samples of calm streams taken in (journaled) and waiting to reach their engines in "
            "one batch; not yet in shiftwatch_samples_total.", registry=reg)
        self.outbox_depth = Gauge(
            "shiftwatch_outbox_depth", "Alert records waiting for the broker to acknowledge them.",
            registry=reg)
        self.snapshot_failures = Counter(
            "shiftwatch_snapshot_failures", "State snapshots that could not be written.",
            registry=reg)
        self.snapshots = Counter(
            "shiftwatch_snapshots", "State snapshots written.", registry=reg)
        self.outbox_failures = Counter(
            "shiftwatch_outbox_failures",
            "Alert records (or outbox updates) that could not be written to disk; the records "
            "were still published.", registry=reg)
        self.journal_failures = Counter(
            "shiftwatch_journal_failures",
            "Rounds of samples that could not be journaled (journaling resumes with the next "
            "snapshot).", registry=reg)
        self.journal_damaged = Counter(
            "shiftwatch_journal_damaged",
            "Sample journals found deleted, replaced or with a damaged header, at start or while "
            "running; the samples since the last snapshot that only they held are lost at start, "
            "kept by an immediate snapshot while running.", registry=reg)
        self.client_id_conflicts = Counter(
            "shiftwatch_client_id_conflicts",
            "Times the broker closed the connection in a way that means another client connected "
            "with the same client id and took the session over; each doubles the wait before "
            "the next attempt.", registry=reg)
        self.samples_handed_over = Counter(
            "shiftwatch_samples_handed_over",
            "Samples of streams that the shard mapping gives another shard, written to their "
            "stream's journal in the cluster for that shard, or parked for it when the journal "
            "refused them and the owner may still wait for them (they also count in "
            "shiftwatch_messages_dropped_total{reason=\"other_shard\"}).", registry=reg)
        self.handovers = Counter(
            "shiftwatch_stream_handovers",
            "Streams that moved to this shard (the number of shards changed) and waited, before "
            "their first samples here were fed, for the shard that wrote them last to pass on "
            "what it still held of them; outcome answered, or waited_out after "
            "cluster.handover_wait.", ["outcome"], registry=reg)
        self.samples_parked = Counter(
            "shiftwatch_samples_parked",
            "Samples of streams waiting for their last writer (see "
            "shiftwatch_stream_handovers_total), parked in the cluster so that their messages "
            "could be acknowledged meanwhile; fed when the wait ends. Each sample counts once, "
            "when the cluster stores it: a round parked again after a failure adds nothing.",
            registry=reg)
        self.shard_of_disputed = Gauge(
            "shiftwatch_shard_of_disputed",
            "Shards only: 1 while the shard.of (and shard.hashed_levels) of this shard's "
            "configuration agrees with no other live shard of the set, so it is not taken up: "
            "after a start the shard takes no samples, after a reload it goes on with the count "
            "in force; the log and the status page name the counts. Else 0.", registry=reg)
        self.states_set_aside = Counter(
            "shiftwatch_stream_states_set_aside",
            "Saved stream states that could not be used at start (malformed or damaged); "
            "those streams warmed up again. With state in the cluster also each stream load "
            "that found a damaged part (of its snapshot entry, journal or parked samples; that "
            "part alone was set aside), each snapshot entry found damaged and written anew, "
            "and a mapping record found damaged and written anew at a shard's start or reload.",
            registry=reg)
        #: The operator's label of a stream (the daemon sets it; shown in
        #: ``shiftwatch_stream_display_info``).  Called from the render thread.
        self.label_for: Callable[[str], str | None] = lambda name: None
        for family in _FAMILIES:
            reg.register(_StreamCollector(self, family))
        reg.register(_StreamCollector(self, _display_info(lambda name: self.label_for(name))))

    def update_stream(self, stream: str, stats: StreamStats) -> None:
        """Replace the stream's snapshot with ``stats`` (safe to call from any thread)."""
        with self._lock:
            self._streams[stream] = stats

    def remove_stream(self, stream: str) -> None:
        """Stop exporting the stream; unknown names are ignored."""
        with self._lock:
            self._streams.pop(stream, None)
        if self._sparkplug is not None:
            self._sparkplug.set_stale(stream, None)

    def sparkplug(self) -> SparkplugMetrics:
        """The Sparkplug B metrics, registered on first use (only a daemon with a
        ``sparkplug_b`` stream entry exports them)."""
        if self._sparkplug is None:
            self._sparkplug = SparkplugMetrics(self.registry)
        return self._sparkplug

    def _snapshot(self) -> dict[str, StreamStats]:
        with self._lock:
            return dict(self._streams)

    def streams(self) -> dict[str, StreamStats]:
        """The latest snapshot of every stream (a copy; safe to call from any thread)."""
        return self._snapshot()

    def serve(self, listen: str = DEFAULT_LISTEN, *, certfile: str | None = None,
              keyfile: str | None = None, client_cafile: str | None = None,
              connection_timeout: float = CONNECTION_TIMEOUT,
              max_connections: int = MAX_CONNECTIONS,
              pages: PageSource | None = None) -> MetricsServer:
        """Serve the registry over HTTP (HTTPS when a certificate and key are given).

        One asyncio loop in one thread serves every connection, and one more thread
        renders the exposition (see :class:`_Endpoint` and :class:`_Renderer`);
        both start here and no other thread is ever started.  A connection has
        ``connection_timeout`` seconds in all, TLS handshake, request and response
        together; at most ``max_connections`` are open at once.  With a client CA,
        only scrapers presenting a certificate it signed are served.

        Parameters
        ----------
        listen : ``host:port``, see :func:`parse_listen`; loopback by default.
        certfile, keyfile : PEM certificate and private key; both or neither.
        client_cafile : PEM CA that signs the scrapers' client certificates (HTTPS only).
        connection_timeout : seconds a connection may last in all, from accept to the end of
            the response, however slowly it sends; then it is closed.
        max_connections : connections open at once, at most (see :class:`_Endpoint`).
        pages : the status board whose page and JSON are served under ``/status`` on the
            same address, with the same TLS, deadline and bound on connections; None serves
            the metrics only.

        Returns
        -------
        MetricsServer

        Raises
        ------
        ValueError
            If the address is malformed, only one of certfile and keyfile is given,
            or a client CA is given without them.
        OSError
            If the address cannot be bound or a certificate or key cannot be loaded.
        """
        if (certfile is None) != (keyfile is None):
            raise ValueError("certfile and keyfile must be given together")
        if client_cafile is not None and certfile is None:
            raise ValueError("client_cafile needs certfile and keyfile")
        host, port = parse_listen(listen)
        tls = None
        if certfile is not None and keyfile is not None:
            tls = _tls_context(certfile, keyfile, client_cafile)
        registry: Any = self.registry
        if self.const_labels:
            registry = WithLabels(self.registry, self.const_labels)
        return MetricsServer(_Endpoint(host, port, tls, connection_timeout, max_connections,
                                       registry, pages))


class FloorMetrics:
    """The metrics of the floor commands, on the daemon's registry."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.held = Counter(
            "shiftwatch_samples_held", "Samples kept from the engine because a hold was in force "
            "on their stream at their time stamp.", labelnames=["stream"], registry=registry)
        self.unacknowledged = Gauge(
            "shiftwatch_events_unacknowledged", "Open, unacknowledged events of the stream: "
            "confirmed (or returned) steps that nobody has marked as seen.", labelnames=["stream"],
            registry=registry)
        self.commands = Counter(
            "shiftwatch_commands", "Commands received on <prefix>/commands/<verb>, by command "
            "and outcome (accepted or refused).", labelnames=["command", "outcome"], registry=registry)
        self.refused = Counter(
            "shiftwatch_commands_refused", "Commands refused, by reason.", labelnames=["reason"],
            registry=registry)
        self.windows = Gauge(
            "shiftwatch_windows", "Planned windows (kind=plan) and holds (kind=hold) kept, whether "
            "begun or not.", labelnames=["kind"], registry=registry)
        self.save_failures = Counter(
            "shiftwatch_floor_save_failures", "Times the book of windows and acknowledgements could "
            "not be written to the state directory.", registry=registry)


class SparkplugMetrics:
    """What the daemon counts of Sparkplug B traffic (see :mod:`shiftwatch.sparkplug`).

    Attributes
    ----------
    messages : Sparkplug messages used, by message type (NBIRTH, NDATA, ...).
    metrics_skipped : metrics that are not numbers (booleans, strings, datasets, ...), by kind.
    seq_gaps : messages whose ``seq`` did not follow on from the edge node's last one.
    rebirth_requests : NCMD rebirth requests sent to edge nodes.
    """

    def __init__(self, registry: CollectorRegistry) -> None:
        self._lock = threading.Lock()
        self._stale: dict[str, bool] = {}
        self.messages = Counter(
            "shiftwatch_sparkplug_messages", "Sparkplug B messages used, by message type "
            "(births, data, deaths); those set aside count in shiftwatch_messages_dropped_total.",
            labelnames=["type"], registry=registry)
        self.metrics_skipped = Counter(
            "shiftwatch_sparkplug_metrics_skipped", "Sparkplug B metrics that are not numbers "
            "(booleans, strings, date-times, bytes, datasets, templates, arrays, nulls), by kind; "
            "skipped, not errors.", labelnames=["kind"], registry=registry)
        self.seq_gaps = Counter(
            "shiftwatch_sparkplug_seq_gaps", "Sparkplug B messages whose seq did not follow on "
            "from their edge node's previous message (messages lost or reordered on the way).",
            registry=registry)
        self.rebirth_requests = Counter(
            "shiftwatch_sparkplug_rebirth_requests", "Rebirth requests (NCMD Node Control/Rebirth) "
            "sent to edge nodes; only with rebirth_requests: true.", registry=registry)
        registry.register(_StaleCollector(self))

    def set_stale(self, stream: str, stale: bool | None) -> None:
        """Mark a Sparkplug stream stale (True), live (False), or forget it (None)."""
        with self._lock:
            if stale is None:
                self._stale.pop(stream, None)
            else:
                self._stale[stream] = stale

    def stale_snapshot(self) -> dict[str, bool]:
        with self._lock:
            return dict(self._stale)


class _StaleCollector(Collector):
    def __init__(self, sp: SparkplugMetrics) -> None:
        self._sp = sp

    def describe(self) -> list[Metric]:
        return [GaugeMetricFamily("shiftwatch_stream_stale", "", labels=["stream"])]

    def collect(self) -> Iterator[Metric]:
        f = GaugeMetricFamily(
            "shiftwatch_stream_stale", "1 while a Sparkplug B stream's edge node or device is "
            "dead (after its NDEATH or DDEATH, until its next birth), else 0.", labels=["stream"])
        for name, stale in sorted(self._sp.stale_snapshot().items()):
            f.add_metric([name], 1.0 if stale else 0.0)
        yield f
