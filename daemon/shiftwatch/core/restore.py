"""Checks of a saved engine state as it is read back: each field a finite number, a count,
a list of numbers or of times a record can carry; a ValueError names the field.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.baseline import Baseline
from shiftwatch.core.timefmt import TIME_MAX, TIME_MIN

FloatArray = NDArray[np.float64]

def _check_finite(o: Any, path: str) -> None:
    """Raise ValueError naming the first number in a saved state that is NaN or infinite
    (no state the engine saves holds one; a test's reference size may be infinite)."""
    if isinstance(o, float):
        if not math.isfinite(o) and not (path.endswith("n_ref") and o == math.inf):
            raise ValueError(f"field {path or 'state'} is {o!r}, not a finite number")
    elif isinstance(o, dict):
        for k, v in o.items():
            _check_finite(v, f"{path}.{k}" if path else str(k))
    elif isinstance(o, (list, tuple)):
        if o and all(type(v) is float for v in o):  # a window: one vector check
            bad = ~np.isfinite(np.asarray(o, dtype=np.float64))
            if bad.any():
                i = int(np.argmax(bad))
                raise ValueError(f"field {path}[{i}] is {o[i]!r}, not a finite number")
            return
        for i, v in enumerate(o):
            _check_finite(v, f"{path}[{i}]")


def _baseline_from(d: dict[str, Any]) -> Baseline:
    """A Baseline from its snapshot form (``Baseline.to_dict``); ``ValueError`` names a bad field."""
    known = {"level", "sigma", "phi", "innovation_sigma", "interval", "quantum", "phi_raw", "clip",
             "tail_fraction"}
    floats: dict[str, float] = {}
    for k, v in d.items():
        if k in ("n", "n_level"):
            continue
        if k not in known:
            raise ValueError(f"baseline.{k}: unknown field")
        floats[k] = _finite_number(v, f"baseline.{k}")
    for k in ("sigma", "innovation_sigma", "interval"):
        if k in floats and not floats[k] > 0:
            raise ValueError(f"baseline.{k}: must be positive, got {floats[k]!r}")
    for k in ("phi", "phi_raw"):
        if k in floats and not -0.95 <= floats[k] <= 0.95:
            raise ValueError(f"baseline.{k}: must lie in [-0.95, 0.95], got {floats[k]!r}")
    n = _count(d["n"], "baseline.n")
    n_level = _count(d.get("n_level", 0), "baseline.n_level")
    return Baseline(n=n, n_level=n_level, **floats)


#: The largest count a saved state may hold (doubles count exactly up to it).
MAX_COUNT = 2**53


def _finite_number(v: Any, name: str) -> float:
    x = float(v)
    if not math.isfinite(x):
        raise ValueError(f"{name}: not a finite number ({x!r})")
    return x


def _positive(v: Any, name: str) -> float:
    x = _finite_number(v, name)
    if not x > 0:
        raise ValueError(f"{name}: must be positive, got {x!r}")
    return x


def _count(v: Any, name: str) -> int:
    if (isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 <= v <= MAX_COUNT
            or v != int(v)):
        raise ValueError(f"{name}: must be a whole number from 0 to 2**53, got {v!r:.40}")
    return int(v)


def _finite_array(v: Any, name: str) -> FloatArray:
    a = np.asarray(v, dtype=np.float64)
    if a.ndim != 1:
        raise ValueError(f"{name}: must be a list of numbers")
    if not np.isfinite(a).all():
        raise ValueError(f"{name}: holds a value that is not a finite number")
    return a


def _time_array(v: Any, name: str) -> FloatArray:
    """Saved sample times: finite, and in the years 1 to 9999 that a record can be written at
    (an earlier version took such times from payloads; the status page could not show them)."""
    a = _finite_array(v, name)
    # up to the last millisecond of the year 9999, the limit the decoder and replay use too
    if a.shape[0] and not (TIME_MIN <= float(a.min()) and float(a.max()) <= TIME_MAX):
        wrong = float(a.min()) if float(a.min()) < TIME_MIN else float(a.max())
        raise ValueError(f"{name}: holds the time {wrong:.17g}, "
                         + ("before the year 1" if wrong < TIME_MIN else "past the year 9999"))
    return a
