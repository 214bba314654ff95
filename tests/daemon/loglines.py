"""A logging handler that keeps the lines a part logged, for tests that ask what it said."""

from __future__ import annotations

import logging


class Lines(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(record.getMessage())

    def said(self, text: str) -> int:
        """How many lines hold ``text``."""
        return sum(text in m for m in self.lines)
