"""Durable file writes shared by the spool (server/spool.py, server/part_files.py) and the
archive journal (archive/journal.py)."""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["fsync_directory"]


def fsync_directory(directory: Path) -> None:
    """Flush ``directory``'s entries (a rename into it survives a power loss once this returns)."""
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
