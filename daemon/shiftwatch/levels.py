"""The retained ``<prefix>/levels/<stream>`` messages: what they show, which are due, and
how many are out at once.

A :class:`LevelBoard` belongs to the daemon's main thread, apart from the set of level
publications not yet acknowledged by the broker (:attr:`LevelBoard.in_flight`), which
paho's thread changes too: the daemon calls :meth:`~LevelBoard.sent_out`,
:meth:`~LevelBoard.answered` and :meth:`~LevelBoard.connection_lost` under its own lock.
The board publishes through the callables it is given and reads the engines it is given;
it keeps no reference to the daemon.
"""

from __future__ import annotations

import json
import math
import time
from collections import OrderedDict
from collections.abc import Callable, Iterable, Mapping
from typing import Any

import numpy as np

from shiftwatch.core.baseline import Baseline
from shiftwatch.core.engine import WATCHING, StreamEngine
from shiftwatch.core.timefmt import format_time

#: Level publications handed to paho and not yet acknowledged by the broker, at
#: most.  A stream whose level changes while this many are out waits its turn
#: (oldest first) and then publishes its state as it is then.  Without the bound
#: paho holds every update until its PUBACK, some dozen objects each, and
#: PUBACKs wait behind the incoming messages while the inbox is full: 10,000
#: streams fed batches left 13,000 updates in paho's memory, and their objects,
#: made among the engines' own, fragmented the heap for good (about 20 MB).
LEVELS_IN_FLIGHT = 50

#: The ``state`` of every retained level once the daemon has stopped.
OFFLINE = "offline"

#: publish(topic, payload, level): hand a retained QoS 1 publication to the broker link;
#: ``level``: it counts against LEVELS_IN_FLIGHT until the broker acknowledges it.
Publish = Callable[[str, bytes, bool], None]


class LevelBoard:
    """The levels topic of every stream.

    Parameters
    ----------
    prefix : alerts.topic_prefix (levels go to ``<prefix>/levels/<stream>``).
    engines : the daemon's engines by stream name (read, never changed).
    label_for : a stream's configured label, or None.
    publish : see :data:`Publish`.
    linked : whether the broker link exists (the daemon has started it).
    connected : whether the broker link is up.
    clock : the time a payload's ``updated_at`` gives (epoch seconds).
    """

    def __init__(self, prefix: str, engines: Mapping[str, StreamEngine], *,
                 label_for: Callable[[str], str | None], publish: Publish,
                 linked: Callable[[], bool], connected: Callable[[], bool],
                 clock: Callable[[], float] = time.time) -> None:
        self.prefix = prefix
        self.engines = engines
        self.label_for = label_for
        self.publish = publish
        self.linked = linked
        self.connected = connected
        self.clock = clock
        # What the levels topic shows of each stream, (state, level, sigma) as last sent (see
        # shows): a watching stream's is its engine's Baseline itself (a tuple a stream
        # would cost 64 bytes more, and the baseline is there anyway).
        self.sent: dict[str, Baseline | tuple[str, float | None, float | None]] = {}
        # Streams whose level update is queued (an ordered set, main thread
        # only; see send_due), and the mids of the level publications out.
        self.due: OrderedDict[str, None] = OrderedDict()
        self.offline = False
        self.in_flight: set[int] = set()

    def changed(self, name: str, eng: StreamEngine) -> None:
        """After a stream's batch: queue its level update if what the levels
        topic shows of it has changed (send_due publishes it)."""
        if eng.level is not None and not self.shows(name, eng.state, eng):
            self.due[name] = None

    def shows(self, name: str, state: str, eng: StreamEngine) -> bool:
        """Whether the levels topic shows the stream as ``(state, eng.level, eng.sigma)``
        (compared as tuples, as they were kept before: the same floats, or equal ones)."""
        sent = self.sent.get(name)
        if sent is None:
            return False
        if isinstance(sent, tuple):
            return sent == (state, eng.level, eng.sigma)
        return state == WATCHING and (sent.level, sent.sigma) == (eng.level, eng.sigma)

    def note_shown(self, name: str, state: str, eng: StreamEngine) -> None:
        """The levels topic now shows the stream as ``(state, eng.level, eng.sigma)``."""
        b = eng.baseline
        self.sent[name] = b if state == WATCHING and b is not None else (state, eng.level, eng.sigma)

    def send_due(self) -> None:
        """Publish the queued level updates, oldest first, each stream's state as
        it is now, while fewer than LEVELS_IN_FLIGHT are unacknowledged.

        Nothing goes to paho while the broker is away: paho would hold every
        update in memory and its 16-bit message ids would wrap in a long
        outage; the queue holds each stream once at most, and empties after
        the reconnect.
        """
        due = self.due
        while due and len(self.in_flight) < LEVELS_IN_FLIGHT:
            if not self.connected():
                return
            name, _ = due.popitem(last=False)
            eng = self.engines.get(name)  # None: removed by a reload meanwhile
            if eng is None or eng.level is None:
                continue
            state = OFFLINE if self.offline else eng.state
            if self.shows(name, state, eng):
                continue
            self.note_shown(name, state, eng)
            body = self.body(name, eng, state)
            self.publish(f"{self.prefix}/levels/{name}", json.dumps(body).encode(), True)

    def body(self, name: str, eng: StreamEngine, state: str) -> dict[str, Any]:
        """The retained ``levels`` payload of a stream.

        Level and sigma are rounded to 6 significant digits, as in alert
        records, the level to finer where that would round it by more than a
        tenth of sigma (:func:`level_digits`); ``state`` is the engine's, or ``offline`` in the update each
        stream gets when the daemon stops (the level is then the last one
        known, not watched any more).  ``updated_at`` is when it was made (UTC).
        """
        body: dict[str, Any] = {"stream": name}
        label = self.label_for(name)
        if label is not None:
            body["label"] = label
        body.update({"state": state, "level": level_digits(eng.level, eng.sigma), "sigma": six_digits(eng.sigma),
                     "unit": eng.unit, "last_shift_at": None if eng.last_shift_at is None
                     else format_time(eng.last_shift_at), "updated_at": format_time(self.clock())})
        if state == OFFLINE:
            body["note"] = ("shiftwatch stopped: this level is the last one known and is not "
                            "being watched until it restarts")
        return body

    def clear(self, name: str) -> None:
        """A removed stream: its retained levels message is cleared on the broker (an
        empty retained message deletes it), so no subscriber sees a stream that is gone."""
        self.due.pop(name, None)
        self.sent.pop(name, None)
        if self.linked():  # also for a level published before a restart
            self.publish(f"{self.prefix}/levels/{name}", b"", False)

    def let_go(self, name: str) -> None:
        """A stream another shard owns now: no update of it is due here any more (what the
        topic shows stays noted: the stream may come back)."""
        self.due.pop(name, None)

    def go_offline(self, names: Iterable[str]) -> None:
        """The daemon stops: every stream's level is due once more, as ``offline``."""
        self.offline = True
        for name in names:
            self.due[name] = None

    # ------------------------------------------- in flight (under the daemon's lock)
    def sent_out(self, mid: int) -> None:
        """Level publication ``mid`` is with paho: it counts against LEVELS_IN_FLIGHT."""
        self.in_flight.add(mid)

    def answered(self, mid: int) -> None:
        """The broker acknowledged publication ``mid`` (a level or not)."""
        self.in_flight.discard(mid)

    def connection_lost(self) -> None:
        """paho sends the levels it holds again after the reconnect, and the broker
        acknowledges them then; the bound counts from each connection all the same, so
        that a PUBACK that never comes (a defect anywhere) cannot hold a place for ever.
        A link that flaps may so leave paho up to LEVELS_IN_FLIGHT more per flap for a while."""
        self.in_flight.clear()


def six_digits(x: float | None) -> float | None:
    """Six significant digits (the rounding of alert records), for payloads people read."""
    if x is None or x == 0 or not np.isfinite(x):
        return x
    return float(f"{x:.6g}")


def level_digits(level: float | None, sigma: float | None) -> float | None:
    """A level for the levels topic: :func:`six_digits`, or, where six significant digits
    would round it by more than a tenth of the noise ``sigma`` (a reading far from zero
    with little noise), to the decimals that give sigma two significant digits.  Before,
    a compressed-air header at 101325.37 Pa with 0.2 Pa of noise showed 101325.0, two
    sigmas off; a thermometer at 773.15542 K with 0.001 K showed 773.155.

    >>> level_digits(500.0312, 0.5), level_digits(101325.372, 0.2), level_digits(773.1554162, 0.001)
    (500.031, 101325.37, 773.1554)
    """
    six = six_digits(level)
    if (level is None or six is None or level == 0 or not np.isfinite(level) or sigma is None
            or not (sigma > 0.0 and np.isfinite(sigma))):
        return six
    if 10.0 ** (math.floor(math.log10(abs(level))) - 5) > sigma / 10.0:
        return round(level, 1 - math.floor(math.log10(sigma)))
    return six
