"""Logging set-up for the station and the demo: one line per event, to a rotating file and stderr.

Its own small module so that the command line and the demo share it without importing
each other.
"""

from __future__ import annotations

import logging
import logging.handlers
import sys
import time
from pathlib import Path


def setup_logging(logs: Path, max_mb: float, keep: int, *, verbose: bool = True) -> None:
    """One line per event to a rotating log file and to standard error."""
    logs.mkdir(parents=True, exist_ok=True)
    fmt = logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s")
    fmt.converter = time.gmtime
    handler = logging.handlers.RotatingFileHandler(
        logs / "formgate.log", maxBytes=int(max_mb * 2**20), backupCount=keep, encoding="utf-8"
    )
    handler.setFormatter(fmt)
    root = logging.getLogger("formgate")
    root.setLevel(logging.INFO)
    root.handlers[:] = [handler]
    if verbose:
        console = logging.StreamHandler(sys.stderr)
        console.setFormatter(fmt)
        root.addHandler(console)
