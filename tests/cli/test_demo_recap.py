"""The demo's closing table ("What happened"), as an operator reads it after the run.

Found by an outside trial: the header "found" stood over the unit, not over the fitted
steps, and the note under the table said 'found' was the step fitted when the shift was
confirmed, which a planned change (recorded without alarm, never confirmed) is not.
"""

from __future__ import annotations

from shiftwatch.core.timefmt import format_time
from shiftwatch.demo import CHANGEOVERS, SENSORS, _recap

START = 1772431200.0


def _records() -> dict[str, list[dict[str, object]]]:
    out: dict[str, list[dict[str, object]]] = {}
    for s in SENSORS:
        if s.step_at is not None:
            at = START + s.step_at
            out[s.stream] = [{"phase": p, "delta": s.step * 0.9, "shift_at": format_time(at),
                              "detected_at": format_time(at + 1)} for p in ("detected", "confirmed")]
    for c in CHANGEOVERS:
        stream = next(s.stream for s in SENSORS if s.topic == c.topic)
        out[stream] = [{"phase": "planned", "delta": 2.5, "shift_at": format_time(START + c.at),
                        "detected_at": format_time(START + c.at + 1)}]
    return out


def test_the_found_header_stands_over_the_fitted_steps_and_the_note_covers_planned_changes() -> None:
    names = {s.stream: s.stream.split("/")[3] for s in SENSORS}
    text = _recap(_records(), START, START + 75, names)
    lines = text.splitlines()
    header = next(ln for ln in lines if "scheduled step" in ln)
    table = lines[lines.index(header) + 1:next(i for i, ln in enumerate(lines) if "dismissed detections" in ln)]
    rows = [ln for ln in table if " at " in ln]
    assert len(rows) == 4, text  # three unplanned steps and the planned one
    for row in rows:  # the fitted step's last digit under the header's last letter
        step = row[:header.index("found") + len("found")].rstrip()
        assert step[-1].isdigit() and len(step) == header.index("found") + len("found"), (header, row)
    note = " ".join(text.split("(clock times", 1)[1].split())
    assert "'found' is the step fitted when the shift was confirmed" in note
    assert "for a planned change, when it was recorded" in note
