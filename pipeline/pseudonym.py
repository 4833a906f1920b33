"""Keyed pseudonymisation of participant identifiers (HMAC-SHA256).

The key comes from the environment variable ``TAKEUP_ID_KEY`` (its UTF-8
bytes are the key; at least :data:`MIN_USER_KEY_BYTES` bytes) or from a key
file next to the warehouse, created by ``takeup init`` with mode 0600 and
:data:`GENERATED_KEY_BYTES` random bytes.  HMAC is computed inside DuckDB
(two ``sha256`` passes over ``(K xor ipad) || m`` and ``(K xor opad) ||
inner``), so pseudonymisation is vectorised and raw identifiers never
leave the SQL engine's working memory.

The hashed message encodes the pair (site id, participant id) without
ambiguity: each part is preceded by its length in UTF-8 bytes and a colon
(``"2:S1" "5:P-001"`` -> ``b"2:S15:P-001"``), so no two different pairs give
the same message whatever characters the ids hold (encoding
``length_prefixed``, every warehouse created since schema version 2).
Warehouses created before it keep the older encoding ``separator`` (site
and participant joined by the control character U+001F) for their stored
pseudonyms; that one is unambiguous as long as no site id contains U+001F,
which ingestion now refuses (control characters in ids are quarantined) and
the upgrade checks for the stored rows (see
:func:`takeup.pipeline.warehouse.check_key`).

The warehouse stores a *key check* to refuse a different key: a salted
scrypt hash of the key (RFC 7914; N = 2^14, r = 8, p = 1), which costs
about 16 MB and tens of milliseconds per guess.  Any stored check lets
someone holding the warehouse test guesses of the key offline; the slow
hash makes each guess expensive, and the minimum key length plus the 32
random bytes of a generated key make guessing hopeless in practice.  (The
pseudonyms themselves also allow testing a guessed key by whoever knows one
participant's raw id: keep keys long and random.)

References
----------
Krawczyk, H., Bellare, M. and Canetti, R. (1997). HMAC: Keyed-Hashing for
Message Authentication. RFC 2104.
Percival, C. and Josefsson, S. (2016). The scrypt Password-Based Key
Derivation Function. RFC 7914.
"""

from __future__ import annotations

import hashlib
import hmac
import os
import secrets
from dataclasses import dataclass
from pathlib import Path

__all__ = ["PseudonymKey", "load_key", "create_key_file", "key_file_for", "ENCODINGS", "SEPARATOR",
           "MIN_USER_KEY_BYTES", "GENERATED_KEY_BYTES", "PseudonymKeyError", "make_key_check", "key_check_matches",
           "legacy_fingerprint"]

#: separates site id and participant id inside the hashed message of the older ``separator`` encoding
SEPARATOR = "\x1f"
#: message encodings of (site id, participant id); new warehouses use the first
ENCODINGS: tuple[str, ...] = ("length_prefixed", "separator")
#: a user-supplied key (TAKEUP_ID_KEY or an edited key file) shorter than this is refused
MIN_USER_KEY_BYTES = 16
#: random bytes in a key file created by ``takeup init`` (written as 64 hex characters)
GENERATED_KEY_BYTES = 32
_BLOCK = 64
_SCRYPT = {"n": 2 ** 14, "r": 8, "p": 1}


class PseudonymKeyError(ValueError):
    """An unusable pseudonymisation key (too short, missing); the CLI treats it as a configuration error."""


@dataclass(frozen=True)
class PseudonymKey:
    key: bytes
    source: str
    encoding: str = "length_prefixed"

    def __post_init__(self) -> None:
        if len(self.key) == 0:
            raise PseudonymKeyError("the pseudonymisation key is empty")
        if self.encoding not in ENCODINGS:
            raise ValueError(f"unknown pseudonym encoding {self.encoding!r}; accepted: {', '.join(ENCODINGS)}")

    def with_encoding(self, encoding: str) -> "PseudonymKey":
        return PseudonymKey(self.key, self.source, encoding)

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

    def message(self, site_id: str, participant_id: str) -> bytes:
        """The hashed message for an (already normalised) site id and participant id."""
        s, p = site_id.encode("utf-8"), participant_id.encode("utf-8")
        if self.encoding == "separator":
            return s + SEPARATOR.encode() + p
        return str(len(s)).encode() + b":" + s + str(len(p)).encode() + b":" + p

    def pseudonym(self, site_id: str, participant_id: str) -> int:
        """Python reference implementation (tests; the pipeline uses :meth:`sql_expr`)."""
        return int(hmac.new(self.key, self.message(site_id, participant_id), hashlib.sha256).hexdigest()[:32], 16)

    def sql_expr(self, site_expr: str, id_expr: str) -> str:
        """SQL expression for the pseudonym; binds ``$ipad`` and ``$opad`` (BLOB parameters).

        The stored pseudonym is the HMAC truncated to its first 128 bits (RFC 2104,
        section 5, allows truncation to half the hash length), held as UHUGEINT:
        fixed-width keys make the joins and group-bys of every run several times
        faster than 64-character strings.
        """
        if self.encoding == "separator":
            msg = f"encode({site_expr} || chr(31) || {id_expr})"
        else:
            msg = (f"encode(CAST(octet_length(encode({site_expr})) AS VARCHAR) || ':' || {site_expr} || "
                   f"CAST(octet_length(encode({id_expr})) AS VARCHAR) || ':' || {id_expr})")
        return f"CAST('0x' || left(sha256($opad || unhex(sha256($ipad || {msg}))), 32) AS UHUGEINT)"


def make_key_check(key: PseudonymKey, salt: bytes | None = None) -> str:
    """A salted, deliberately slow check value of ``key`` (stored in ``warehouse_meta``)."""
    salt = salt if salt is not None else secrets.token_bytes(16)
    digest = hashlib.scrypt(key.key, salt=salt, dklen=32, maxmem=64 * 1024 * 1024, **_SCRYPT)
    return f"scrypt${_SCRYPT['n']}${_SCRYPT['r']}${_SCRYPT['p']}${salt.hex()}${digest.hex()}"


def key_check_matches(key: PseudonymKey, stored: str) -> bool:
    try:
        algo, n, r, p, salt, digest = stored.split("$")
        if algo != "scrypt":
            return False
        got = hashlib.scrypt(key.key, salt=bytes.fromhex(salt), n=int(n), r=int(r), p=int(p), dklen=32,
                             maxmem=64 * 1024 * 1024)
    except ValueError:
        return False
    return hmac.compare_digest(got.hex(), digest)


def legacy_fingerprint(key: PseudonymKey) -> str:
    """The unsalted key fingerprint of schema version 1 (only read, to upgrade old warehouses)."""
    return hmac.new(key.key, b"takeup key fingerprint", hashlib.sha256).hexdigest()[:16]


def key_file_for(warehouse: Path) -> Path:
    return warehouse.with_name(warehouse.name + ".key")


def create_key_file(warehouse: Path) -> Path:
    """Create a random key file (mode 0600) beside the warehouse unless one exists."""
    path = key_file_for(warehouse)
    if not path.exists():
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w") as fh:
            fh.write(secrets.token_hex(GENERATED_KEY_BYTES) + "\n")
    return path


def _checked(raw: bytes, source: str) -> PseudonymKey:
    if len(raw) < MIN_USER_KEY_BYTES:
        raise PseudonymKeyError(f"the pseudonymisation key from {source} is {len(raw)} bytes long; at least "
                        f"{MIN_USER_KEY_BYTES} are required (a short key can be guessed from the pseudonyms). "
                        "Use the random key file 'takeup init' creates, or e.g. "
                        "TAKEUP_ID_KEY=$(python -c 'import secrets; print(secrets.token_hex(32))')")
    return PseudonymKey(raw, source)


def load_key(warehouse: Path) -> PseudonymKey:
    """The key from ``TAKEUP_ID_KEY`` or the warehouse's key file (refused when shorter than 16 bytes)."""
    env = os.environ.get("TAKEUP_ID_KEY")
    if env:
        return _checked(env.encode("utf-8"), "environment variable TAKEUP_ID_KEY")
    path = key_file_for(Path(warehouse))
    try:
        text = path.read_text().strip()
    except FileNotFoundError:
        raise PseudonymKeyError(
            f"no pseudonymisation key: set TAKEUP_ID_KEY or run 'takeup init' to create {path}") from None
    return _checked(text.encode("utf-8"), f"key file {path}")
