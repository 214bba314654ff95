"""The numerical core of shiftwatch.

Everything in this package is pure: it takes samples and their times as
arguments, performs no I/O, reads no clock and configures no logging.  Only
numpy and the standard library are imported here; river is reached through
:mod:`shiftwatch.core.river_adapter`, which imports it lazily.
"""

from __future__ import annotations
