"""Bearer tokens: the configured ones (a token file, with roles) and each run's writer token.

Only SHA-256 digests are kept and compared: a token is 256 random bits, so a plain digest
cannot be reversed or guessed, and a leaked token file or archive directory gives no one a
usable token. Comparisons use :func:`hmac.compare_digest` over every entry, so the time an
answer takes does not depend on how much of a token matched.

Token file (TOML), one ``[[token]]`` table per token::

    [[token]]
    name = "campaign-2026"        # shown in logs, never the token itself
    role = "opener"               # admin | reader | opener
    sha256 = "9f86d0...c15d"      # hex digest of the token (or: token = "the token itself")
"""

from __future__ import annotations

import hashlib
import hmac
import os
import secrets
import threading
import tomllib
from dataclasses import dataclass
from pathlib import Path

__all__ = ["ROLES", "TokenEntry", "TokenBook", "WriterTokens", "token_digest", "new_token", "writer_token_path"]

#: admin: everything except sending to or closing a run (only its writer); reader: a run's
#: description, events, latest surfaces and guidance; opener: OpenRun.
ROLES = ("admin", "reader", "opener")
_WRITER_SUFFIX = ".writer-token.sha256"


def token_digest(token: str) -> bytes:
    """SHA-256 of the token's UTF-8 bytes (32 bytes)."""
    return hashlib.sha256(token.encode("utf-8")).digest()


def new_token() -> str:
    """A fresh token: 256 random bits, URL-safe text (43 characters)."""
    return secrets.token_urlsafe(32)


@dataclass(frozen=True)
class TokenEntry:
    """One configured token: who (``name``), what (``role``) and its SHA-256 ``digest``."""

    name: str
    role: str
    digest: bytes


class TokenBook:
    """The configured tokens. Empty: the server is open (loopback or a trusted network only)."""

    def __init__(self, entries: tuple[TokenEntry, ...] = ()) -> None:
        self.entries = tuple(entries)

    def __bool__(self) -> bool:
        return bool(self.entries)

    def __len__(self) -> int:
        return len(self.entries)

    @classmethod
    def from_file(cls, path: str | Path) -> "TokenBook":
        """Read a token file (format in the module docstring); ValueError names the bad entry."""
        path = Path(path)
        try:
            data = tomllib.loads(path.read_text())
        except tomllib.TOMLDecodeError as err:
            raise ValueError(f"token file {path}: not valid TOML ({err})") from None
        tables = data.get("token", [])
        if not isinstance(tables, list):
            raise ValueError(f"token file {path}: expected [[token]] tables")
        entries = []
        for index, table in enumerate(tables):
            where = f"token file {path}: token[{index}]"
            name = str(table.get("name", f"token-{index}"))
            role = table.get("role")
            if role not in ROLES:
                raise ValueError(f"{where}.role: expected one of {', '.join(ROLES)}, got {role!r}")
            if ("token" in table) == ("sha256" in table):
                raise ValueError(f"{where}: give exactly one of 'token' or 'sha256'")
            if "token" in table:
                token = str(table["token"])
                if len(token) < 16:
                    raise ValueError(f"{where}.token: expected at least 16 characters, got {len(token)}")
                digest = token_digest(token)
            else:
                try:
                    digest = bytes.fromhex(str(table["sha256"]))
                except ValueError:
                    digest = b""
                if len(digest) != 32:
                    raise ValueError(f"{where}.sha256: expected 64 hexadecimal digits")
            entries.append(TokenEntry(name=name, role=role, digest=digest))
        return cls(tuple(entries))

    @classmethod
    def from_files(cls, paths) -> "TokenBook":
        entries: list[TokenEntry] = []
        for path in paths:
            entries.extend(cls.from_file(path).entries)
        return cls(tuple(entries))

    def lookup(self, token: str) -> TokenEntry | None:
        """The entry of ``token``, or None; compares against every entry (constant time)."""
        digest = token_digest(token)
        found = None
        for entry in self.entries:
            if hmac.compare_digest(entry.digest, digest) and found is None:
                found = entry
        return found


def writer_token_path(archive_root: str | Path, run_id: str) -> Path:
    """``<archive_root>/<run_id>.writer-token.sha256``: beside the run's archive."""
    return Path(archive_root) / f"{run_id}{_WRITER_SUFFIX}"


class WriterTokens:
    """Each run's writer token: issued at OpenRun, its digest kept beside the run's archive so
    that it keeps working after a server restart."""

    def __init__(self, archive_root: str | Path) -> None:
        self.archive_root = Path(archive_root)
        self._issued: dict[str, str] = {}  # this server life only: a retried OpenRun gets the same token
        self._digests: dict[str, bytes | None] = {}
        self._lock = threading.Lock()

    def issue(self, run_id: str) -> str:
        """The writer token of a run opened by this server process (made and stored on first
        call). A run whose digest is already on disk from an earlier server life gets "": the
        token itself was never stored."""
        with self._lock:
            if run_id in self._issued:
                return self._issued[run_id]
            path = writer_token_path(self.archive_root, run_id)
            if path.exists():
                return ""
            token = new_token()
            digest = token_digest(token)
            tmp = path.with_name(path.name + f".tmp{os.getpid()}")
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            with os.fdopen(fd, "w") as handle:
                handle.write(digest.hex() + "\n")
            os.replace(tmp, path)
            self._issued[run_id] = token
            self._digests[run_id] = digest
            return token

    def _digest_of(self, run_id: str) -> bytes | None:
        with self._lock:
            if run_id in self._digests and self._digests[run_id] is not None:
                return self._digests[run_id]
        if not run_id or "/" in run_id or run_id.startswith("."):
            return None
        try:
            digest = bytes.fromhex(writer_token_path(self.archive_root, run_id).read_text().strip())
        except (FileNotFoundError, ValueError):
            return None
        with self._lock:
            self._digests[run_id] = digest
        return digest

    def matches(self, run_id: str, token: str) -> bool:
        """True if ``token`` is the writer token of ``run_id`` (constant-time comparison)."""
        digest = self._digest_of(run_id)
        presented = token_digest(token)
        return hmac.compare_digest(digest or b"\0" * 32, presented) and digest is not None
