"""One daemon with local state fed rounds of messages, for the guards that hold a faster
decoding path to its reference: what it recorded, its engines' states and its journal.

Shared by ``test_decode_columns_packed.py`` and ``test_decode_senml_lean.py``.
"""

from __future__ import annotations

import json
import struct
from collections.abc import Callable
from contextlib import AbstractContextManager
from pathlib import Path
from typing import Any

from shiftwatch.config import load_config
from shiftwatch.daemon import Daemon
from shiftwatch.journal import JOURNAL_NAME
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import Message

#: a run's records (their JSON form), each engine's state as sorted JSON, and the journal's
#: bytes after its header (which holds the daemon's own token)
RunOutput = tuple[list[dict[str, Any]], dict[str, str], bytes]


def local_daemon(tmp_path: Path, name: str, stream_line: str) -> Daemon:
    """A daemon of one streams entry (``stream_line``, a YAML flow mapping) with its state
    directory and configuration file under ``tmp_path / name``, restored and not started."""
    path = tmp_path / f"{name}.yaml"
    path.write_text(f"streams:\n  - {stream_line}\n"
                    f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / name}'}}\n")
    d = Daemon(load_config(str(path)), config_path=str(path), metrics=Metrics())
    d.restore()
    return d


def run_rounds(d: Daemon, rounds: list[list[Message]], switch: Callable[[bool], AbstractContextManager[None]],
               on: bool) -> RunOutput:
    """Feed ``rounds`` to ``d`` through ``Daemon.process`` with ``switch(on)`` in force."""
    records: list[dict[str, Any]] = []
    emit = d.emit

    def keep(rec: Any, arrived: float) -> None:
        records.append(rec.to_dict())
        emit(rec, arrived)

    d.emit = keep  # type: ignore[method-assign]
    with switch(on):
        for msgs in rounds:
            d.process(msgs)
    assert d.journal is not None
    d.journal.close()
    assert d.journal.path.name == JOURNAL_NAME
    states = {n: json.dumps(e.get_state(), sort_keys=True) for n, e in d.engines.items()}
    raw = d.journal.path.read_bytes()
    head = struct.unpack_from("<4sII", raw)  # the header record holds this daemon's own token
    return records, states, raw[struct.calcsize("<4sII") + head[1]:]
