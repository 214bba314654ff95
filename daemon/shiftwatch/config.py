"""The configuration file: loaded with ``yaml.safe_load`` semantics and validated in one place.

Every error names the YAML key path and the line, for example::

    config.yaml:14: streams[1].detection.min_shift_sigma: must be a positive number, got -1

Unknown keys are errors with a "did you mean" hint.  The same definitions
produce the JSON Schema shipped in ``config/`` (:func:`json_schema`).
"""

from __future__ import annotations

import difflib
import math
import re
from collections.abc import Callable
from dataclasses import MISSING, dataclass, field, fields
from pathlib import Path
from typing import TYPE_CHECKING, Any

from shiftwatch.core.plans import filter_matches
from shiftwatch.core.settings import (
    MIN_SIGMA_HIGHEST,
    MIN_SIGMA_LOWEST,
    NUMBER_RANGES,
    TEST_NAMES,
    WHOLE_RANGES,
    DetectionSettings,
)
from shiftwatch.core.timefmt import parse_duration
from shiftwatch.decode import MAX_PREFIX_LEVELS, stream_name

if TYPE_CHECKING:
    import yaml


class ConfigError(ValueError):
    """A configuration problem: carries the file, line and key path."""

    def __init__(self, path: str, message: str, *, file: str | None = None, line: int | None = None):
        self.key_path = path
        self.message = message
        self.file = file
        self.line = line
        where = file or "config"
        if line is not None:
            where += f":{line}"
        shown = _counted_path(path)
        super().__init__(f"{where}: {shown}: {message}" if path else f"{where}: {message}")


def _ordinal(n: int) -> str:
    """1st, 2nd, 3rd, 4th, ..., 11th, 12th, 13th, 21st.

    Examples
    --------
    >>> [_ordinal(n) for n in (1, 2, 3, 4, 11, 12, 13, 21, 22, 101, 111)]
    ['1st', '2nd', '3rd', '4th', '11th', '12th', '13th', '21st', '22nd', '101st', '111th']
    """
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def _counted_path(path: str) -> str:
    """A key path as an engineer counts: ``streams[2].unit`` reads "the 3rd stream (streams[2]): unit".

    Examples
    --------
    >>> _counted_path("streams[2].detection.min_shift_sigma")
    'the 3rd stream (streams[2]): detection.min_shift_sigma'
    >>> _counted_path("streams[0]"), _counted_path("broker.url")
    ('the 1st stream (streams[0])', 'broker.url')
    """
    m = re.match(r"streams\[(\d+)\]\.?", path)
    if m is None:
        return path
    rest = path[m.end():]
    head = f"the {_ordinal(int(m.group(1)) + 1)} stream (streams[{m.group(1)}])"
    return f"{head}: {rest}" if rest else head


# --------------------------------------------------------------------- schema
@dataclass(frozen=True)
class Key:
    """One key of a section: its type checker, default and description."""

    check: Callable[[Any], Any]
    default: Any = MISSING
    help: str = ""
    schema: dict[str, Any] = field(default_factory=dict)


def _num(positive: bool = True, integer: bool = False, minimum: float | None = None) -> Callable[[Any], Any]:
    def check(v: Any) -> Any:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise ValueError(f"must be a {'whole ' if integer else ''}number, got {v!r}")
        if integer and not float(v).is_integer():
            raise ValueError(f"must be a whole number, got {v!r}")
        if positive and v <= 0:
            raise ValueError(f"must be positive, got {v!r}")
        if minimum is not None and v < minimum:
            raise ValueError(f"must be at least {minimum}, got {v!r}")
        return int(v) if integer else float(v)

    check.numeric = True  # type: ignore[attr-defined]  # see _Loader.section: 1e-12 is a number
    return check


def _str(choices: tuple[str, ...] | None = None, nonempty: bool = True,
         form: str | None = None) -> Callable[[Any], Any]:
    """Text, one of ``choices`` when given; ``form`` describes it in the error (e.g. HOST:PORT)."""

    def check(v: Any) -> Any:
        if not isinstance(v, str):
            what = f"text in the form {form}" if form else "text"
            if choices is not None and str(v) in choices:
                # YAML reads 5 as a number: the value is right, it only needs quotes.
                raise ValueError(f"must be text, got the number {v!r}; write it in quotes: \"{v}\"")
            if choices is not None:
                raise ValueError(f"must be text, one of {', '.join(repr(c) for c in choices)}, got {v!r}")
            raise ValueError(f"must be {what}, got {v!r}")  # noqa: TRY004  the loader reports ValueError as a config error
        if nonempty and not v.strip():
            raise ValueError("must not be empty")
        if choices is not None and v not in choices:
            raise ValueError(f"{v!r} is not one of {', '.join(choices)}")
        return v

    return check


def _duration(v: Any) -> float:
    return parse_duration(v)


def _duration_or_zero(v: Any) -> float:
    """A duration, or 0 (``0``, ``0s``) for none."""
    if isinstance(v, (int, float)) and not isinstance(v, bool) and v == 0:
        return 0.0
    if isinstance(v, str) and v.strip() in ("0", "0s", "0ms"):
        return 0.0
    return parse_duration(v)


#: JSON Schema of a duration: text, a number with a unit (see parse_duration).
DURATION_SCHEMA: dict[str, Any] = {"type": "string",
                                   "pattern": r"^\s*\d+(\.\d+)?\s*(ms|s|m|min|h|d|w)\s*$"}


def _time_zone(v: Any) -> str:
    """An IANA time zone name (``Europe/Berlin``, ``UTC``), checked against the system's tz database."""
    import zoneinfo

    if not isinstance(v, str) or not v.strip():
        raise ValueError(f"must be an IANA time zone name such as 'Europe/Berlin' or 'UTC', got {v!r}")
    try:
        zoneinfo.ZoneInfo(v)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        hint = difflib.get_close_matches(v, sorted(zoneinfo.available_timezones()), n=1)
        more = f"; did you mean '{hint[0]}'?" if hint else " (IANA names such as 'Europe/Berlin' or 'UTC')"
        raise ValueError(f"unknown time zone {v!r}{more}") from None
    return v


def _bool(v: Any) -> bool:
    if not isinstance(v, bool):
        raise ValueError(f"must be true or false, got {v!r}")  # noqa: TRY004  as above
    return v


def _levels(v: Any) -> tuple[int, ...]:
    """A non-empty list of topic level numbers, counted from 1 (shard.hashed_levels)."""
    if not isinstance(v, list) or not v or not all(
            isinstance(i, int) and not isinstance(i, bool) and i >= 1 for i in v):
        raise ValueError(f"must be a list of topic level numbers counted from 1, e.g. [2, 3, 4], got {v!r}")
    if len(set(v)) != len(v):
        raise ValueError(f"names a level twice: {v!r}")
    return tuple(v)


def _optional(check: Callable[[Any], Any]) -> Callable[[Any], Any]:
    def inner(v: Any) -> Any:
        return None if v is None else check(v)

    inner.numeric = getattr(check, "numeric", False)  # type: ignore[attr-defined]
    return inner


#: A decimal float as YAML 1.2's core schema reads it (YAML 1.2.2, section 10.3.2).  PyYAML
#: follows YAML 1.1, whose floats need a dot and a signed exponent: ``1e-12`` is text to it.
_YAML12_FLOAT = re.compile(r"[-+]?(\.[0-9]+|[0-9]+(\.[0-9]*)?)([eE][-+]?[0-9]+)?")


def _number_text(value: Any, node: Any) -> Any:
    """A plain (unquoted) scalar that YAML 1.1 left as text but that spells a decimal float,
    as that float; anything else as it is (quoted text stays text on purpose)."""
    if isinstance(value, str) and getattr(node, "style", "'") is None and _YAML12_FLOAT.fullmatch(value):
        return float(value)
    return value


_DETECTION_HELP = {
    "min_shift_sigma": "smallest step worth an alert, in sigmas of the noise",
    "false_alarm_every": "mean time between false alarms on a stream that has not changed (e.g. 7d)",
    "test": "sequential test: multi_cusum, glr, cusum, page_hinkley or adwin",
    "warmup_samples": "samples used to learn a new stream's baseline (the stream can alert during them)",
    "window_samples": "samples kept per stream, and looked back over by the step fit",
    "clip_sigma": "residuals are clipped to this many sigmas before they reach the test",
    "spike_sigma": "a lone sample further than this many sigmas from the level is discarded",
    "interval_level": "confidence level of the shift-time interval",
    "confirm_precision": "no longer used (events are decided by a sequential test); accepted so older files load",
    "confirm_min_samples": "samples after the detection before an event can be decided, at least",
    "confirm_max_samples": "samples after the detection after which an open event ends undecided",
    "confirm_p_value": "error rate of the event decision: an unchanged level confirmed, or a step of "
                       "min_shift_sigma dismissed, each at most this often",
    "min_sigma": "floor for sigma in reading units (null: from the reading resolution, else 1e-6 of the level "
                 "and at least 1e-9: set it for readings whose noise is smaller)",
    "glr_window": "longest segment, in samples, the GLR test considers",
    "baseline_memory": "weight, in samples, at which the baseline's memory is capped",
    "baseline_guard": "the newest samples kept out of baseline refinements",
    "max_time_ahead": "samples stamped further than this ahead of their arrival are rejected "
                      "(time_ahead); null: no limit",
    "max_time_behind": "samples stamped further than this before their arrival are rejected "
                       "(time_behind); null: no limit",
}


def _detection_keys() -> dict[str, Key]:
    keys: dict[str, Key] = {}
    defaults = DetectionSettings()
    for f in fields(DetectionSettings):
        default = getattr(defaults, f.name)
        if f.name == "false_alarm_every":
            keys[f.name] = Key(_duration, "7d", _DETECTION_HELP[f.name], dict(DURATION_SCHEMA))
        elif f.name == "min_shift_sigma":
            keys[f.name] = Key(_num(), default, _DETECTION_HELP[f.name],
                               {"type": "number", "exclusiveMinimum": 0, "maximum": 4})
        elif f.name == "test":
            keys[f.name] = Key(_str(TEST_NAMES), default, _DETECTION_HELP[f.name], {"enum": list(TEST_NAMES)})
        elif f.name in ("max_time_ahead", "max_time_behind"):
            keys[f.name] = Key(_optional(_duration), None if default is None else f"{default:g}s",
                               _DETECTION_HELP[f.name],
                               {"anyOf": [dict(DURATION_SCHEMA), {"type": "null"}]})
        elif f.name == "min_sigma":
            keys[f.name] = Key(_optional(_num()), None, _DETECTION_HELP[f.name],
                               {"type": ["number", "null"], "minimum": MIN_SIGMA_LOWEST,
                                "maximum": MIN_SIGMA_HIGHEST})
        elif isinstance(default, int):
            lo, hi, _why = WHOLE_RANGES[f.name]  # the ranges DetectionSettings enforces
            keys[f.name] = Key(_num(integer=True), default, _DETECTION_HELP[f.name],
                               {"type": "integer", "minimum": lo, **({} if hi is None else {"maximum": hi})})
        else:
            schema: dict[str, Any] = {"type": "number"}
            if f.name in NUMBER_RANGES:
                low, _open, high = NUMBER_RANGES[f.name]
                schema["exclusiveMinimum"] = low
                if high is not None:
                    schema["maximum"] = high
            keys[f.name] = Key(_num(), default, _DETECTION_HELP[f.name], schema)
    return keys


DETECTION_KEYS = _detection_keys()

TLS_KEYS = {
    "ca_file": Key(_optional(_str()), None, "CA certificate bundle (PEM) that signs the broker's certificate"),
    "cert_file": Key(_optional(_str()), None, "client certificate (PEM), for brokers that want one"),
    "key_file": Key(_optional(_str()), None, "client private key (PEM)"),
}

BROKER_KEYS = {
    "url": Key(_str(), "mqtt://127.0.0.1:1883", "mqtt://host:port, or mqtts://host:port for TLS"),
    "client_id": Key(_str(), "shiftwatch", "fixed MQTT client id (keeps the persistent session across restarts)"),
    "username": Key(_optional(_str()), None, "user name for the broker"),
    "password_file": Key(_optional(_str()), None, "file holding the password (first line)"),
    "password_env": Key(_optional(_str()), None, "environment variable holding the password"),
    "tls": Key(lambda v: v, None, "TLS settings: ca_file, cert_file, key_file"),
    "keepalive": Key(_num(integer=True), 30, "MQTT keepalive in seconds"),
    "mqtt_version": Key(_str(("5", "3.1.1")), "5", "MQTT protocol version: \"5\" or \"3.1.1\" (in quotes)"),
    "session_expiry": Key(_duration, "1d", "how long the broker keeps our session and queued samples "
                          "while we are away", dict(DURATION_SCHEMA)),
    "qos": Key(_num(integer=True, positive=False), 1, "subscription QoS (0, 1)"),
    "max_payload_bytes": Key(_num(integer=True), 65536, "messages larger than this are rejected before parsing"),
    "receive_maximum": Key(_num(integer=True), 1000, "MQTT 5: most unacknowledged QoS 1 messages the broker may "
                           "send us at once (1-65535)", {"type": "integer", "minimum": 1, "maximum": 65535}),
}

#: Payload formats of a stream entry.
FORMATS = ("number", "json", "senml", "sparkplug_b")

STREAM_KEYS = {
    "topic": Key(_str(), MISSING, "MQTT topic filter; every topic it matches is one stream"),
    "format": Key(_str(FORMATS), "json", "payload format: number, json, senml or sparkplug_b"),
    "value": Key(_str(), "value", "key or dot path of the value in a JSON payload"),
    "time": Key(_optional(_str()), None, "key or dot path of the time stamp in a JSON payload (absent: arrival time)"),
    "unit": Key(_optional(_str()), None, "unit of the readings, shown in alerts"),
    "label": Key(_optional(_str()), None, "what operators call the stream, used in alert summaries; "
                 "{1}, {2}, ... stand for the topic levels matched by each +, {#} for those matched "
                 "by #, {name} for the SenML name; for sparkplug_b {group}, {node} and {name} "
                 "(the device and metric name)"),
    "rebirth_requests": Key(_bool, False, "sparkplug_b only: ask an edge node for its births again "
                            "(an NCMD with Node Control/Rebirth) when its data comes before its "
                            "birth or with a gap in seq; off by default, since it writes to the "
                            "edge node"),
    "detection": Key(lambda v: v, None, "per-stream overrides of the detection settings"),
}

ALERTS_KEYS = {
    "topic_prefix": Key(_str(), "shiftwatch", "alerts go to <prefix>/alerts/<stream>, levels to <prefix>/levels/<stream>"),
    "qos": Key(_num(integer=True, positive=False), 1, "QoS of alert records"),
    "outbox_max": Key(_num(integer=True), 10000, "alert records kept for delivery while the broker is unreachable"),
}

METRICS_KEYS = {
    "listen": Key(_str(form='HOST:PORT, e.g. "127.0.0.1:9650"'), "127.0.0.1:9650",
                  "HOST:PORT of the Prometheus endpoint"),
    "max_streams": Key(_num(integer=True), 10000, "most streams tracked (and labelled in metrics)"),
    "tls": Key(lambda v: v, None,
               "serve the metrics over HTTPS: cert_file, key_file, client_ca_file"),
}

METRICS_TLS_KEYS = {
    "cert_file": Key(_str(), MISSING,
                     "server certificate (PEM, leaf first) of the metrics endpoint",
                     {"type": "string"}),
    "key_file": Key(_str(), MISSING, "private key (PEM) of that certificate", {"type": "string"}),
    "client_ca_file": Key(_optional(_str()), None,
                          "CA (PEM) that signs scrapers' client certificates; "
                          "when set, scrapers must present one",
                          {"type": ["string", "null"]}),
}

STATE_KEYS = {
    "dir": Key(_str(), "/var/lib/shiftwatch", "directory for snapshots and the alert outbox"),
    "snapshot_every": Key(_duration, "60s", "how often stream state is snapshotted", dict(DURATION_SCHEMA)),
    "journal": Key(_bool, True, "journal the samples processed since the last snapshot, so a "
                   "killed daemon restarts where it stopped"),
    "keep": Key(_str(("local", "cluster")), "local", "where stream state lives: local (state.dir) or "
                "cluster (the NATS cluster of the cluster section, so a shard can restart on another box)"),
}

SHARD_KEYS = {
    "number": Key(_num(integer=True, positive=False), MISSING,
                  "this daemon's partition, 0 to of - 1 (the cluster's partition numbers)",
                  {"type": "integer", "minimum": 0}),
    "of": Key(_num(integer=True), MISSING, "how many partitions the cluster's mapping makes",
              {"type": "integer", "minimum": 1}),
    "topic_prefix": Key(_str(), "part/{number}", "topic levels the cluster's mapping puts in front of "
                        "each topic of this partition ({number} stands for shard.number); the daemon "
                        "subscribes below them and strips them, so stream names never hold them"),
    "metrics_port": Key(_str(("offset", "same")), "offset", "offset: the metrics port is metrics.listen's "
                        "plus shard.number (several shards on one box); same: as configured"),
    "hashed_levels": Key(_optional(_levels), None, "the topic levels (counted from 1, below topic_prefix) "
                         "whose wildcards the cluster's partition() mapping hashes, in its order; with "
                         "it a shard feeds its engines only the streams the mapping for shard.of "
                         "partitions gives it (absent: every stream that reaches it)",
                         {"type": ["array", "null"], "items": {"type": "integer", "minimum": 1},
                          "minItems": 1}),
}

CLUSTER_KEYS = {
    "servers": Key(lambda v: v, MISSING, "nats://host:port URLs of the NATS cluster's servers",
                   {"type": "array", "items": {"type": "string"}}),
    "name": Key(_str(), "shiftwatch", "prefix of the JetStream stream and key-value buckets the "
                "daemons share (letters, digits, - and _)"),
    "replicas": Key(_num(integer=True), 3, "replicas of the journal stream and the buckets (1 to 5)",
                    {"type": "integer", "minimum": 1, "maximum": 5}),
    "lease": Key(_duration, "15s", "how long a shard's claim lasts without renewal (see the README, "
                 "Running shards)", dict(DURATION_SCHEMA)),
    "timeout": Key(_duration, "5s", "deadline of each request to the cluster", dict(DURATION_SCHEMA)),
    "redelivery_wait": Key(_duration_or_zero, "30s", "with state.keep: cluster, after each connection that resumes the session "
                           "wait this long before processing, so messages a lost connection left "
                           "unacknowledged come first; set it above the NATS server's mqtt ack_wait "
                           "(0: do not wait)", dict(DURATION_SCHEMA)),
    "handover_wait": Key(_duration_or_zero, "60s", "with shard.hashed_levels and state.keep: cluster, "
                         "the longest a shard holds a stream that moved to it while the shard that "
                         "wrote it last is asked to pass on what it still holds of it (0: do not ask; "
                         "hold it for redelivery_wait instead)", dict(DURATION_SCHEMA)),
    "username": Key(_optional(_str()), None, "user name for the NATS cluster"),
    "password_file": Key(_optional(_str()), None, "file holding the NATS password (first line)"),
}

#: Keys that are refused on purpose, with the reason given instead of "unknown key".
REFUSED_KEYS = {
    "broker.password": "a password is not accepted in the configuration file; put it in a "
                       "file named by broker.password_file (chmod 600) or in the variable "
                       "named by broker.password_env",
}

DISPLAY_KEYS = {
    "time_zone": Key(_time_zone, "UTC", "IANA time zone in which alert summaries, logs, the demo and "
                     "the replay report show times (records stay UTC), e.g. Europe/Berlin"),
}

TOP_KEYS = {
    "broker": Key(lambda v: v, None, "MQTT broker connection"),
    "streams": Key(lambda v: v, None, "which topics to watch and how to read them"),
    "detection": Key(lambda v: v, None, "default detection settings for every stream"),
    "alerts": Key(lambda v: v, None, "where alert records go"),
    "metrics": Key(lambda v: v, None, "Prometheus endpoint"),
    "state": Key(lambda v: v, None, "where state survives restarts"),
    "display": Key(lambda v: v, None, "how times are shown to people"),
    "shard": Key(lambda v: v, None, "this daemon's partition of the topics (absent: all of them)"),
    "cluster": Key(lambda v: v, None, "the NATS cluster holding shared state and shard ownership"),
}


# --------------------------------------------------------------- the result
@dataclass(frozen=True)
class TlsConfig:
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None


@dataclass(frozen=True)
class BrokerConfig:
    url: str = "mqtt://127.0.0.1:1883"
    client_id: str = "shiftwatch"
    username: str | None = None
    password_file: str | None = None
    password_env: str | None = None
    tls: TlsConfig | None = None
    keepalive: int = 30
    mqtt_version: str = "5"
    session_expiry: float = 86400.0
    qos: int = 1
    max_payload_bytes: int = 65536
    receive_maximum: int = 1000


@dataclass(frozen=True)
class StreamConfig:
    topic: str
    format: str = "json"
    value: str = "value"
    time: str | None = None
    unit: str | None = None
    label: str | None = None
    detection: DetectionSettings = field(default_factory=DetectionSettings)
    rebirth_requests: bool = False


@dataclass(frozen=True)
class AlertsConfig:
    topic_prefix: str = "shiftwatch"
    qos: int = 1
    outbox_max: int = 10000


@dataclass(frozen=True)
class MetricsTlsConfig:
    cert_file: str
    key_file: str
    client_ca_file: str | None = None


@dataclass(frozen=True)
class MetricsConfig:
    listen: str = "127.0.0.1:9650"
    max_streams: int = 10000
    tls: MetricsTlsConfig | None = None


@dataclass(frozen=True)
class StateConfig:
    dir: str = "/var/lib/shiftwatch"
    snapshot_every: float = 60.0
    journal: bool = True
    keep: str = "local"


@dataclass(frozen=True)
class ShardConfig:
    number: int
    of: int
    topic_prefix: str = "part/{number}"
    metrics_port: str = "offset"
    hashed_levels: tuple[int, ...] | None = None

    @property
    def prefix(self) -> str:
        """The topic levels in front of this partition's topics, with their trailing /."""
        return self.topic_prefix.replace("{number}", str(self.number)).rstrip("/") + "/"


@dataclass(frozen=True)
class ClusterConfig:
    servers: tuple[str, ...]
    name: str = "shiftwatch"
    replicas: int = 3
    lease: float = 15.0
    timeout: float = 5.0
    redelivery_wait: float = 30.0
    handover_wait: float = 60.0
    username: str | None = None
    password_file: str | None = None


@dataclass(frozen=True)
class DisplayConfig:
    time_zone: str = "UTC"


@dataclass(frozen=True)
class Config:
    broker: BrokerConfig = field(default_factory=BrokerConfig)
    streams: tuple[StreamConfig, ...] = ()
    detection: DetectionSettings = field(default_factory=DetectionSettings)
    alerts: AlertsConfig = field(default_factory=AlertsConfig)
    metrics: MetricsConfig = field(default_factory=MetricsConfig)
    state: StateConfig = field(default_factory=StateConfig)
    display: DisplayConfig = field(default_factory=DisplayConfig)
    source: str | None = None
    shard: ShardConfig | None = None
    cluster: ClusterConfig | None = None

    def settings_for(self, stream: str) -> DetectionSettings:
        """Detection settings for a stream name: the first stream entry whose filter matches, else the defaults."""
        sc = self.stream_for(stream)
        return self.detection if sc is None else sc.detection

    def stream_for(self, stream: str, topic_filter: str | None = None) -> StreamConfig | None:
        """The stream entry whose filter matches the stream's topic.

        A SenML stream is named ``topic/name``: when the name alone matches no
        filter, shorter prefixes are tried (a SenML name may hold '/' too).
        ``topic_filter`` is the ``topic`` of the entry the stream was made for,
        when known: the entry with that filter is the answer if there is one.
        It matters for a name that :func:`~shiftwatch.decode.stream_name` had
        to change (a topic of more than 256 characters ends in ``~`` and a
        hash, its last levels cut), which a filter like ``plant/+/fill`` no
        longer matches.
        """
        m = self._match(stream, topic_filter)
        return None if m is None else m[0]

    def label_for(self, stream: str, topic_filter: str | None = None) -> str | None:
        """The operator's name of a stream: its entry's ``label`` with the placeholders filled.

        ``topic_filter`` is as in :meth:`stream_for`.

        Examples
        --------
        >>> cfg = Config(streams=(StreamConfig("plant/line2/+/fill", label="fill weight, filler {1}"),
        ...                       StreamConfig("plant/oven", format="senml", label="oven {name}")))
        >>> cfg.label_for("plant/line2/head7/fill"), cfg.label_for("plant/oven/zone3")
        ('fill weight, filler head7', 'oven zone3')
        >>> cfg.label_for("plant/line9/head1/fill") is None
        True
        """
        m = self._match(stream, topic_filter)
        if m is None:
            return None
        sc, topic, name = m
        if sc.label is None:
            return None
        plus, rest = _captures(sc.topic, topic)
        if sc.format == "sparkplug_b":
            group, node, name = (stream.split("/", 2) + ["", ""])[:3]
            parts = {"group": group, "node": node, "name": name}
            return _PLACEHOLDER.sub(lambda mo: parts.get(mo.group(1), mo.group(0)), sc.label)

        def fill(mo: re.Match[str]) -> str:
            key = mo.group(1)
            if key == "name":
                return name
            if key == "#":
                return rest
            i = int(key) - 1
            return plus[i] if 0 <= i < len(plus) else mo.group(0)

        return _PLACEHOLDER.sub(fill, sc.label)

    def _match(self, stream: str, topic_filter: str | None = None
               ) -> tuple[StreamConfig, str, str] | None:
        """(entry, topic, SenML name or "") for a stream name."""
        levels = stream.split("/")
        sc = next((s for s in self.streams if s.topic == topic_filter), None)
        if sc is not None:
            p = sc.topic.split("/")
            cut = len(levels) if p[-1] == "#" or sc.format != "senml" else min(len(p), len(levels))
            return sc, "/".join(levels[:cut]), "/".join(levels[cut:])
        for cut in range(len(levels), 0, -1):
            topic = "/".join(levels[:cut])
            for sc in self.streams:
                if (cut == len(levels) or sc.format == "senml") and topic_matches(sc.topic, topic):
                    return sc, topic, "/".join(levels[cut:])
        for sc in self.streams:
            if sc.format == "sparkplug_b" and _sparkplug_matches(sc.topic, levels):
                return sc, stream, "/".join(levels[2:])
        return None


#: Placeholders of a stream ``label``.
_PLACEHOLDER = re.compile(r"\{(\d+|#|name|group|node)\}")


def _captures(pattern: str, topic: str) -> tuple[list[str], str]:
    """The topic levels matched by each ``+`` of a filter, and those matched by ``#``."""
    p = pattern.split("/")
    t = topic.split("/")
    plus = [t[i] for i, part in enumerate(p) if part == "+" and i < len(t)]
    rest = "/".join(t[len(p) - 1:]) if p and p[-1] == "#" else ""
    return plus, rest


def _sparkplug_matches(pattern: str, levels: list[str]) -> bool:
    """Whether a Sparkplug stream (``group/node/[device/]metric``) can come from a filter:
    its node's NDATA topic, or its device's DDATA topic, matches it."""
    if len(levels) < 3:
        return False
    group, node = levels[0], levels[1]
    return (topic_matches(pattern, f"spBv1.0/{group}/NDATA/{node}")
            or topic_matches(pattern, f"spBv1.0/{group}/DDATA/{node}/{levels[2]}"))


def topic_matches(pattern: str, topic: str) -> bool:
    """MQTT topic-filter matching (``+`` one level, ``#`` the rest), per the MQTT
    specification (the one implementation is :func:`shiftwatch.core.plans.filter_matches`).

    Examples
    --------
    >>> topic_matches("plant/+/weight", "plant/f1/weight")
    True
    >>> topic_matches("plant/#", "plant/f1/weight")
    True
    >>> topic_matches("plant/+", "plant/f1/weight")
    False
    """
    return filter_matches(pattern, topic)


def filter_covers(first: str, second: str) -> bool:
    """Whether every topic the filter ``second`` matches, ``first`` matches too (MQTT 3.1.1
    and 5.0, section 4.7: ``+`` is one level, ``#`` the parent and every level below it, and
    a wildcard at the first level matches no topic that starts with ``$``).

    Examples
    --------
    >>> filter_covers("plant/#", "plant/+/fill"), filter_covers("plant/+/fill", "plant/#")
    (True, False)
    """
    a, b = first.split("/"), second.split("/")
    for i, part in enumerate(a):
        if part in ("#", "+") and i == 0 and b[0].startswith("$"):
            return False
        if part == "#":
            return True
        if i >= len(b) or b[i] == "#":
            return False
        if part != "+" and part != b[i]:
            return False
    return len(a) == len(b)


def shadowed_entries(cfg: Config) -> list[tuple[int, int]]:
    """(entry, earlier entry) for every stream entry that can never apply: the daemon gives a
    message to the first entry whose filter matches its topic, and an earlier filter matches
    every topic this one does."""
    out = []
    for j, later in enumerate(cfg.streams):
        i = next((i for i, earlier in enumerate(cfg.streams[:j])
                  if filter_covers(earlier.topic, later.topic)), None)
        if i is not None:
            out.append((j, i))
    return out


# --------------------------------------------------------------- validation
class _Loader:
    """Walks the YAML node tree so every value keeps its line number."""

    def __init__(self, file: str | None):
        import yaml  # imported here: replay without a configuration never pays for it

        self.file = file
        self.y = yaml

    def error(self, path: str, message: str, node: yaml.Node | None) -> ConfigError:
        line = node.start_mark.line + 1 if node is not None else None
        return ConfigError(path, message, file=self.file, line=line)

    def plain(self, node: yaml.Node) -> Any:
        # safe_load semantics for a sub-tree, constructed from the node itself (serializing it
        # and reading it back failed on an empty value such as "streams:" with a YAML error).
        loader = self.y.SafeLoader("")
        try:
            return loader.construct_document(node)
        finally:
            loader.dispose()

    def section(self, node: yaml.Node | None, keys: dict[str, Key], path: str) -> tuple[dict[str, Any], dict[str, yaml.Node]]:
        out: dict[str, Any] = {}
        nodes: dict[str, yaml.Node] = {}
        empty = node is None or (isinstance(node, self.y.ScalarNode) and node.tag.endswith(":null"))
        if not empty and not isinstance(node, self.y.MappingNode):
            raise self.error(path, "must be a mapping of keys to values", node)
        for knode, vnode in (node.value if isinstance(node, self.y.MappingNode) else []):
            key = self.plain(knode)
            kpath = f"{path}.{key}" if path else str(key)
            if kpath in REFUSED_KEYS:
                raise self.error(kpath, REFUSED_KEYS[kpath], knode)
            if not isinstance(key, str) or key not in keys:
                hint = difflib.get_close_matches(str(key), list(keys), n=1)
                msg = "unknown key"
                msg += f"; did you mean '{hint[0]}'?" if hint else f" (known: {', '.join(keys)})"
                raise self.error(kpath, msg, knode)
            if key in out:
                raise self.error(kpath, "key appears twice", knode)
            nodes[key] = vnode
            try:
                value = self.plain(vnode)
                if getattr(keys[key].check, "numeric", False):
                    value = _number_text(value, vnode)
                out[key] = keys[key].check(value)
            except ValueError as exc:
                raise self.error(kpath, str(exc), vnode) from None
        for key, spec in keys.items():
            if key not in out:
                if spec.default is MISSING:
                    raise self.error(f"{path}.{key}" if path else key, "is required", node)
                default = spec.default
                out[key] = spec.check(default) if default is not None else None
        return out, nodes

    def detection(self, node: yaml.Node | None, path: str, base: DetectionSettings) -> DetectionSettings:
        if node is None:
            return base
        given, nodes = self.section(node, DETECTION_KEYS, path)
        explicit = {k: v for k, v in given.items() if k in nodes}
        merged = {f.name: getattr(base, f.name) for f in fields(DetectionSettings)}
        merged.update(explicit)
        try:
            return DetectionSettings(**merged)
        except ValueError as exc:
            key, _, msg = str(exc).partition(": ")
            raise self.error(f"{path}.{key}", msg, nodes.get(key, node)) from None


def load_config(path: str | Path) -> Config:
    """Read and validate a configuration file.  Raises :class:`ConfigError`."""
    p = Path(path)
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise ConfigError("", f"cannot read the file: {exc.strerror or exc}", file=str(p)) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        # Named by line and column, as a YAML error is: the file must be UTF-8 (YAML 1.1
        # allows UTF-16 too, but nobody writes a configuration in it).
        line = data.count(b"\n", 0, exc.start) + 1
        column = exc.start - (data.rfind(b"\n", 0, exc.start) + 1) + 1
        raise ConfigError("", f"not UTF-8 (byte 0x{data[exc.start]:02x} at column {column}); "
                          "save the file as UTF-8", file=str(p), line=line) from None
    return parse_config(text, file=str(p))


def parse_config(text: str, *, file: str | None = None) -> Config:
    """Validate configuration text (see :func:`load_config`)."""
    ld = _Loader(file)
    yaml = ld.y
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        line = mark.line + 1 if mark is not None else None
        problem = getattr(exc, "problem", None) or str(exc)
        context = getattr(exc, "context", None)
        if context and problem.startswith("but "):  # "but found another document" says what only with its context
            problem = f"{context}, {problem}"
        raise ConfigError("", f"not valid YAML: {problem}", file=file, line=line) from None
    _top, nodes = ld.section(root, TOP_KEYS, "")
    b, bnodes = ld.section(nodes.get("broker"), BROKER_KEYS, "broker")
    tls = None
    if "tls" in bnodes:
        t, _ = ld.section(bnodes["tls"], TLS_KEYS, "broker.tls")
        tls = TlsConfig(**t)
    try:
        broker_address(b["url"])
    except ValueError as exc:
        raise ld.error("broker.url", str(exc), bnodes.get("url")) from None
    if b["qos"] not in (0, 1):
        raise ld.error("broker.qos", f"must be 0 or 1, got {b['qos']}", bnodes.get("qos"))
    if not 1 <= b["receive_maximum"] <= 65535:
        raise ld.error("broker.receive_maximum", f"must be 1 to 65535, got {b['receive_maximum']}",
                       bnodes.get("receive_maximum"))
    b["tls"] = tls
    broker = BrokerConfig(**b)
    detection = ld.detection(nodes.get("detection"), "detection", DetectionSettings())
    streams: list[StreamConfig] = []
    snode = nodes.get("streams")
    if snode is not None and not (isinstance(snode, yaml.ScalarNode) and snode.tag.endswith(":null")):
        if not isinstance(snode, yaml.SequenceNode):
            raise ld.error("streams", "must be a list of stream entries", snode)
        for i, item in enumerate(snode.value):
            spath = f"streams[{i}]"
            s, snodes = ld.section(item, STREAM_KEYS, spath)
            _check_filter(ld, s["topic"], f"{spath}.topic", snodes.get("topic"))
            _check_sparkplug(ld, s, spath, snodes)
            if s["label"] is not None:
                _check_label(ld, s["label"], s["topic"], s["format"], f"{spath}.label", snodes.get("label"))
            s["detection"] = ld.detection(snodes.get("detection"), f"{spath}.detection", detection)
            streams.append(StreamConfig(**s))
    alerts, anodes = ld.section(nodes.get("alerts"), ALERTS_KEYS, "alerts")
    prefix = alerts["topic_prefix"]
    if (stream_name(prefix, None) != prefix or prefix.endswith("/")
            or prefix.count("/") >= MAX_PREFIX_LEVELS):
        raise ld.error("alerts.topic_prefix", "must be a plain topic of at most "
                       f"{MAX_PREFIX_LEVELS} levels and 256 characters, without + or #, control "
                       "characters or a trailing /", anodes.get("topic_prefix"))
    if alerts["qos"] not in (0, 1, 2):
        raise ld.error("alerts.qos", f"must be 0, 1 or 2, got {alerts['qos']}", anodes.get("qos"))
    metrics, mnodes = ld.section(nodes.get("metrics"), METRICS_KEYS, "metrics")
    try:
        listen_address(metrics["listen"])
    except ValueError as exc:
        raise ld.error("metrics.listen", str(exc), mnodes.get("listen")) from None
    metrics["tls"] = None
    if "tls" in mnodes:
        mt, _ = ld.section(mnodes["tls"], METRICS_TLS_KEYS, "metrics.tls")
        metrics["tls"] = MetricsTlsConfig(**mt)
    state, stnodes = ld.section(nodes.get("state"), STATE_KEYS, "state")
    display, _ = ld.section(nodes.get("display"), DISPLAY_KEYS, "display")
    shard, cluster = _shard_and_cluster(ld, nodes)
    if state["keep"] == "cluster" and cluster is None:
        raise ld.error("state.keep", "cluster needs a cluster section (cluster.servers: the NATS "
                       "servers that hold the state)", stnodes.get("keep"))
    return Config(
        broker=broker,
        streams=tuple(streams),
        detection=detection,
        alerts=AlertsConfig(**alerts),
        metrics=MetricsConfig(**metrics),
        state=StateConfig(**state),
        display=DisplayConfig(**display),
        source=file,
        shard=shard,
        cluster=cluster,
    )


#: What ``check``, ``run`` and a reload (SIGHUP) say of a file without stream entries, after
#: its name: a daemon started with it would watch nothing, and a reload to it would drop every
#: stream and its state at once (much more likely a file caught half-written than a wish).
NO_STREAMS = ("has no stream entries: list the topics to watch under streams: "
              "(to stop watching every stream, stop the daemon)")


def listen_address(listen: str) -> tuple[str, int]:
    """(host, port) of ``metrics.listen`` (and ``demo --metrics-listen``): ``HOST:PORT``, an
    IPv6 address in brackets (``[::1]:9650``), a port of 0 (any free one) to 65535; the host
    as written, brackets and all, "" for none (loopback).  ``ValueError`` says what is wrong.

    Examples
    --------
    >>> listen_address("127.0.0.1:9650"), listen_address("[::1]:0")
    (('127.0.0.1', 9650), ('[::1]', 0))
    >>> listen_address("foo")
    Traceback (most recent call last):
    ...
    ValueError: must be HOST:PORT (e.g. "127.0.0.1:9650", a port of 0 to 65535), got 'foo'
    """
    import ipaddress

    host, sep, port = listen.rpartition(":")
    ok = bool(sep) and port.isascii() and port.isdigit() and 0 <= int(port) <= 65535
    if ok and host.startswith("["):
        try:
            ok = host.endswith("]") and bool(ipaddress.IPv6Address(host[1:-1]))
        except ValueError:
            ok = False
    elif ok:
        ok = host == "" or bool(_HOST_NAME.fullmatch(host))
    if not ok:
        raise ValueError(f"must be HOST:PORT (e.g. \"127.0.0.1:9650\", a port of 0 to 65535), got {listen!r}")
    return host, int(port)


#: A host name: letters, digits, '-', '.' and '_' (RFC 1123 names, with the '_' some sites use).
_HOST_NAME = re.compile(r"[A-Za-z0-9_]([A-Za-z0-9_.-]*[A-Za-z0-9_])?")


def broker_address(url: str) -> tuple[str, int, bool]:
    """(host, port, tls) of a broker URL, ``mqtt://host[:port]`` or ``mqtts://host[:port]``.

    The one reading of ``broker.url``: the configuration is refused with its ``ValueError``
    and the MQTT client connects where it says.  The authority is ``host[:port]`` (RFC 3986,
    section 3.2; an IPv6 address in brackets); the port is 1 to 65535 (1883 for mqtt://,
    8883 for mqtts://, the ports IANA assigns to MQTT); a connection has no path, query or
    fragment, and the user name and password have keys of their own.

    Examples
    --------
    >>> broker_address("mqtt://127.0.0.1:1883"), broker_address("mqtts://[::1]")
    (('127.0.0.1', 1883, False), ('::1', 8883, True))
    >>> broker_address("mqtt://h:0")
    Traceback (most recent call last):
    ...
    ValueError: port 0 is outside 1 to 65535 (mqtt://host:port), in 'mqtt://h:0'
    """
    import ipaddress

    form = "(mqtt://host:port)"
    scheme, sep, rest = url.partition("://")
    if not sep or scheme not in ("mqtt", "mqtts"):
        raise ValueError(f"must start with mqtt:// or mqtts://, got {url!r}")
    m = re.search(r"[/?#]", rest)
    authority, after = (rest[:m.start()], rest[m.start():]) if m else (rest, "")
    if "@" in authority:
        # Not echoed: what stands before the @ may be a password.
        raise ValueError("must not hold a user name or password; use broker.username "
                         "and broker.password_file or broker.password_env")
    for mark, what in (("#", "fragment"), ("?", "query")):
        if mark in after:
            raise ValueError(f"must not have a {what} ({mark}...): an MQTT connection has only a host "
                             f"and a port {form}, in {url!r}")
    if after not in ("", "/"):
        raise ValueError(f"must not have a path ({after!r}): an MQTT connection has only a host and a "
                         f"port {form}, in {url!r}")
    if authority.startswith("["):
        host, close, port_part = authority[1:].partition("]")
        try:
            ipaddress.IPv6Address(host)
        except ValueError:
            raise ValueError(f"'[{host}]' is not an IPv6 address {form}, in {url!r}") from None
        if not close or (port_part and not port_part.startswith(":")):
            raise ValueError(f"an IPv6 address must be in brackets, then :port {form}, in {url!r}")
        port_text = port_part[1:] if port_part else None
    else:
        host, colon, port_text_or = authority.partition(":")
        port_text = port_text_or if colon else None
        if not host:
            raise ValueError(f"has no host {form}, in {url!r}")
        if not _HOST_NAME.fullmatch(host):
            raise ValueError(f"{host!r} is not a host name or address {form}, in {url!r}")
    tls = scheme == "mqtts"
    if port_text is None:
        return host, 8883 if tls else 1883, tls
    if not port_text.isascii() or not port_text.isdigit():
        raise ValueError(f"port {port_text!r} is not a number {form}, in {url!r}")
    port = int(port_text)
    if not 1 <= port <= 65535:
        raise ValueError(f"port {port} is outside 1 to 65535 {form}, in {url!r}")
    return host, port, tls


def for_shard(cfg: Config, number: int | None = None) -> Config:
    """The configuration one shard runs with: ``number`` (``run --shard``) in place of
    shard.number; its own state directory (``<state.dir>/shard-<number>``), MQTT client
    id (``<client_id>-shard-<number>``) and, with ``metrics_port: offset``, metrics port
    (metrics.listen's plus the number), so several shards can share one file and one box.
    A configuration without a shard section is returned as it is (``--shard`` then
    raises ConfigError)."""
    import dataclasses

    sh = cfg.shard
    if sh is None:
        if number is not None:
            raise ConfigError("shard", "--shard needs a shard section in the configuration "
                              "(shard.of: the number of partitions)", file=cfg.source)
        return cfg
    if number is not None:
        if not 0 <= number < sh.of:
            raise ConfigError("shard.number", f"--shard must be 0 to {sh.of - 1} (shard.of is "
                              f"{sh.of}), got {number}", file=cfg.source)
        sh = dataclasses.replace(sh, number=number)
    n = sh.number
    metrics = cfg.metrics
    if sh.metrics_port == "offset":
        host, _, port = metrics.listen.rpartition(":")
        if int(port) != 0:
            if int(port) + n > 65535:
                raise ConfigError("metrics.listen", f"port {port} plus shard {n} is past 65535",
                                  file=cfg.source)
            metrics = dataclasses.replace(metrics, listen=f"{host}:{int(port) + n}")
    return dataclasses.replace(
        cfg, shard=sh, metrics=metrics,
        state=dataclasses.replace(cfg.state, dir=str(Path(cfg.state.dir) / f"shard-{n}")),
        broker=dataclasses.replace(cfg.broker, client_id=f"{cfg.broker.client_id}-shard-{n}"))


def _shard_and_cluster(ld: _Loader, nodes: dict[str, yaml.Node]) -> tuple[ShardConfig | None, ClusterConfig | None]:
    shard = cluster = None
    if nodes.get("shard") is not None:
        sh, shnodes = ld.section(nodes["shard"], SHARD_KEYS, "shard")
        if not 0 <= sh["number"] < sh["of"]:
            raise ld.error("shard.number", f"must be 0 to shard.of - 1 ({sh['of'] - 1}), got "
                           f"{sh['number']}", shnodes.get("number"))
        prefix = sh["topic_prefix"]
        if any(c in prefix for c in "+#") or prefix.startswith("/") or not prefix.strip("/"):
            raise ld.error("shard.topic_prefix", f"must be plain topic levels without + or #, got "
                           f"{prefix!r}", shnodes.get("topic_prefix"))
        shard = ShardConfig(**sh)
    if nodes.get("cluster") is not None:
        cl, clnodes = ld.section(nodes["cluster"], CLUSTER_KEYS, "cluster")
        servers = cl["servers"]
        if isinstance(servers, str):
            servers = [servers]
        if not isinstance(servers, list) or not servers or not all(
                isinstance(u, str) and u.startswith(("nats://", "tls://")) for u in servers):
            raise ld.error("cluster.servers", "must be a list of nats://host:port (or tls://) URLs",
                           clnodes.get("servers"))
        if not re.fullmatch(r"[A-Za-z0-9_-]{1,64}", cl["name"]):
            raise ld.error("cluster.name", f"must be 1 to 64 letters, digits, - or _, got {cl['name']!r}",
                           clnodes.get("name"))
        if not 1 <= cl["replicas"] <= 5:
            raise ld.error("cluster.replicas", f"must be 1 to 5, got {cl['replicas']}",
                           clnodes.get("replicas"))
        if cl["lease"] < 3:
            raise ld.error("cluster.lease", "must be at least 3s (it is renewed every third)",
                           clnodes.get("lease"))
        cl["servers"] = tuple(servers)
        cluster = ClusterConfig(**cl)
    return shard, cluster


def _check_filter(ld: _Loader, topic: str, path: str, node: yaml.Node | None) -> None:
    parts = topic.split("/")
    for i, part in enumerate(parts):
        if "#" in part and (part != "#" or i != len(parts) - 1):
            raise ld.error(path, f"'#' must be a whole last level of the filter: {topic!r}", node)
        if "+" in part and part != "+":
            raise ld.error(path, f"'+' must be a whole level of the filter: {topic!r}", node)


def _check_sparkplug(ld: _Loader, s: dict[str, Any], spath: str, snodes: dict[str, yaml.Node]) -> None:
    """A sparkplug_b entry subscribes inside the Sparkplug namespace, and protobuf is there;
    rebirth_requests belongs to sparkplug_b entries only."""
    if s["format"] != "sparkplug_b":
        if s["rebirth_requests"]:
            raise ld.error(f"{spath}.rebirth_requests", "only a stream entry with format: sparkplug_b "
                           "can ask for rebirths", snodes.get("rebirth_requests"))
        return
    first = s["topic"].split("/")[0]
    if first != "spBv1.0":
        raise ld.error(f"{spath}.topic", "a sparkplug_b entry's topic must be a filter in the "
                       f"Sparkplug B namespace, such as 'spBv1.0/<group>/#', got {s['topic']!r}",
                       snodes.get("topic"))
    for key in ("value", "time"):
        if key in snodes:
            raise ld.error(f"{spath}.{key}", "not used with format: sparkplug_b (each metric has "
                           "its name and its own time stamp)", snodes[key])
    try:
        from shiftwatch.sparkplug import payload_class

        payload_class()
    except ImportError:
        raise ld.error(f"{spath}.format", "sparkplug_b needs the protobuf package, which is not "
                       "installed: pip install 'shiftwatch[sparkplug]'", snodes.get("format")) from None


def _check_label(ld: _Loader, label: str, topic: str, fmt: str, path: str, node: yaml.Node | None) -> None:
    parts = topic.split("/")
    n_plus = parts.count("+")
    for mo in re.finditer(r"\{([^{}]*)\}", label):
        key = mo.group(1)
        if fmt == "sparkplug_b":
            if key in ("group", "node", "name"):
                continue
            raise ld.error(path, f"placeholder {mo.group(0)} cannot be filled: a sparkplug_b "
                           "stream's label can use {group}, {node} and {name}", node)
        if key.isdigit() and 1 <= int(key) <= n_plus:
            continue
        if key == "#" and parts[-1] == "#":
            continue
        if key == "name" and fmt == "senml":
            continue
        if key.isdigit():
            why = f"the topic filter {topic!r} has {n_plus} '+' level{'' if n_plus == 1 else 's'}"
        elif key == "#":
            why = f"the topic filter {topic!r} does not end in '#'"
        elif key == "name":
            why = "only SenML streams have a name (format: senml)"
        else:
            why = "use {1}, {2}, ... for the levels matched by +, {#} for those matched by #, {name} for the SenML name"
        raise ld.error(path, f"placeholder {mo.group(0)} cannot be filled: {why}", node)
    if re.sub(r"\{[^{}]*\}", "", label).count("{") or re.sub(r"\{[^{}]*\}", "", label).count("}"):
        raise ld.error(path, f"unbalanced brace in {label!r}", node)


# ------------------------------------------------------------------ schema
def json_schema() -> dict[str, Any]:
    """A JSON Schema (draft 2020-12) for editors, made from the same key definitions."""

    def obj(keys: dict[str, Key], extra: dict[str, Any] | None = None, required: tuple[str, ...] = ()) -> dict[str, Any]:
        props: dict[str, Any] = {}
        for name, spec in keys.items():
            entry: dict[str, Any] = {"description": spec.help}
            entry.update(spec.schema)
            if spec.default is not MISSING and spec.default is not None \
                    and not {"type", "enum", "anyOf"} & set(spec.schema):
                entry["type"] = _json_type(spec.default)
            if spec.default is not MISSING and spec.default is not None:
                entry["default"] = spec.default
            props[name] = entry
        if extra:
            for k, v in extra.items():
                props[k] = {**props[k], **v}
        out: dict[str, Any] = {"type": "object", "additionalProperties": False, "properties": props}
        if required:
            out["required"] = list(required)
        return out

    detection = obj(DETECTION_KEYS)
    stream = obj(STREAM_KEYS, {"detection": detection}, required=("topic",))
    stream["properties"]["format"]["enum"] = list(FORMATS)
    broker = obj(BROKER_KEYS, {"tls": obj(TLS_KEYS)})
    broker["properties"]["mqtt_version"]["enum"] = ["5", "3.1.1"]
    top = obj(TOP_KEYS, {
        "broker": broker,
        "streams": {"type": "array", "items": stream},
        "detection": detection,
        "alerts": obj(ALERTS_KEYS),
        "metrics": obj(METRICS_KEYS,
                       {"tls": obj(METRICS_TLS_KEYS, required=("cert_file", "key_file"))}),
        "state": obj(STATE_KEYS),
        "display": obj(DISPLAY_KEYS),
        "shard": obj(SHARD_KEYS, required=("number", "of")),
        "cluster": obj(CLUSTER_KEYS, required=("servers",)),
    })
    top["properties"]["state"]["properties"]["keep"]["enum"] = ["local", "cluster"]
    top["properties"]["shard"]["properties"]["metrics_port"]["enum"] = ["offset", "same"]
    top["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    top["title"] = "shiftwatch configuration"
    return top


def _json_type(v: Any) -> str:
    if isinstance(v, bool):
        return "boolean"
    if isinstance(v, int):
        return "integer"
    if isinstance(v, float):
        return "number"
    return "string"
