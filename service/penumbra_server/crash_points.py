"""Named points where a crash test makes the server kill itself with SIGKILL.

A test sets ``PENUMBRA_CRASH_AT=<point>[:<n>]`` (several separated by commas) in the server's
environment; the n-th time (default 1st) the process reaches ``<point>`` it sends itself SIGKILL,
exactly as an operator's ``kill -9`` would, at a moment no timing could hit reliably. Unset, a
point costs one dictionary look-up. The points are listed in :data:`POINTS`.
"""

from __future__ import annotations

import os
import signal
import threading

__all__ = ["ENV_VAR", "POINTS", "reached"]

ENV_VAR = "PENUMBRA_CRASH_AT"

#: Every point the server passes, in the order a slice meets them.
POINTS: tuple[str, ...] = (
    "spool-before-rename",       # the slice's spool file written and flushed, not yet renamed
    "spool-before-ack",          # the spool file in place, the client not yet answered
    "part-spooled-before-ack",   # a part of a slice sent in parts in its part file, its sender not yet answered
    "archive-mid-commit",        # a commit's journal file written and flushed, not yet renamed
    "archive-journal-written",   # a commit's journal file in place, the commit not yet returned
    "commit-before-release",     # a slice archived, its spool file not yet removed
    "archive-mid-group",         # a fold: a new archive group half created (some of its arrays)
    "archive-mid-fold",          # a fold: the journal's rows written to the arrays, their counts not yet
    "archive-before-consolidate",  # a fold: counts written, consolidated metadata not yet
    "archive-before-journal-trim",  # a fold: all written, the folded journal files not yet removed
)


def _parse(text: str) -> dict[str, int]:
    targets: dict[str, int] = {}
    for entry in filter(None, (part.strip() for part in text.split(","))):
        name, _, count = entry.partition(":")
        if name not in POINTS:
            raise ValueError(f"{ENV_VAR}: unknown point {name!r}; expected one of {', '.join(POINTS)}")
        targets[name] = int(count or 1)
    return targets


_TARGETS = _parse(os.environ.get(ENV_VAR, ""))
_COUNTS: dict[str, int] = {}
_LOCK = threading.Lock()


def reached(point: str) -> None:
    """Kill this process now if the test asked for a crash at this passage of ``point``."""
    if point not in _TARGETS:
        return
    with _LOCK:
        _COUNTS[point] = _COUNTS.get(point, 0) + 1
        if _COUNTS[point] == _TARGETS[point]:
            os.kill(os.getpid(), signal.SIGKILL)
