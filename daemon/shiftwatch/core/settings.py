"""Detection settings, in plant terms, and how they become test parameters."""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any

from shiftwatch.core.timefmt import parse_duration

#: The sequential tests a stream can use.
TEST_NAMES = ("multi_cusum", "glr", "cusum", "page_hinkley", "adwin")
#: In-control ARLs, in samples, a test is designed for: the calibrated range of the tests.
ARL_RANGE = (50.0, 1e9)
#: The smallest ``min_sigma`` accepted: its square must stay a normal double (below
#: about 1e-154 it underflows, and a flat stream's statistics divide by zero).
MIN_SIGMA_LOWEST = 1e-100
#: The largest ``min_sigma`` accepted, for the same reason: above about 1e154 its square
#: overflows (the engine then stops on an OverflowError).
MIN_SIGMA_HIGHEST = 1e100
#: Longest segment the GLR test looks over: the range its threshold is calibrated for
#: (``GlrTest.design`` refuses anything else, see core/glr.py).
GLR_WINDOW_RANGE = (50, 2000)
#: The most samples kept per stream: the windows of 128 streams share one block of
#: 16 bytes a sample (20,000 samples: 41 MB a block, 320 kB a stream).
WINDOW_SAMPLES_MAX = 20_000
#: The most samples an event may stay open after its detection (the window grows by
#: them while it is open: 16 MB a stream at most).
CONFIRM_MAX_SAMPLES_MAX = 1_000_000
#: Largest ``clip_sigma`` and ``spike_sigma``: a normal residual passes 40 sigma about never,
#: so larger values change nothing, and near the largest double they overflow.
CLIP_SIGMA_MAX = 1000.0
SPIKE_SIGMA_MAX = 10000.0
#: Longest ``false_alarm_every``, in seconds: 1,000 years of 365.25 days.  The in-control
#: ARL is held to ARL_RANGE anyway (1e9 samples), so a longer mean time changes no design;
#: near the largest double (above about 1.8e307 s) the check for runs of one repeated
#: reading took the logarithm of an overflowed product and raised on every batch.
FALSE_ALARM_EVERY_MAX = 1000 * 365.25 * 86400.0

#: The range of every whole-number setting, lowest and highest (None: no upper bound), and
#: why, as the errors give it.  One source of truth: ``DetectionSettings`` enforces it, the
#: configuration file is refused with it at load, and the JSON Schema states it.
WHOLE_RANGES: dict[str, tuple[int, int | None, str]] = {
    "warmup_samples": (20, WINDOW_SAMPLES_MAX // 2, "at most half of window_samples"),
    "window_samples": (40, WINDOW_SAMPLES_MAX, "memory: 16 bytes a sample and stream"),
    "confirm_min_samples": (1, CONFIRM_MAX_SAMPLES_MAX, "at most confirm_max_samples"),
    "confirm_max_samples": (1, CONFIRM_MAX_SAMPLES_MAX, "the window grows by them while an event is open"),
    "glr_window": (GLR_WINDOW_RANGE[0], GLR_WINDOW_RANGE[1], "the range the GLR test is calibrated for"),
    "baseline_memory": (1, None, ""),
    "baseline_guard": (1, WINDOW_SAMPLES_MAX, "below window_samples - warmup_samples"),
}
#: The range of every number setting: (lowest, lowest excluded, highest).
NUMBER_RANGES: dict[str, tuple[float, bool, float | None]] = {
    "min_shift_sigma": (0.0, True, 4.0),
    "false_alarm_every": (0.0, True, FALSE_ALARM_EVERY_MAX),
    "clip_sigma": (0.0, True, CLIP_SIGMA_MAX),
    "spike_sigma": (0.0, True, SPIKE_SIGMA_MAX),
    "confirm_precision": (0.0, True, None),
}


@dataclass(frozen=True)
class DetectionSettings:
    """How one stream is watched.

    The two settings a plant chooses are ``min_shift_sigma`` (the smallest
    step worth an alert, in noise sigmas) and ``false_alarm_every`` (how long,
    on average, an in-control stream runs between false alarms, in seconds).
    The rest have defaults chosen by measurement (see the README).

    Examples
    --------
    >>> s = DetectionSettings(min_shift_sigma=1.5)
    >>> s.test, s.false_alarm_every
    ('multi_cusum', 604800.0)
    >>> s.arl0(interval=2.0)
    302400.0
    >>> DetectionSettings(test="ewma")
    Traceback (most recent call last):
    ...
    ValueError: test: 'ewma' is not one of multi_cusum, glr, cusum, page_hinkley, adwin
    """

    #: smallest step of interest, in sigmas of the noise
    min_shift_sigma: float = 1.0
    #: mean time between false alarms on an in-control stream, seconds
    false_alarm_every: float = 7 * 86400.0
    #: which sequential test: multi_cusum (default), glr, cusum, page_hinkley, adwin
    test: str = "multi_cusum"
    #: samples used to learn a first baseline before watching starts (a new stream, or one restarted
    #: without saved state); the baseline keeps growing from the samples after it
    warmup_samples: int = 200
    #: samples kept per stream, and looked back over by the step fit (it grows while an event is open)
    window_samples: int = 400
    #: residuals are clipped to +-clip_sigma before they reach the test
    clip_sigma: float = 4.0
    #: a lone sample further than this many sigmas from the level is a spike and is discarded
    spike_sigma: float = 5.0
    #: confidence level of the shift-time interval
    interval_level: float = 0.9
    #: no longer used (events are decided by a sequential test, see core/events.py); accepted so
    #: configuration files of earlier versions still load
    confirm_precision: float = 0.25
    #: samples after the detection before an event can be decided, at least
    confirm_min_samples: int = 1
    #: samples after the detection after which an open event ends undecided
    confirm_max_samples: int = 1000
    #: error rate of the event decision: an unchanged level confirmed as a step, or a step of
    #: min_shift_sigma dismissed, each at most this often
    confirm_p_value: float = 0.001
    #: floor for sigma in reading units (None: from the reading resolution)
    min_sigma: float | None = None
    #: longest segment, in samples, over which the GLR test looks for a shift
    glr_window: int = 400
    #: weight, in samples, at which the baseline's memory is capped when it is refined
    baseline_memory: int = 20000
    #: the newest samples are kept out of baseline refinements (a shift may be in progress there)
    baseline_guard: int = 60
    #: a sample stamped more than this many seconds ahead of its arrival is rejected (None: no limit)
    max_time_ahead: float | None = 600.0
    #: a sample stamped more than this many seconds before its arrival is rejected (None: no limit)
    max_time_behind: float | None = None

    def __post_init__(self) -> None:
        def bad(name: str, why: str) -> None:
            raise ValueError(f"{name}: {why}")

        if self.test not in TEST_NAMES:
            bad("test", f"{self.test!r} is not one of {', '.join(TEST_NAMES)}")
        for name, (low, _open, high) in NUMBER_RANGES.items():
            v = getattr(self, name)
            if not isinstance(v, (int, float)) or isinstance(v, bool) or not math.isfinite(v) or v <= low:
                bad(name, f"must be a positive number, got {v!r}")
            if high is not None and v > high:
                if name == "false_alarm_every":
                    bad(name, f"must be at most 1000 years ({high:.0f} s), got {v!r} s")
                bad(name, f"must be at most {high:g}, got {v!r}")
        for name, (lo, hi, why) in WHOLE_RANGES.items():
            v = getattr(self, name)
            if not isinstance(v, int) or isinstance(v, bool) or v < 1:
                bad(name, f"must be a positive whole number, got {v!r}")
            if v < lo or (hi is not None and v > hi):
                span = f"at least {lo}" if hi is None else f"from {lo} to {hi}"
                bad(name, f"must be a whole number {span}{f' ({why})' if why else ''}, got {v}")
        if self.window_samples < 2 * self.warmup_samples:
            bad("window_samples", f"must be at least twice warmup_samples ({2 * self.warmup_samples}), "
                f"got {self.window_samples}")
        if not 0.5 <= self.interval_level < 1.0:
            bad("interval_level", f"must be in [0.5, 1), got {self.interval_level!r}")
        if not 0.0 < self.confirm_p_value < 0.5:
            bad("confirm_p_value", f"must be in (0, 0.5), got {self.confirm_p_value!r}")
        if self.baseline_guard >= self.window_samples - self.warmup_samples:
            bad("baseline_guard", f"must be below window_samples - warmup_samples "
                f"({self.window_samples - self.warmup_samples}), got {self.baseline_guard}")
        if self.spike_sigma <= self.clip_sigma:
            bad("spike_sigma", f"must exceed clip_sigma ({self.clip_sigma}), got {self.spike_sigma}")
        if self.min_sigma is not None and (
                not isinstance(self.min_sigma, (int, float)) or isinstance(self.min_sigma, bool)
                or not MIN_SIGMA_LOWEST <= self.min_sigma <= MIN_SIGMA_HIGHEST):
            bad("min_sigma", f"must be null or a finite number from {MIN_SIGMA_LOWEST:g} to "
                f"{MIN_SIGMA_HIGHEST:g} (reading units), got {self.min_sigma!r}")
        for name in ("max_time_ahead", "max_time_behind"):
            v = getattr(self, name)
            if v is not None and (not isinstance(v, (int, float)) or isinstance(v, bool)
                                  or not math.isfinite(v) or v <= 0):
                bad(name, f"must be a positive duration or null, got {v!r}")
        if self.confirm_max_samples < self.confirm_min_samples:
            bad("confirm_max_samples", "must be at least confirm_min_samples")

    def arl0(self, interval: float) -> float:
        """In-control average run length, in samples, for a sampling interval in seconds.

        Kept within [50, 1e9] samples: the calibrated range of the tests.  A
        stream whose samples arrive in bursts (arrival times microseconds
        apart) would otherwise ask for an absurd run length.

        Examples
        --------
        >>> DetectionSettings().arl0(1.0), DetectionSettings().arl0(1e-6)
        (604800.0, 1000000000.0)
        """
        return min(max(self.false_alarm_every / interval, ARL_RANGE[0]), ARL_RANGE[1])

    @classmethod
    def from_mapping(cls, data: dict[str, Any], base: DetectionSettings | None = None) -> DetectionSettings:
        """Build settings from a mapping (e.g. YAML), over ``base`` or the defaults.

        ``false_alarm_every``, ``max_time_ahead`` and ``max_time_behind`` accept a
        duration such as ``7d``.  Unknown keys
        raise ``ValueError`` naming the key.
        """
        known = {f.name for f in fields(cls)}
        values: dict[str, Any] = {} if base is None else {f.name: getattr(base, f.name) for f in fields(cls)}
        for key, value in data.items():
            if key not in known:
                raise ValueError(f"{key}: unknown setting (known: {', '.join(sorted(known))})")
            if key == "false_alarm_every" or (key in ("max_time_ahead", "max_time_behind")
                                              and value is not None):
                value = parse_duration(value)
            values[key] = value
        return cls(**values)

    def to_dict(self) -> dict[str, Any]:
        return {f.name: getattr(self, f.name) for f in fields(self)}
