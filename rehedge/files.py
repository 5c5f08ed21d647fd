"""Reading a user's files: regular files only, never larger than a cap.

A config, a hedge table or a price history given as a device (a symlink to
``/dev/zero`` reads forever), a FIFO (blocks until someone writes) or a file
far larger than any real one is refused in one line before a byte is read.
Standard library only: the hedge-table reader uses it without numpy's
neighbours.
"""

from __future__ import annotations

import os
import stat
from collections.abc import Callable
from pathlib import Path

MEGABYTE = 1 << 20
# Caps on what a real file of each kind can need (a hedge table with a state axis is about 50 MB).
CONFIG_BYTES = 16 * MEGABYTE
TABLE_BYTES = 512 * MEGABYTE
HISTORY_BYTES = 256 * MEGABYTE  # a century of daily closes with a few columns is under 10 MB


def read_regular(path: str | Path, limit: int, error: Callable[[str], Exception], what: str = "file") -> bytes:
    """The bytes of ``path`` if it is a regular file (a symlink to one counts) of at most ``limit``
    bytes; otherwise ``error(message)`` raised, with a one-line message naming the path and the rule."""
    path = Path(path)
    try:
        facts = path.stat()
    except FileNotFoundError:
        raise error(f"{path}: {what} not found") from None
    except OSError as exc:
        raise error(f"{path}: cannot read ({exc.strerror or exc})") from None
    if stat.S_ISDIR(facts.st_mode):
        raise error(f"{path}: is a directory, not a {what}")
    if not stat.S_ISREG(facts.st_mode):
        raise error(f"{path}: not a regular file (a device, pipe or socket); a {what} must be a regular file")
    if facts.st_size > limit:
        raise error(f"{path}: {facts.st_size / MEGABYTE:,.0f} MB, more than the {limit / MEGABYTE:,.0f} MB a {what} "
                    "may have")
    try:
        with open(path, "rb", opener=lambda name, flags: os.open(name, flags | os.O_NONBLOCK)) as handle:
            data = handle.read(limit + 1)
    except OSError as exc:
        raise error(f"{path}: cannot read ({exc.strerror or exc})") from None
    if len(data) > limit:  # grew while it was read
        raise error(f"{path}: more than the {limit / MEGABYTE:,.0f} MB a {what} may have")
    return data
