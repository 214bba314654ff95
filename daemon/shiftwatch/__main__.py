"""``python -m shiftwatch`` runs the command line."""

from __future__ import annotations

import sys

from shiftwatch.cli import main

sys.exit(main())
