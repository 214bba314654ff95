"""The MQTT link: the only module that touches paho.

paho's network loop runs in its own thread.  Its callbacks do the least they
can: an incoming message becomes a :class:`Message` on a bounded queue (a full
queue drops it, counted and logged); a publication acknowledged by the broker
is removed from the on-disk outbox.  Everything else happens in the daemon's
main thread.

Sessions are persistent so samples published while the daemon restarts are
delivered when it comes back: MQTT 5 with ``clean_start=False`` and a session
expiry, or MQTT 3.1.1 with ``clean_session=False``, always with a fixed client
id.  Incoming QoS 1 messages are acknowledged only after the engine has
processed them (paho's manual acks).

A connection that fails (refused, TLS verification, wrong password) is reported
once as an error line naming the broker URL and the reason; paho then retries
with a doubling delay, and each further attempt that fails the same way is one
information line.  The delay doubles from 1 s to 30 s while the broker refuses us for a
reason the operator must fix (TLS verification, a password), and only to
:data:`RECONNECT_MAX_DELAY` (4 s) while it is away or not ready yet (connection refused,
or closed with no reason given before the broker accepted it).
"""

from __future__ import annotations

import errno
import json
import logging
import math
import os
import re
import secrets
import ssl
import struct
import sys
import threading
import time
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any, NamedTuple

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode, MQTTProtocolVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.subscribeoptions import SubscribeOptions

from shiftwatch.config import BrokerConfig

#: A PUBACK packet as a big-endian 32-bit word: type 0x40, remaining length 2, then the packet id.
_PUBACK_HEAD = (paho.PUBACK << 24) | (2 << 16)


class _ReadBuffer:
    """A connected socket whose reads come from one large ``recv`` at a time.

    paho reads a packet in three or more ``recv`` calls (the command byte,
    each byte of the remaining length, then the rest), so a stream of small
    messages costs several system calls per message in paho's thread, which
    shares the interpreter lock with the engines.  Here one ``recv`` of up to
    :attr:`CHUNK` bytes fills a buffer that paho's small reads are then served
    from.  ``pending()`` counts the buffered bytes (plus those of a TLS
    socket's own buffer), which is how paho 2 knows to read again without
    waiting in ``select``; with data buffered, ``recv`` never touches the
    socket, and with none it raises what the socket raises (no data yet, a
    closed connection's empty read), so paho's handling stays its own.
    Everything else goes to the socket itself.
    """

    __slots__ = ("_buf", "_pos", "_room", "_sock")
    CHUNK = 65536
    #: Longest wait for room in a full inbox before paho's thread gets on with
    #: its other work (writing, keepalive) and comes back.
    PAUSE_S = 0.05

    def __init__(self, sock: Any, room: Callable[[float], bool] | None = None) -> None:
        self._sock = sock
        self._buf = b""
        self._pos = 0
        self._room = room

    def recv(self, n: int) -> bytes:
        if self._room is not None and not self._room(self.PAUSE_S):
            # The inbox is full: read nothing now ("no data yet" to paho, whose
            # packet parsing resumes where it stopped).
            raise BlockingIOError(errno.EAGAIN, "inbox full")
        buf: bytes
        buf, pos = self._buf, self._pos
        if pos >= len(buf):
            buf = self._sock.recv(self.CHUNK)
            if not buf:
                return buf
            self._buf, pos = buf, 0
        end = min(pos + n, len(buf))
        self._pos = end
        return buf[pos:end]

    def pending(self) -> int:
        # Truthful while the inbox is full too: paho then calls recv, which waits
        # for room up to PAUSE_S, instead of sleeping in select on data held here.
        inner = getattr(self._sock, "pending", None)
        return len(self._buf) - self._pos + (inner() if inner is not None else 0)

    def fileno(self) -> int:
        return int(self._sock.fileno())

    def __getattr__(self, name: str) -> Any:
        return getattr(self._sock, name)


class _Client(paho.Client):
    """paho's client, reading its socket through a :class:`_ReadBuffer`.

    ``_create_socket`` is paho 2's one place where a connection's socket is
    made (TCP, then TLS); a paho without it, or a websocket transport, reads
    as paho always does.
    """

    #: Called before each read with the longest wait: True when the reader may
    #: go on (see :meth:`Inbox.wait_for_room`).
    room: Callable[[float], bool] | None = None

    def _create_socket(self) -> Any:
        sock = super()._create_socket()
        if getattr(self, "_transport", "tcp") == "websockets":
            return sock
        return _ReadBuffer(sock, self.room)

    def _handle_publish(self) -> Any:
        """paho's handling of an incoming PUBLISH, without its per-message overheads
        where they change nothing: a QoS 0 or 1 message with no MQTT 5 properties (what
        brokers send unless the publisher set some), no per-filter callbacks, and paho's
        log silent below ERROR.  paho 2.1 parses the packet with three ``struct``
        unpacks that copy the payload each time, builds a ``Properties`` object, formats
        a debug line and searches its filter tree, per message: together about half of
        paho's thread under a load of batched payloads (py-spy, the daemon benchmark's
        arrays of 260).  Here the same ``MQTTMessage`` (the same fields; ``properties`` a
        shared empty ``Properties`` of a PUBLISH, which the daemon never reads) goes to
        ``on_message`` as paho's ``_handle_on_message`` hands it over, and the QoS 1
        PUBACK follows as paho's (only without ``manual_ack``).  Anything else, a malformed
        packet included, goes through paho's own code (tests/daemon/test_mqtt_publish_fast.py
        holds the two to the same messages)."""
        pkt = self._in_packet
        command: int = pkt["command"]
        packet: Any = pkt["packet"]
        qos = (command & 0x06) >> 1
        n = len(packet)
        v5 = self._protocol == MQTTProtocolVersion.MQTTv5
        if (qos > 1 or n < 2 or type(packet) not in (bytearray, bytes) or self.on_log is not None
                or (self._logger is not None and self._logger.isEnabledFor(logging.DEBUG))
                or not _matcher_empty(self._on_message_filtered)):
            return super()._handle_publish()
        pos = 2 + ((packet[0] << 8) | packet[1])
        # A short packet, an empty MQTT 3 topic, or MQTT 5 properties: paho's way (its
        # MalformedPacket, or its parsing of the properties).
        if pos + (2 if qos else 0) + (1 if v5 else 0) > n or (pos == 2 and not v5):
            return super()._handle_publish()
        mid = 0
        if qos:
            mid = (packet[pos] << 8) | packet[pos + 1]
        if v5 and packet[pos + (2 if qos else 0)] != 0:
            return super()._handle_publish()
        with memoryview(packet) as view:  # paho's packet is a bytearray: one copy of each part
            topic = bytes(view[2:pos])
            payload = bytes(view[pos + (2 if qos else 0) + (1 if v5 else 0):])
        message = paho.MQTTMessage(mid=mid, topic=topic)
        message.dup = (command & 0x08) != 0
        message.qos = qos
        message.retain = (command & 0x01) != 0
        message.properties = _NO_PROPERTIES if v5 else None
        message.payload = payload
        message.timestamp = paho.time_func()
        with self._callback_mutex:
            on_message = self.on_message
        if on_message:
            with self._in_callback_mutex:
                try:
                    on_message(self, self._userdata, message)
                except Exception as err:
                    self._easy_log(paho.MQTT_LOG_ERR, "Caught exception in on_message: %s", err)
                    if not self.suppress_exceptions:
                        raise
        if qos == 1 and not self._manual_ack:
            return self._send_puback(mid)
        return MQTTErrorCode.MQTT_ERR_SUCCESS


#: The ``properties`` of a PUBLISH that had none (see :meth:`_Client._handle_publish`).
_NO_PROPERTIES = Properties(PacketTypes.PUBLISH)  # type: ignore[no-untyped-call]


def _matcher_empty(matcher: Any) -> bool:
    """paho's filter tree of per-filter callbacks holds none (``message_callback_add``
    was never called); False when this paho's tree is not as expected."""
    root = getattr(matcher, "_root", None)
    return root is not None and getattr(root, "_content", 1) is None and getattr(root, "_children", 1) == {}


#: A connection lost with no reason within TAKEOVER_WINDOW seconds of coming up,
#: TAKEOVER_STREAK times in a row with every reconnect succeeding at once, is taken as
#: another client with our client id taking the session over.  (A broker restarted that
#: often looks the same: Mosquitto 2.0 closes the socket without a word either way.)
TAKEOVER_WINDOW = 10.0
TAKEOVER_STREAK = 3
#: Longest wait before reconnecting after such takeovers (it doubles with each).
TAKEOVER_MAX_DELAY = 120
#: Longest wait between two attempts to reach a broker that is away or not ready
#: (seconds; doubling from 1): connection refused, reset or timed out, or closed with no
#: reason given before the broker accepted it.  It was 30 s, as for every failure, until
#: 2026-12-05: a broker back after a long outage, or a NATS server whose MQTT side closed
#: a few connections while its JetStream caught up (each one doubles the wait), then
#: waited up to 30 s for the next attempt with every sample held (27 s measured after a
#: NATS server down for 34 s, tests/daemon/test_shard_server_outage.py).  Such an attempt
#: costs the broker next to nothing.
RECONNECT_MAX_DELAY = 4
#: Longest wait between attempts the broker refuses for a reason the operator must fix
#: (TLS verification, a client certificate, a password): one log line each, so fewer.
REFUSED_MAX_DELAY = 30
#: Longest wait before a refused subscription is tried again (seconds; doubling from 2).
SUBSCRIBE_RETRY_MAX = 30


class BrokerError(RuntimeError):
    """A broker problem the operator must fix (bad URL, unreadable password file)."""


class Message(NamedTuple):
    """An incoming message, as the daemon sees it."""

    topic: str
    payload: bytes | bytearray  # as paho hands it over (MQTTMessage.payload)
    arrived: float  # wall-clock seconds when paho handed it over
    mid: int
    qos: int


class Inbox:
    """The bounded hand-over from paho's thread to the main thread.

    A deque (its appends and pops are atomic) and an event that wakes the
    consumer: cheaper per message than ``queue.Queue``, whose locks paho's
    thread would otherwise take for every message.  paho's thread sets the
    event only when the consumer waits for it (``_want`` is then the queue
    length it waits for), so a busy consumer costs the producer one
    comparison per message.

    The bound is ``maxsize`` messages or ``max_bytes`` of payload, whichever
    comes first.  While the inbox is full, :class:`_ReadBuffer` stops reading
    the socket (see :meth:`wait_for_room`), so the broker keeps what follows
    queued on its side; paho's thread meanwhile goes on writing
    acknowledgements and publications.  Mosquitto 2.0 cannot be relied on to
    hold to the client's Receive Maximum once acknowledgements flow (it
    refills up to its ``max_queued_messages``), so the inbox, not the broker,
    bounds the daemon's memory.  :meth:`put` refuses a message only past
    twice the bound, which the read pause leaves no way to reach.
    """

    def __init__(self, maxsize: int, max_bytes: int = 1 << 62) -> None:
        self.maxsize = maxsize
        self.max_bytes = max_bytes
        self._q: deque[Message] = deque()
        self._ready = threading.Event()
        self._want = maxsize + 1  # queue length that wakes the consumer; above maxsize: nobody waits
        # Payload bytes put and taken: each written by one thread only, so no lock.
        self._bytes_in = 0
        self._bytes_out = 0
        self._space = threading.Event()
        self._blocked = False  # the reader waits for room
        self._paused = False  # the reader is paused until the inbox is down to half its bound
        self.closed = False

    def __len__(self) -> int:
        return len(self._q)

    @property
    def nbytes(self) -> int:
        """Payload bytes held."""
        return self._bytes_in - self._bytes_out

    def full(self) -> bool:
        """At or over the bound (messages or payload bytes)."""
        return len(self._q) >= self.maxsize or self._bytes_in - self._bytes_out >= self.max_bytes

    def put(self, m: Message) -> bool:
        """Add a message; False (nothing added) when the inbox is closed, or far over its bound."""
        q = self._q
        if self.closed or len(q) >= 2 * self.maxsize or self._bytes_in - self._bytes_out >= 2 * self.max_bytes:
            return False
        q.append(m)
        self._bytes_in += len(m.payload)
        if len(q) >= self._want:
            self._ready.set()
        return True

    def _low(self) -> bool:
        """At or under half the bound: a paused reader resumes."""
        return (2 * len(self._q) <= self.maxsize
                and 2 * (self._bytes_in - self._bytes_out) <= self.max_bytes)

    def wait_for_room(self, timeout: float) -> bool:
        """Wait up to ``timeout`` seconds (paho's thread) while the inbox is full;
        True when the reader may go on, or the inbox is closed.

        Once full, the reader stays paused until the inbox is down to half its
        bound, so it resumes for a burst rather than for every round the main
        thread takes.
        """
        if self.closed:
            return True
        if not self._paused:
            if not self.full():
                return True
            self._paused = True
        if self._low():
            self._paused = False
            return True
        if timeout <= 0:
            return False
        end = time.monotonic() + timeout
        try:
            while True:
                self._space.clear()
                self._blocked = True
                if self.closed or self._low():
                    self._paused = False
                    return True
                left = end - time.monotonic()
                if left <= 0:
                    return False
                self._space.wait(left)
        finally:
            self._blocked = False

    def close(self) -> None:
        """Refuse further messages (stopping), and release a reader waiting for room."""
        self.closed = True
        self._space.set()

    def _wait_for(self, n: int, timeout: float) -> None:
        """Wait up to ``timeout`` seconds until the queue holds ``n`` messages."""
        self._want = n
        self._ready.clear()
        if len(self._q) < n:
            self._ready.wait(timeout)
        self._want = self.maxsize + 1

    def take(self, max_items: int, max_bytes: int, timeout: float, *, gather: float = 0.0,
             slice_s: float = 0.002, min_rate: float = 1500.0) -> list[Message]:
        """Up to ``max_items`` messages (or about ``max_bytes`` of payload), waiting up to
        ``timeout`` seconds for the first.

        With ``gather`` > 0 the consumer, once a message is there, lets more
        collect for up to ``gather`` seconds: while the queue grows by at least
        ``min_rate`` messages a second (checked every ``slice_s`` seconds) and
        until it holds ``max_items`` (the broker's window of unacknowledged
        messages is then full).  The main thread then sleeps while paho's
        thread reads a burst, and works through it in one long round, instead
        of both threads taking the interpreter lock from each other for every
        message.  A slow flow stops the gathering after one slice.
        """
        q = self._q
        if not q and timeout > 0:
            self._wait_for(1, timeout)
        if gather > 0 and q:
            end = time.monotonic() + gather
            n = len(q)
            step = max(1, int(min_rate * slice_s))
            while n < max_items:
                left = end - time.monotonic()
                if left <= 0:
                    break
                self._wait_for(max_items, min(slice_s, left))
                grown = len(q) - n
                n += grown
                if grown < step:
                    break
        out: list[Message] = []
        size = 0
        while q and len(out) < max_items and size < max_bytes:
            m = q.popleft()
            out.append(m)
            size += len(m.payload)
        self._bytes_out += size
        if self._blocked and self._low():
            self._space.set()
        return out


def read_password(cfg: BrokerConfig, env: dict[str, str] | None = None) -> str | None:
    """The broker password from ``password_file`` (first line) or ``password_env``.

    Never logged.  Raises :class:`BrokerError` naming the file or variable,
    never the password.
    """
    env = dict(os.environ) if env is None else env
    if cfg.password_file:
        try:
            text = Path(cfg.password_file).read_text(encoding="utf-8")
        except OSError as exc:
            raise BrokerError(f"broker.password_file: cannot read {cfg.password_file}: "
                              f"{exc.strerror or exc}") from None
        lines = text.splitlines()
        return lines[0] if lines else ""
    if cfg.password_env:
        if cfg.password_env not in env:
            raise BrokerError(f"broker.password_env: environment variable {cfg.password_env} is not set")
        return env[cfg.password_env]
    return None


def describe_connect_error(exc: BaseException | None) -> str:
    """A short, operator-readable reason for a failed connection attempt.

    TLS verification failures keep OpenSSL's own words, for example
    ``certificate verify failed: certificate has expired``.

    Examples
    --------
    >>> describe_connect_error(ConnectionRefusedError(111, "Connection refused"))
    'connection refused (is the broker running, and is this its port?)'
    >>> describe_connect_error(None)
    'connection failed'
    """
    if isinstance(exc, ssl.SSLCertVerificationError):
        return f"TLS certificate verify failed: {exc.verify_message or exc.reason}"
    if isinstance(exc, ssl.SSLError):
        return f"TLS handshake failed: {exc.reason or exc}"
    if isinstance(exc, ConnectionRefusedError):
        return "connection refused (is the broker running, and is this its port?)"
    if isinstance(exc, OSError):
        return str(exc.strerror or exc or "connection failed")
    return "connection failed" if exc is None else str(exc)


def parse_url(url: str) -> tuple[str, int, bool]:
    """(host, port, tls) from mqtt://host:port or mqtts://host:port."""
    from shiftwatch.config import broker_address  # the one reading, as the configuration is checked

    try:
        return broker_address(url)
    except ValueError as exc:
        raise BrokerError(f"broker.url: {exc}") from None


def probe_broker(cfg: BrokerConfig, password: str | None, *, timeout: float = 5.0) -> str | None:
    """Connect once as ``shiftwatch check`` does; the reason it failed, or None.

    The connection uses the configured URL, TLS settings and login, under
    the client id ``<client_id>-check`` with a clean session that expires at
    once, and no will: the daemon's own persistent session is neither taken
    over nor changed, and nothing is published or subscribed.
    """
    host, port, tls = parse_url(cfg.url)
    v5 = cfg.mqtt_version == "5"
    client = paho.Client(callback_api_version=CallbackAPIVersion.VERSION2,
                         client_id=f"{cfg.client_id}-check",
                         protocol=MQTTProtocolVersion.MQTTv5 if v5 else MQTTProtocolVersion.MQTTv311,
                         clean_session=None if v5 else True)
    client.connect_timeout = timeout
    if cfg.username is not None:
        client.username_pw_set(cfg.username, password)
    outcome: list[str | None] = []
    done = threading.Event()

    def on_connect(c: paho.Client, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
        if reason.is_failure:
            hint = ""
            if "authori" in str(reason).lower() or "password" in str(reason).lower():
                who = f"user {cfg.username!r}" if cfg.username else "no user name"
                hint = f" ({who}; check broker.username and the password)"
            outcome.append(f"refused the connection: {reason}{hint}")
        else:
            outcome.append(None)
        done.set()

    def on_disconnect(c: paho.Client, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
        if not outcome:
            outcome.append(f"{_CLOSED_EARLY}{reason}")
        done.set()

    client.on_connect = on_connect
    client.on_disconnect = on_disconnect
    try:
        if tls:
            t = cfg.tls
            client.tls_set(ca_certs=t.ca_file if t else None, certfile=t.cert_file if t else None,
                           keyfile=t.key_file if t else None, cert_reqs=ssl.CERT_REQUIRED)
            client.tls_insecure_set(False)
        if v5:
            props = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]  # paho's Properties() is unannotated
            props.SessionExpiryInterval = 0
            client.connect(host, port, keepalive=max(5, int(timeout) + 1), clean_start=True,
                           properties=props)
        else:
            client.connect(host, port, keepalive=max(5, int(timeout) + 1))
    except (OSError, ValueError) as exc:
        return f"cannot connect: {describe_connect_error(exc)}"
    client.loop_start()
    try:
        if not done.wait(timeout):
            return f"no answer to the MQTT connection within {timeout:g} s"
        return outcome[0] if outcome else "connection failed"
    finally:
        client.disconnect()
        client.loop_stop()


_CLOSED_EARLY = "the connection was closed before the broker accepted it: "
#: Reasons of a connection closed with no word from the broker.
_UNEXPLAINED = ("EOF occurred in violation of protocol", "Connection reset by peer",
                "UNEXPECTED_EOF_WHILE_READING")


class _LastError(logging.Handler):
    """Keeps the text of the last error paho logged (for a connection closed before CONNACK)."""

    def __init__(self) -> None:
        super().__init__(logging.ERROR)
        self.text: str | None = None

    def emit(self, record: logging.LogRecord) -> None:
        self.text = record.getMessage()

    def take(self) -> str | None:
        text, self.text = self.text, None
        return text


class MqttLink:
    """A persistent-session MQTT connection for one daemon.

    Parameters
    ----------
    cfg : broker settings.
    subscriptions : topic filters to subscribe to (at ``cfg.qos``).
    status_topic : retained "online"/"offline" topic; "offline" is also the last will.
    inbox : bounded :class:`Inbox` that receives :class:`Message` objects.
    on_drop : called with a reason when an incoming message is dropped.
    on_published : called with the mid of each publication the broker acknowledged.
    on_connection : called with True/False when the connection comes up or goes down.
    """

    def __init__(
        self,
        cfg: BrokerConfig,
        *,
        subscriptions: list[str],
        status_topic: str,
        inbox: Inbox,
        on_drop: Callable[[str], None],
        on_published: Callable[[int], None],
        on_connection: Callable[[bool], None],
        logger: logging.Logger | None = None,
        password: str | None = None,
        on_takeover: Callable[[], None] | None = None,
        strip: str = "",
    ) -> None:
        self.cfg = cfg
        # A shard's partition prefix (``part/1/``): subscriptions carry it, and it is
        # taken off every incoming topic before the daemon sees it.
        self._strip = strip
        self._on_takeover = on_takeover
        self._connected_at = 0.0
        self._short_losses = 0  # connections in a row lost soon after they came up, no reason given
        self.takeovers = 0
        self.subscriptions = list(subscriptions)
        self.status_topic = status_topic
        self.log = logger or logging.getLogger(__name__)
        self._inbox = inbox
        self._on_drop = on_drop
        self._on_published = on_published
        self._on_connection = on_connection
        #: Whether the broker kept a session for the client id at the last connect (its
        #: CONNACK's session present flag): only then can it send messages again that an
        #: earlier connection left unacknowledged.
        self.session_resumed = False
        self._lock = threading.Lock()
        self._connected = False
        self._stopping = False
        self._own_mids: set[int] = set()  # ids of the status messages this link publishes itself
        # SUBSCRIBEs waiting for their SUBACK (mid -> filter), and filters the broker refused:
        # filter -> (when to try again, monotonic; attempts so far).  See retry_subscriptions.
        self._sub_mids: dict[int, str] = {}
        # SUBACKs handled before their SUBSCRIBE's mid was recorded (mid -> reasons): paho
        # sends the SUBSCRIBE from the calling thread, and its own thread can read and
        # hand over the SUBACK before subscribe() has returned the mid.
        self._early_subacks: dict[int, Any] = {}
        self._sub_refused: dict[str, tuple[float, int]] = {}
        # Filters a reload added: their SUBACK is logged, since only from then on do their
        # messages arrive (the reload's own log line comes before the broker has answered).
        self._sub_added: set[str] = set()
        self._last_error: str | None = None
        self._failed_attempts = 0
        # Packet ids of the QoS 1 messages handed to the inbox and not yet acknowledged
        # on this connection (added by paho's thread, removed by whichever thread
        # acknowledges, emptied at each connect).  A broker that sends such a message
        # again (DUP set, the same packet id) while this daemon still holds the first
        # copy gets the first copy's PUBACK; the second copy is skipped (see
        # _handle_message).
        self._unacked: set[int] = set()
        #: Copies skipped that way (a count for tests and benchmarks).
        self.redeliveries_skipped = 0
        self.host, self.port, tls = parse_url(cfg.url)
        # Rebuilt from its parts, so nothing else the URL held ever reaches a log line.
        shown_host = f"[{self.host}]" if ":" in self.host else self.host
        self.url = f"{'mqtts' if tls else 'mqtt'}://{shown_host}:{self.port}"
        v5 = cfg.mqtt_version == "5"
        self._v5 = v5
        self.client = _Client(
            callback_api_version=CallbackAPIVersion.VERSION2,
            client_id=cfg.client_id,
            clean_session=None if v5 else False,
            protocol=MQTTProtocolVersion.MQTTv5 if v5 else MQTTProtocolVersion.MQTTv311,
            manual_ack=True,
        )
        self.client.room = self._room
        # paho's own log stays silent; its error lines are only kept, so that a connection the
        # broker closes before accepting it (a TLS alert after the handshake, for example)
        # can be reported with the reason.  Below ERROR nothing is even formatted.
        plog = logging.getLogger(f"shiftwatch.paho.{cfg.client_id}")
        plog.setLevel(logging.ERROR)
        plog.propagate = False
        self._paho_error = _LastError()
        plog.handlers[:] = [self._paho_error]
        self.client.enable_logger(plog)
        self._refused = False
        self._max_delay = REFUSED_MAX_DELAY  # (until a failure says the broker is only away)
        self.client.reconnect_delay_set(min_delay=1, max_delay=self._max_delay)
        self.client.max_queued_messages_set(0)
        self.client.will_set(status_topic, b"offline", qos=1, retain=True)
        if cfg.username is not None:
            self.client.username_pw_set(cfg.username, password)
        if tls:
            tcfg = cfg.tls
            self.client.tls_set(
                ca_certs=tcfg.ca_file if tcfg else None,
                certfile=tcfg.cert_file if tcfg else None,
                keyfile=tcfg.key_file if tcfg else None,
                cert_reqs=ssl.CERT_REQUIRED,
            )
            self.client.tls_insecure_set(False)
        self.client.on_connect = self._handle_connect
        self.client.on_disconnect = self._handle_disconnect
        self.client.on_message = self._handle_message
        self.client.on_publish = self._handle_publish
        self.client.on_connect_fail = self._handle_connect_fail
        self.client.on_subscribe = self._handle_subscribe

    # ---------------------------------------------------------------- life
    def start(self) -> None:
        """Connect in the background; paho reconnects with backoff (1 s doubling to
        RECONNECT_MAX_DELAY or REFUSED_MAX_DELAY, see :meth:`_report_error`)."""
        props = None
        if self._v5:
            props = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]  # paho's Properties() is unannotated
            props.SessionExpiryInterval = int(self.cfg.session_expiry)
            # Mosquitto sends an MQTT 5 client as many unacknowledged messages as
            # it asks for here (else max_inflight_messages, 20 by default).
            # Messages are acknowledged only after processing, so this window
            # bounds how many the daemon can take in one round.
            props.ReceiveMaximum = self.cfg.receive_maximum
            self.client.connect_async(self.host, self.port, keepalive=self.cfg.keepalive,
                                      clean_start=False, properties=props)
        else:
            self.client.connect_async(self.host, self.port, keepalive=self.cfg.keepalive)
        self.client.loop_start()

    def stop(self, timeout: float = 5.0) -> None:
        """Publish the retained "offline" status ourselves (a clean exit fires no will), then disconnect."""
        self._stopping = True
        self._inbox.close()  # from now on paho's thread reads on and hands nothing over
        if self.connected:
            info = self.client.publish(self.status_topic, b"offline", qos=1, retain=True)
            self._own_mids.add(int(info.mid))
            deadline = time.monotonic() + timeout
            while not info.is_published() and time.monotonic() < deadline and self.connected:
                time.sleep(0.01)
        self.client.disconnect()
        self.client.loop_stop()

    @property
    def connected(self) -> bool:
        return self._connected

    # ------------------------------------------------------------- actions
    def publish(self, topic: str, payload: bytes, *, qos: int = 1, retain: bool = False) -> int:
        """Queue a publication; returns its mid (delivery is reported through ``on_published``).

        While disconnected paho keeps the message and sends it on reconnect.
        """
        info = self.client.publish(topic, payload, qos=qos, retain=retain)
        return int(info.mid)

    def set_subscriptions(self, filters: list[str], *, added: list[str], removed: list[str]) -> None:
        """Change the subscriptions (on reload); the new list is also used on every reconnect."""
        self.subscriptions = list(filters)
        if self.connected:
            for f in removed:
                self.client.unsubscribe(f)
            with self._lock:
                self._sub_added.difference_update(removed)
                self._sub_added.update(added)
            for f in added:
                self._subscribe(self.client, f)

    def _subscribe(self, client: paho.Client, topic_filter: str) -> None:
        """Subscribe at ``cfg.qos``; with MQTT 5 with No Local (MQTT 5 section 3.8.3.1), so the
        daemon is never sent what it publishes itself (a Sparkplug rebirth request under a
        ``spBv1.0/#`` filter, or its alerts under a filter that covers the prefix)."""
        if self.cfg.mqtt_version == "5":
            _rc, mid = client.subscribe(topic_filter, options=SubscribeOptions(qos=self.cfg.qos, noLocal=True))
        else:
            _rc, mid = client.subscribe(topic_filter, qos=self.cfg.qos)
        if mid is not None:
            with self._lock:
                reasons = self._early_subacks.pop(int(mid), None)
                if reasons is None:
                    self._sub_mids[int(mid)] = topic_filter
            if reasons is not None:  # the SUBACK came first: settled now
                self._settle_suback(topic_filter, reasons)

    #: SUBACKs kept for a SUBSCRIBE whose mid is not recorded yet; more only if mids never came.
    EARLY_SUBACKS = 1024

    def _handle_subscribe(self, client: paho.Client, userdata: Any, mid: int, reasons: Any,
                          properties: Any) -> None:
        """A SUBACK.  A refused filter (0x80 in MQTT 3.1.1; 0x80 and up in MQTT 5) brings no
        message until it is subscribed again: NATS's MQTT side refuses a SUBSCRIBE whose
        JetStream consumer it could not create in time, Mosquitto one its ACL denies.  It is
        logged and tried again later (retry_subscriptions), waiting twice as long each time."""
        with self._lock:
            f = self._sub_mids.pop(int(mid), None)
            if f is None:
                # Before subscribe() returned its mid to _subscribe, which settles it then.
                if len(self._early_subacks) < self.EARLY_SUBACKS:
                    self._early_subacks[int(mid)] = reasons
                return
        self._settle_suback(f, reasons)

    def _settle_suback(self, f: str, reasons: Any) -> None:
        """The broker's answer to the SUBSCRIBE of filter ``f``: taken, or refused (then tried
        again later)."""
        if not reasons:
            return
        code = reasons[0]
        if getattr(code, "is_failure", False) or getattr(code, "value", 0) >= 0x80:
            with self._lock:
                attempts = self._sub_refused.get(f, (0.0, 0))[1] + 1
                wait = float(min(2 ** attempts, SUBSCRIBE_RETRY_MAX))
                self._sub_refused[f] = (time.monotonic() + wait, attempts)
            self.log.error("broker %s refused the subscription to %s (%s); no message of it arrives "
                           "until it is taken: trying again in %.0f s", self.url, f, code, wait)
            return
        with self._lock:
            was = self._sub_refused.pop(f, None)
            new = f in self._sub_added
            self._sub_added.discard(f)
        if was is not None:
            self.log.info("broker %s took the subscription to %s (attempt %d)", self.url, f, was[1] + 1)
        elif new:
            self.log.info("broker %s took the subscription to %s: its messages arrive from now on",
                          self.url, f)

    def refused_subscriptions(self) -> list[str]:
        """The filters the broker refused and that are not taken yet."""
        with self._lock:
            return sorted(self._sub_refused)

    def retry_subscriptions(self) -> None:
        """Subscribe again to the refused filters whose wait is over (the daemon's main loop
        calls this about once a second)."""
        if not self._sub_refused or not self.connected:
            return
        now = time.monotonic()
        with self._lock:
            due = [f for f, (when, _n) in self._sub_refused.items() if when <= now]
            for f in due:  # no second SUBSCRIBE before this one's SUBACK
                self._sub_refused[f] = (math.inf, self._sub_refused[f][1])
        for f in due:
            if f in self.subscriptions:
                self._subscribe(self.client, f)
            else:
                with self._lock:
                    self._sub_refused.pop(f, None)  # removed by a reload meanwhile

    def ack(self, mid: int, qos: int) -> None:
        """Acknowledge a processed QoS 1 message to the broker."""
        if qos > 0:
            self._unacked.discard(mid)
            self.client.ack(mid, qos)

    def ack_all(self, msgs: list[Message]) -> None:
        """Acknowledge processed messages, the QoS 1 ones in one write.

        ``client.ack`` queues one 4-byte PUBACK per message and wakes paho's
        thread through a socket each time; a round of a thousand messages then
        costs a thousand system calls in each thread.  Here the PUBACKs
        (``0x40 0x02`` and the packet id, as paho builds them; MQTT 3.1.1
        section 3.4, MQTT 5 section 3.4.2.1 for the reason code left out on
        success) go on paho's outgoing queue as one packet, which paho's
        thread sends with one call.  Where this paho has no such queue, each
        message is acknowledged through ``client.ack``.
        """
        mids = [_PUBACK_HEAD | m.mid for m in msgs if m.qos == 1]
        queue = getattr(self.client, "_packet_queue", None)
        if queue is None or len(mids) < 2:
            for m in msgs:
                self.ack(m.mid, m.qos)
            return
        for m in msgs:
            if m.qos > 1:
                self.ack(m.mid, m.qos)
        queue(paho.PUBACK, struct.pack(f"!{len(mids)}I", *mids), 0, 1)
        self._unacked.difference_update([m.mid for m in msgs])

    # ----------------------------------------------------------- callbacks
    def _handle_connect(self, client: paho.Client, userdata: Any, flags: Any, reason: Any,
                        properties: Any) -> None:
        if reason.is_failure:
            self._short_losses = 0
            hint = ""
            if "authori" in str(reason).lower() or "password" in str(reason).lower():
                who = f"user {self.cfg.username!r}" if self.cfg.username else "no user name"
                hint = f" ({who}; check broker.username and the password)"
            self._refused = True
            # "Server unavailable" (MQTT 3.1.1 return code 3; MQTT 5 0x88, and 0x89 "Server
            # busy"): the broker is not ready yet, as when it refuses the TCP connection.
            away = getattr(reason, "value", None) in (3, 0x88, 0x89)
            self._report_error(f"refused the connection: {reason}{hint}", away=away)
            return
        self._connected = True
        self._connected_at = time.monotonic()
        self._last_error = None
        self._failed_attempts = 0
        session = getattr(flags, "session_present", False)
        self.session_resumed = bool(session)
        self.log.info("connected to broker %s (session %s)", self.url,
                      "resumed" if session else "new")
        with self._lock:
            self._sub_mids.clear()  # SUBACKs of an earlier connection never come
            self._early_subacks.clear()
            self._sub_added.clear()  # every filter is subscribed afresh: nothing to announce
        # A copy is skipped only within the connection that brought the first: a broker
        # that was restarted (a NATS server killed and started again) may number what it
        # sends again anew, and a packet id this daemon still holds from the connection
        # before could then stand for another message, which would never be processed.
        # Copies after a reconnect are processed (their samples set aside as duplicates).
        self._unacked.clear()
        for f in self.subscriptions:
            self._subscribe(client, f)
        info = client.publish(self.status_topic, b"online", qos=1, retain=True)
        self._own_mids.add(int(info.mid))
        self._on_connection(True)

    def _handle_connect_fail(self, client: paho.Client, userdata: Any) -> None:
        self._short_losses = 0  # the broker was away: an outage, not a takeover
        # paho calls this from inside its ``except OSError`` around the attempt, so the
        # exception being handled is the reason (it passes none itself).
        exc = sys.exc_info()[1]
        away = isinstance(exc, (ConnectionError, TimeoutError)) or (
            isinstance(exc, OSError) and not isinstance(exc, ssl.SSLError)
            and exc.errno in (errno.EHOSTUNREACH, errno.ENETUNREACH))
        self._report_error(f"cannot connect: {describe_connect_error(exc)}", away=away)

    def _handle_disconnect(self, client: paho.Client, userdata: Any, flags: Any, reason: Any,
                           properties: Any) -> None:
        was = self._connected
        self._connected = False
        refused, self._refused = self._refused, False
        if not was and not refused and not self._stopping:
            # Closed between the TCP/TLS handshake and the CONNACK.
            why = self._paho_error.take() or str(reason)
            why = re.sub(r" \(_ssl\.c:\d+\)$", "", why.removeprefix("failed to receive on socket: "))
            if any(a in why for a in ("certificate required", "alert unknown ca", "bad certificate")):
                why += (" (the broker wants a client certificate it trusts: "
                        "broker.tls.cert_file, key_file)")
            text = f"{_CLOSED_EARLY}{why}"
            if (any(u in why for u in _UNEXPLAINED) and self._last_error is not None
                    and self._last_error.startswith(_CLOSED_EARLY)):
                # The broker gave no reason this time (its alert was lost to the reset of
                # the connection, a race on a loaded machine): the same failure as the
                # last attempt, whose reason was shown.
                text = self._last_error
            # No TLS alert and no certificate named: the broker closed the connection
            # without a reason, as NATS's MQTT side does while its JetStream is not ready.
            away = not any(w in text.lower() for w in ("certificate", "alert", "ssl", "tls", "handshake"))
            self._report_error(text, away=away)
        if self._stopping:
            self.log.info("disconnected from broker %s", self.url)
        elif was:
            self.log.warning("disconnected from broker %s: %s; reconnecting with backoff",
                             self.url, reason)
            self._taken_over(flags, reason)  # says what it most likely means, when it can
        self._on_connection(False)

    def _taken_over(self, flags: Any, reason: Any) -> bool:
        """True (after saying so, counting it and backing off) when another client has
        most likely taken our session over by connecting with our client id.

        MQTT 5 has a reason for it (0x8E, session taken over), but Mosquitto 2.0
        sends no DISCONNECT at all: it closes the socket, which paho reports as
        "Unspecified error".  So a connection lost that way within
        TAKEOVER_WINDOW seconds of coming up, TAKEOVER_STREAK times in a row, is
        taken as one.
        Each such loss doubles the wait before the next attempt (up to
        TAKEOVER_MAX_DELAY), so two programs with one client id stop kicking
        each other off every second; a connection that lasts resets it.
        """
        lived = time.monotonic() - self._connected_at
        code = getattr(reason, "value", None)
        from_server = bool(getattr(flags, "is_disconnect_packet_from_server", False))
        if code == 0x8E:
            self._short_losses = max(self._short_losses, TAKEOVER_STREAK - 1) + 1
        elif not from_server and lived < TAKEOVER_WINDOW:
            self._short_losses += 1
        else:
            self._short_losses = 0
            if self.takeovers:
                self.takeovers = 0
                self.client.reconnect_delay_set(min_delay=1, max_delay=self._max_delay)
            return False
        if self._short_losses < TAKEOVER_STREAK:
            return False
        self.takeovers += 1
        delay = min(2 ** self.takeovers, TAKEOVER_MAX_DELAY)
        self.client.reconnect_delay_set(min_delay=delay, max_delay=max(30, delay))
        if self._on_takeover is not None:
            self._on_takeover()
        why = ("the broker says another client took the session over" if code == 0x8E else
               f"the broker closed the connection {lived:.1f} s after accepting it, with no reason "
               f"given, {self._short_losses} times in a row")
        self.log.warning("broker %s: %s: another client is most likely connecting with our client id "
                         "%r (a second shiftwatch with the same broker.client_id, or another program), "
                         "and the messages of our subscriptions then go to it, not to us (or the broker "
                         "restarted that often); next attempt in %d s", self.url, why,
                         self.cfg.client_id, delay)
        return True

    def _room(self, timeout: float) -> bool:
        # Reading never pauses before the CONNACK: a connection made while the
        # inbox is full (after paho's keepalive gave up on a long pause) must
        # still be able to come up.
        return not self._connected or self._inbox.wait_for_room(timeout)

    def _handle_message(self, client: paho.Client, userdata: Any, msg: paho.MQTTMessage) -> None:
        try:
            topic = msg.topic
            if self._strip and topic.startswith(self._strip):
                topic = topic[len(self._strip):]
            if msg.qos == 1:
                if msg.dup and msg.mid in self._unacked:
                    # A copy the broker sent again on this connection (NATS does after its
                    # ack_wait) of a message this daemon holds unacknowledged: the
                    # first copy's PUBACK acknowledges both.  Processing the copy too would
                    # cost a decode and an engine call for samples set aside as duplicates,
                    # and its PUBACK could come after the broker gave the id to another message.
                    self.redeliveries_skipped += 1
                    return
                self._unacked.add(msg.mid)
            if not self._inbox.put(Message(topic, msg.payload, time.time(), msg.mid, msg.qos)):
                if self._inbox.closed:
                    return  # stopping: not acknowledged, so the broker delivers it again
                # Far over the bound (reads are paused at the bound, so a defect).
                # Acknowledge it anyway: an unacknowledged message would hold one
                # of the broker's in-flight slots and stall the whole flow.
                self.ack(int(msg.mid), int(msg.qos))
                self._on_drop("queue_full")
        except Exception as exc:  # noqa: BLE001  a callback must never raise into paho's loop
            # Acknowledged too, or the message would hold an in-flight slot for good.
            # MQTT topics are UTF-8; paho hands over whatever the broker sent.
            bad_topic = isinstance(exc, UnicodeDecodeError)
            self._on_drop("topic_not_utf8" if bad_topic else "internal_error")
            try:
                self.ack(int(msg.mid), int(msg.qos))
            except Exception:  # noqa: BLE001, S110  the drop is counted above; paho's loop goes on
                pass

    def _handle_publish(self, client: paho.Client, userdata: Any, mid: int, reason: Any,
                        properties: Any) -> None:
        if int(mid) in self._own_mids:  # our status message, not the caller's
            self._own_mids.discard(int(mid))
            return
        try:
            self._on_published(int(mid))
        except Exception:
            self.log.exception("error while recording a delivered publication")

    def _report_error(self, text: str, *, away: bool) -> None:
        # One error line per distinct problem; a repeat is one information line per
        # attempt, and attempts are spaced by paho's doubling delay: up to
        # RECONNECT_MAX_DELAY while the broker is ``away`` (not there, or not ready), up to
        # REFUSED_MAX_DELAY while it refuses us for a reason the operator must fix.  (paho
        # starts again from 1 s when the bound changes; after takeovers, _taken_over's
        # delay stands.)
        self._failed_attempts += 1
        bound = RECONNECT_MAX_DELAY if away else REFUSED_MAX_DELAY
        if bound != self._max_delay:
            self._max_delay = bound
            if not self.takeovers:
                self.client.reconnect_delay_set(min_delay=1, max_delay=bound)
        if text != self._last_error:
            self.log.error("broker %s: %s; retrying with backoff", self.url, text)
            self._last_error = text
        else:
            self.log.info("broker %s: attempt %d failed the same way; retrying with backoff",
                          self.url, self._failed_attempts)


class PlainClient:
    """A small MQTT client for the demo's sensors and alert display, and for tests.

    Publishes at QoS 1 and, when ``on_message`` is given, subscribes to
    ``subscribe`` filters and calls ``on_message(topic, payload)`` from paho's
    thread.  ``username`` and ``password`` log in to a broker that wants them.

    With ``persistent=True`` it behaves as a QoS 1 client with a persistent
    session should: a fixed client id, MQTT 5 ``clean_start=False`` with a
    session expiry (3.1.1 ``clean_session=False``), reconnection after a
    broker restart within a second or two, and paho re-sending every publication the
    broker has not acknowledged.  ``on_acked(mid)`` is called from paho's
    thread for each publication the broker acknowledged, ``on_connection(up)``
    when the connection comes up or goes down.
    """

    def __init__(self, url: str, client_id: str, *, subscribe: list[str] | None = None,
                 on_message: Callable[[str, bytes], None] | None = None, mqtt_version: str = "5",
                 username: str | None = None, password: str | None = None,
                 persistent: bool = False, on_acked: Callable[[int], None] | None = None,
                 on_connection: Callable[[bool], None] | None = None) -> None:
        self.host, self.port, _tls = parse_url(url)
        v5 = mqtt_version == "5"
        self._v5 = v5
        self._persistent = persistent
        self.client = paho.Client(
            callback_api_version=CallbackAPIVersion.VERSION2, client_id=client_id,
            protocol=MQTTProtocolVersion.MQTTv5 if v5 else MQTTProtocolVersion.MQTTv311,
            clean_session=False if persistent and not v5 else None,
        )
        self.client.max_queued_messages_set(0)
        if username is not None:
            self.client.username_pw_set(username, password)
        if persistent:
            self.client.reconnect_delay_set(min_delay=1, max_delay=2)
        self._subscribe = list(subscribe or [])
        self._on_message = on_message
        self._up = threading.Event()

        def on_connect(client: paho.Client, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
            if not reason.is_failure:
                for f in self._subscribe:
                    client.subscribe(f, qos=1)
                self._up.set()
                if on_connection is not None:
                    on_connection(True)

        def on_disconnect(client: paho.Client, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
            if on_connection is not None:
                on_connection(False)

        def on_message_cb(client: paho.Client, userdata: Any, msg: paho.MQTTMessage) -> None:
            if self._on_message is not None:
                try:
                    self._on_message(msg.topic, bytes(msg.payload))
                except Exception:
                    logging.getLogger(__name__).exception("message handler failed")

        def on_publish_cb(client: paho.Client, userdata: Any, mid: int, reason: Any, props: Any) -> None:
            if on_acked is not None:
                on_acked(int(mid))

        self.client.on_connect = on_connect
        self.client.on_message = on_message_cb
        self.client.on_publish = on_publish_cb
        self.client.on_disconnect = on_disconnect

    def start(self, timeout: float = 10.0) -> PlainClient:
        if self._persistent and self._v5:
            props = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]  # paho's Properties() is unannotated
            props.SessionExpiryInterval = 3600
            self.client.connect(self.host, self.port, keepalive=30, clean_start=False, properties=props)
        else:
            self.client.connect(self.host, self.port, keepalive=30)
        self.client.loop_start()
        if not self._up.wait(timeout):
            raise BrokerError(f"no connection to {self.host}:{self.port} within {timeout:.0f} s")
        time.sleep(0.05)  # let the SUBACKs arrive before the caller publishes
        return self

    def publish(self, topic: str, payload: bytes | str, *, qos: int = 1, retain: bool = False) -> int:
        """Queue a publication (kept and re-sent by paho while disconnected); returns its mid."""
        return int(self.client.publish(topic, payload, qos=qos, retain=retain).mid)

    def publish_wait(self, topic: str, payload: bytes | str, *, qos: int = 1, timeout: float = 10.0) -> None:
        info = self.client.publish(topic, payload, qos=qos)
        info.wait_for_publish(timeout)

    def stop(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def send_command(cfg: BrokerConfig, prefix: str, verb: str, body: dict[str, Any], *,
                 username: str | None, password: str | None, timeout: float = 10.0) -> dict[str, Any] | None:
    """Publish one command on ``<prefix>/commands/<verb>`` and wait for its reply.

    Connects with the configured URL and TLS settings under a client id of its
    own (``<client_id>-cmd-<random>``, a clean session), subscribes to
    ``<prefix>/replies`` first, and returns the reply whose ``ref`` is this
    command's (None when none came within ``timeout``).  Raises
    :class:`BrokerError` when the broker cannot be reached or refuses the login.
    """
    ref = body.setdefault("ref", secrets.token_hex(6))
    host, port, tls = parse_url(cfg.url)
    v5 = cfg.mqtt_version == "5"
    client = paho.Client(callback_api_version=CallbackAPIVersion.VERSION2,
                         client_id=f"{cfg.client_id}-cmd-{secrets.token_hex(3)}",
                         protocol=MQTTProtocolVersion.MQTTv5 if v5 else MQTTProtocolVersion.MQTTv311,
                         clean_session=None if v5 else True)
    if username is not None:
        client.username_pw_set(username, password)
    if tls:
        t = cfg.tls
        client.tls_set(ca_certs=t.ca_file if t else None, certfile=t.cert_file if t else None,
                       keyfile=t.key_file if t else None, cert_reqs=ssl.CERT_REQUIRED)
        client.tls_insecure_set(False)
    connected = threading.Event()
    subscribed = threading.Event()
    got = threading.Event()
    failure: list[str] = []
    reply: list[dict[str, Any]] = []

    def on_connect(c: paho.Client, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
        if reason.is_failure:
            failure.append(f"refused the connection: {reason}")
        else:
            c.subscribe(f"{prefix}/replies", qos=1)
        connected.set()

    def on_subscribe(c: paho.Client, userdata: Any, mid: int, reasons: Any, props: Any) -> None:
        subscribed.set()

    def on_message(c: paho.Client, userdata: Any, msg: paho.MQTTMessage) -> None:
        try:
            d = json.loads(msg.payload)
        except ValueError:
            return
        if isinstance(d, dict) and d.get("ref") == ref:
            reply.append(d)
            got.set()

    client.on_connect = on_connect
    client.on_subscribe = on_subscribe
    client.on_message = on_message
    try:
        client.connect(host, port, keepalive=30)
    except (OSError, ValueError) as exc:
        raise BrokerError(f"broker {cfg.url}: cannot connect: {exc}") from None
    client.loop_start()
    try:
        if not connected.wait(timeout) or failure:
            raise BrokerError(f"broker {cfg.url}: {failure[0] if failure else 'no answer to the connection'}")
        if not subscribed.wait(timeout):
            raise BrokerError(f"broker {cfg.url}: the subscription to {prefix}/replies was not confirmed")
        info = client.publish(f"{prefix}/commands/{verb}", json.dumps(body), qos=1)
        info.wait_for_publish(timeout)
        got.wait(timeout)
        return reply[0] if reply else None
    finally:
        client.disconnect()
        client.loop_stop()
