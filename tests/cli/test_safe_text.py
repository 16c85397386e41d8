"""Display names and other run text cannot drive the terminal they are shown on."""

import pytest

from penumbra_server.cli.safe_text import terminal_safe, terminal_safe_lines


@pytest.mark.parametrize("raw, shown", [
    ("\x1b[31mred\x1b[0m", "red"),                      # colours (CSI)
    ("bell\x07 and\r return", "bell and return"),       # BEL, carriage return
    ("\x1b]0;new title\x07name", "name"),               # OSC: window title, ended by BEL
    ("\x1b]8;;http://x\x1b\\link\x1b]8;;\x1b\\", "link"),  # OSC hyperlink, ended by ST
    ("\x9b2Jcleared", "cleared"),                       # 8-bit CSI
    ("a\x1bcb", "ab"),                                  # ESC c: full reset
    ("line\nbreak\ttab\x7f", "linebreaktab"),           # C0 and DEL
    ("evil\u202egnp.exe", "evilgnp.exe"),               # bidirectional override
    ("Kerr a=0.7 \u2014 M\u00fcller", "Kerr a=0.7 \u2014 M\u00fcller"),  # ordinary text stays
])
def test_terminal_safe(raw, shown):
    assert terminal_safe(raw) == shown


def test_terminal_safe_lines_keeps_line_breaks():
    assert terminal_safe_lines("one\x1b[2K\ntwo\r\n") == "one\ntwo\n"
