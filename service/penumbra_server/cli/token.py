"""`penumbra token`: make a bearer token and record its digest in a token file.

The token goes to standard output once (give it to whoever needs it: an evolution's job, a
colleague's `penumbra watch`); the token file keeps only its SHA-256, so the server's copy of
the file gives no one a usable token.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

from penumbra_server.server.tokens import ROLES, TokenBook, new_token, token_digest

__all__ = ["make_token"]

_NAME = re.compile(r"^[A-Za-z0-9_.@-]{1,64}$")


def make_token(*, role: str, name: str, token_file: Path | None) -> str:
    """A new token of ``role``; its digest is appended to ``token_file`` (created with mode 0600)."""
    if role not in ROLES:
        raise ValueError(f"--role: expected one of {', '.join(ROLES)}, got {role!r}")
    if not _NAME.match(name):
        raise ValueError(f"--name: expected 1-64 letters, digits or . _ @ -, got {name!r}")
    token = new_token()
    if token_file is not None:
        token_file = Path(token_file)
        if token_file.exists():
            TokenBook.from_file(token_file)  # refuse to append to a file the server would not read
        stanza = (f'\n[[token]]\nname = "{name}"\nrole = "{role}"\n'
                  f'sha256 = "{token_digest(token).hex()}"\n')
        fd = os.open(token_file, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
        with os.fdopen(fd, "a") as handle:
            handle.write(stanza)
    return token
