"""Text from a run (display names, event reasons) made safe to show on a terminal.

A run's display name comes from whoever opened the run; printed raw, ``ESC [ ... m`` would
recolour the operator's terminal, ``ESC ] ...`` could set its title or clipboard, and ``\\r``
or BEL could overwrite or hide what the table says. :func:`terminal_safe` removes escape
sequences whole, then every remaining control character (C0, DEL, C1) and the invisible
bidirectional overrides that reorder what is shown.
"""

from __future__ import annotations

import re
import unicodedata

__all__ = ["terminal_safe", "terminal_safe_lines"]

_ESCAPE_SEQUENCE = re.compile(
    r"\x1b\[[0-?]*[ -/]*[@-~]"            # CSI: colours, cursor moves, erasing
    r"|\x9b[0-?]*[ -/]*[@-~]"             # CSI as one 8-bit character
    r"|[\x1b\x9d]\][^\x07\x1b\x9c]*(?:\x07|\x1b\\|\x9c)?"  # OSC: titles, hyperlinks, clipboard
    r"|\x1b[PX^_][^\x1b\x9c]*(?:\x1b\\|\x9c)?"  # DCS, SOS, PM, APC strings
    r"|\x1b[ -/]*[0-~]"                   # every other escape (charset, keypad, reset ...)
)
_BIDI_CONTROLS = frozenset("\u061c\u200e\u200f\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069")


def terminal_safe(text: object) -> str:
    """``str(text)`` without escape sequences, control characters (newlines included) or
    bidirectional overrides."""
    cleaned = _ESCAPE_SEQUENCE.sub("", str(text))
    return "".join(c for c in cleaned if unicodedata.category(c) != "Cc" and c not in _BIDI_CONTROLS)


def terminal_safe_lines(text: str) -> str:
    """:func:`terminal_safe` on each line of ``text``, keeping the line breaks."""
    return "\n".join(terminal_safe(line) for line in str(text).split("\n"))
