"""Keyed pseudonymization of person identifiers (HMAC-SHA256), computed inside DuckDB.

The key comes from a file or the environment variable ``DROMOS_PSEUDONYM_KEY`` and is never
written to the registry; only a keyed check value (HMAC of a fixed text) is logged, so that a
load with a different key is refused instead of silently creating new people.
"""

from __future__ import annotations

import hashlib
import hmac
import os
from pathlib import Path

from cohort.errors import InputFileError

ENV_VAR = "DROMOS_PSEUDONYM_KEY"
_CHECK_TEXT = b"dromos pseudonym key check"
_BLOCK = 64  # SHA-256 block size in bytes (RFC 2104)
KEY_HEX_CHARS = 32  # 128 bits of the digest are kept as the person key


def read_key(key_file: str | Path | None = None, *, use_env: bool = False) -> bytes | None:
    """The pseudonymization key from ``key_file`` or, if asked, the environment; else None."""
    if key_file is not None:
        path = Path(key_file)
        if not path.is_file():
            raise InputFileError(f"pseudonym key file {path} does not exist")
        key = path.read_bytes().strip()
    elif use_env:
        value = os.environ.get(ENV_VAR)
        if not value:
            raise InputFileError(f"pseudonymization asked for but {ENV_VAR} is not set")
        key = value.encode("utf-8")
    else:
        return None
    if len(key) < 16:
        raise InputFileError("pseudonym key is shorter than 16 bytes; use a long random key")
    return key


def key_check(key: bytes | None) -> str | None:
    """Check value logged with each load (HMAC of a fixed text); None without a key."""
    if key is None:
        return None
    return hmac.new(key, _CHECK_TEXT, hashlib.sha256).hexdigest()[:16]


def python_pseudonym(key: bytes, person_id: str) -> str:
    """Reference implementation in Python (used by tests to check the SQL one)."""
    return hmac.new(key, person_id.encode("utf-8"), hashlib.sha256).hexdigest()[:KEY_HEX_CHARS]


def define_person_key_macro(con, key: bytes | None) -> None:
    """Create the session macro ``dromos_person_key(x)``: identity, or HMAC-SHA256 with ``key``.

    HMAC(k, m) = H((k xor opad) || H((k xor ipad) || m)) (Krawczyk et al., RFC 2104, 1997).
    """
    if key is None:
        con.execute("CREATE OR REPLACE TEMP MACRO dromos_person_key(x) AS x")
        return
    block = hashlib.sha256(key).digest() if len(key) > _BLOCK else key
    block = block.ljust(_BLOCK, b"\0")
    inner = bytes(b ^ 0x36 for b in block).hex()
    outer = bytes(b ^ 0x5C for b in block).hex()
    con.execute(
        "CREATE OR REPLACE TEMP MACRO dromos_person_key(x) AS "
        f"CASE WHEN x IS NOT NULL THEN left(sha256(unhex('{outer}') || "
        f"unhex(sha256(unhex('{inner}') || encode(x)))), {KEY_HEX_CHARS}) END"
    )
