"""Crash logs: where the traceback of a fault in rehedge goes, so a user sees one line, not a stack.

The log is ``crash-TIMESTAMP-PID.log`` in ``$REHEDGE_CRASH_DIR``, else
``~/.cache/rehedge/crashes``, else the system's temporary folder: the command,
the versions and the full traceback, for a bug report.
"""

from __future__ import annotations

import os
import platform
import tempfile
import traceback
from datetime import datetime, timezone
from pathlib import Path

CRASH_DIR_ENVIRONMENT = "REHEDGE_CRASH_DIR"


def _folders() -> list[Path]:
    chosen = os.environ.get(CRASH_DIR_ENVIRONMENT)
    return ([Path(chosen)] if chosen else []) + [Path.home() / ".cache" / "rehedge" / "crashes",
                                                 Path(tempfile.gettempdir())]


def write_crash_log(error: BaseException, argv: list[str]) -> Path | str:
    """Write ``error``'s traceback with the command and versions to a new crash log; returns its path
    (or a note that none could be written: a crash report must never crash)."""
    from importlib.metadata import version

    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    text = "".join([
        f"rehedge {version('rehedge')}, Python {platform.python_version()}, {platform.platform()}\n",
        f"command: {' '.join(argv)}\n",
        f"time: {stamp}\n\n",
        *traceback.format_exception(error),
    ])
    for folder in _folders():
        try:
            folder.mkdir(parents=True, exist_ok=True)
            log = folder / f"crash-{stamp}-{os.getpid()}.log"
            log.write_text(text)
            return log
        except OSError:
            continue
    return "(no crash log: no folder could be written)"
