"""shiftwatch: level-shift detection for production-line sensor streams."""

from __future__ import annotations

__version__ = "0.1.0"
