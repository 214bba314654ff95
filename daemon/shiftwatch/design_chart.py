"""The chart of ``shiftwatch design --chart``: run length against shift size.

matplotlib (the ``report`` extra) is imported here only, and only when a
chart is asked for, with the Agg backend so no display is needed.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path

from shiftwatch.core.design import SensitivityCurve
from shiftwatch.core.suggest import duration_setting
from shiftwatch.display import human_duration

#: Line styles of the chosen, more sensitive and less sensitive curves.
_STYLES = {"chosen": ("#1f4e79", "-", 2.4), "more sensitive": ("#b8572a", "--", 1.6),
           "less sensitive": ("#4d8b31", ":", 1.8)}


class ChartError(RuntimeError):
    """The chart cannot be drawn (matplotlib missing, file not writable)."""


def draw_sensitivity(curves: Sequence[SensitivityCurve], interval: float, path: str | Path) -> None:
    """Draw ARL (left) and median detection delay (right) against shift size, as PNG.

    Parameters
    ----------
    curves : from :func:`shiftwatch.core.design.sensitivity` (chosen first).
    interval : sampling interval in seconds (the right panel is in time).
    path : the PNG file to write.

    Raises
    ------
    ChartError
        When matplotlib is not installed or the file cannot be written.
    """
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as exc:
        raise ChartError(f"the chart needs matplotlib ({exc}); install the 'report' extra: "
                         "pip install 'shiftwatch[report]'") from None
    chosen = curves[0]
    fig, (ax_arl, ax_delay) = plt.subplots(1, 2, figsize=(11, 4.6), constrained_layout=True)
    lo = 0.5 * chosen.min_shift_sigma  # the delay panel starts where delays become practical
    for c in curves:
        colour, style, width = _STYLES.get(c.label, ("#555555", "-", 1.2))
        name = f"{c.label}: false_alarm_every {duration_setting(c.false_alarm_every)}"
        ax_arl.plot(c.shifts, c.arl, style, color=colour, lw=width, label=name)
        pts = [(s, m * interval) for s, m in zip(c.shifts, c.median) if s >= lo and not math.isnan(m)]
        ax_delay.plot([p[0] for p in pts], [p[1] for p in pts], style, color=colour, lw=width, label=name)
    at = min(range(len(chosen.shifts)), key=lambda i: abs(chosen.shifts[i] - chosen.min_shift_sigma))
    if chosen.shifts[at] > 0:
        d = chosen.median[at] * interval
        ax_delay.plot([chosen.shifts[at]], [d], "o", color=_STYLES["chosen"][0])
        ax_delay.annotate(f"{human_duration(d)} at {chosen.min_shift_sigma:g} sigma",
                          (chosen.shifts[at], d), textcoords="offset points", xytext=(8, 8), fontsize=9)
    for ax in (ax_arl, ax_delay):
        ax.set_yscale("log")
        ax.axvline(chosen.min_shift_sigma, color="#888888", lw=0.8, ls="-.")
        ax.grid(True, which="both", color="#dddddd", lw=0.5)
        ax.set_xlabel("size of the step (noise sigmas)")
    ax_arl.set_xlim(0, max(chosen.shifts))
    ax_delay.set_xlim(lo, max(chosen.shifts))
    ax_arl.set_ylabel("average run length (readings)")
    ax_arl.set_title("Average run length: false alarms at 0, detection beyond", fontsize=10)
    ax_arl.legend(loc="upper right", fontsize=8, frameon=False)
    ax_delay.set_ylabel(f"median delay to detection (s; a reading every {human_duration(interval)})")
    ax_delay.set_title(f"Median detection delay, at most (min_shift_sigma {chosen.min_shift_sigma:g} dash-dotted)",
                       fontsize=10)
    fig.suptitle(f"shiftwatch design: multi-chart CUSUM, min_shift_sigma {chosen.min_shift_sigma:g}; "
                 f"the neighbours divide and multiply false_alarm_every by "
                 f"{curves[2].false_alarm_every / chosen.false_alarm_every:g}", fontsize=10)
    try:
        fig.savefig(str(path), format="png", dpi=110)
    except OSError as exc:
        raise ChartError(f"{path}: cannot write the chart: {exc.strerror or exc}") from None
    finally:
        plt.close(fig)


__all__ = ["ChartError", "draw_sensitivity"]
