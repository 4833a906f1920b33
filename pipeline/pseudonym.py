"""Keyed pseudonymisation of participant identifiers (HMAC-SHA256).

The key comes from the environment variable ``TAKEUP_ID_KEY`` (any string;
its UTF-8 bytes are the key) or from a key file next to the warehouse,
created by ``takeup init`` with mode 0600.  HMAC is computed inside DuckDB
(two ``sha256`` passes over ``(K xor ipad) || m`` and ``(K xor opad) ||
inner``), so pseudonymisation is vectorised and raw identifiers never
leave the SQL engine's working memory.

References
----------
Krawczyk, H., Bellare, M. and Canetti, R. (1997). HMAC: Keyed-Hashing for
Message Authentication. RFC 2104.
"""

from __future__ import annotations

import hashlib
import hmac
import os
import secrets
from dataclasses import dataclass
from pathlib import Path

__all__ = ["PseudonymKey", "load_key", "create_key_file", "key_file_for", "SEPARATOR"]

#: separates site id and participant id inside the hashed message
SEPARATOR = "\x1f"
_BLOCK = 64


@dataclass(frozen=True)
class PseudonymKey:
    key: bytes
    source: str

    def __post_init__(self) -> None:
        if len(self.key) == 0:
            raise ValueError("the pseudonymisation key is empty")

    @property
    def _block_key(self) -> bytes:
        k = hashlib.sha256(self.key).digest() if len(self.key) > _BLOCK else self.key
        return k.ljust(_BLOCK, b"\x00")

    @property
    def ipad(self) -> bytes:
        return bytes(b ^ 0x36 for b in self._block_key)

    @property
    def opad(self) -> bytes:
        return bytes(b ^ 0x5C for b in self._block_key)

    def fingerprint(self) -> str:
        """A value that identifies the key without revealing it (stored in the warehouse)."""
        return hmac.new(self.key, b"takeup key fingerprint", hashlib.sha256).hexdigest()[:16]

    def pseudonym(self, site_id: str, participant_id: str) -> int:
        """Python reference implementation (tests; the pipeline uses :meth:`sql`)."""
        msg = (site_id + SEPARATOR + participant_id).encode("utf-8")
        return int(hmac.new(self.key, msg, hashlib.sha256).hexdigest()[:32], 16)

    @staticmethod
    def sql(site_expr: str, id_expr: str) -> str:
        """SQL expression for the pseudonym; binds ``$ipad`` and ``$opad`` (BLOB parameters).

        The stored pseudonym is the HMAC truncated to its first 128 bits (RFC 2104,
        section 5, allows truncation to half the hash length), held as UHUGEINT:
        fixed-width keys make the joins and group-bys of every run several times
        faster than 64-character strings.
        """
        msg = f"encode({site_expr} || chr(31) || {id_expr})"
        return f"CAST('0x' || left(sha256($opad || unhex(sha256($ipad || {msg}))), 32) AS UHUGEINT)"


def key_file_for(warehouse: Path) -> Path:
    return warehouse.with_name(warehouse.name + ".key")


def create_key_file(warehouse: Path) -> Path:
    """Create a random key file (mode 0600) beside the warehouse unless one exists."""
    path = key_file_for(warehouse)
    if not path.exists():
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w") as fh:
            fh.write(secrets.token_hex(32) + "\n")
    return path


def load_key(warehouse: Path) -> PseudonymKey:
    """The key from ``TAKEUP_ID_KEY`` or the warehouse's key file."""
    env = os.environ.get("TAKEUP_ID_KEY")
    if env:
        return PseudonymKey(env.encode("utf-8"), "environment variable TAKEUP_ID_KEY")
    path = key_file_for(warehouse)
    try:
        text = path.read_text().strip()
    except FileNotFoundError:
        raise FileNotFoundError(
            f"no pseudonymisation key: set TAKEUP_ID_KEY or run 'takeup init' to create {path}") from None
    return PseudonymKey(text.encode("utf-8"), f"key file {path}")
