"""Progress lines for long work: one updating line on a terminal, plain lines otherwise."""

from __future__ import annotations

import sys
import time
from typing import TextIO

__all__ = ["Progress"]


class Progress:
    """Counts steps of a long task and shows ``label: done/total  message``.

    On a terminal the line is rewritten in place; without one (CI logs, pipes) every update
    is its own line, so logs stay readable.
    """

    def __init__(self, label: str, total: int | None = None, *, stream: TextIO | None = None) -> None:
        self.label = label
        self.total = total
        self.done = 0
        self.stream = stream or sys.stderr
        self._started = time.monotonic()
        self._tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self._open_line = False

    def step(self, message: str = "", *, count: int = 1) -> None:
        self.done += count
        self.show(message)

    def show(self, message: str = "") -> None:
        total = f"/{self.total}" if self.total is not None else ""
        elapsed = time.monotonic() - self._started
        line = f"{self.label}: {self.done}{total}  [{elapsed:5.1f} s]  {message}".rstrip()
        if self._tty:
            self.stream.write("\r\x1b[2K" + line)
            self._open_line = True
        else:
            self.stream.write(line + "\n")
        self.stream.flush()

    def finish(self, message: str = "done") -> None:
        self.show(message)
        if self._open_line:
            self.stream.write("\n")
            self.stream.flush()
            self._open_line = False
