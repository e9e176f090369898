"""Keyed pseudonyms for patient (and encounter and staff) identifiers.

``HMAC-SHA256(key, identifier)``, hex, truncated to 32 characters (128 bits). A keyed
hash, unlike a plain hash, cannot be reversed by hashing every possible MRN; the key is
kept outside the store (a file or an environment variable), so the store alone does not
re-identify anyone. Pseudonyms made with different keys are never comparable.

Other identifiers (encounter, operator) are pseudonymised with the same secret but under
their own domain: the HMAC key is ``HMAC-SHA256(key, "abg-audit pseudonym domain <name>")``,
a key derived per domain, so an encounter id and a patient id with the same text get
unrelated pseudonyms and one cannot be matched against the other. The patient pseudonym
stays the plain keyed hash, as it was before domains existed, so stored keys still link.
"""

from __future__ import annotations

import hashlib
import hmac
import os
import secrets
from pathlib import Path

import polars as pl

from pipeline.errors import ConfigError

KEY_ENV = "ABG_AUDIT_PSEUDONYM_KEY"
PSEUDONYM_CHARS = 32
# The key is text (UTF-8), used as the HMAC key as written: one line, surrounding white space
# ignored. 32 characters is 128 bits when they are random hex digits, the strength of the
# 128-bit pseudonyms; a shorter key is a weaker secret than the pseudonyms it protects.
MIN_KEY_CHARS = 32
KEY_FORMAT_HELP = (
    f"The pseudonym key is one line of text, at least {MIN_KEY_CHARS} characters, random and kept secret "
    f"(for example the output of: python3 -c 'import secrets; print(secrets.token_hex(32))'), in the file "
    f"[privacy] key_file (mode 600, outside the store folder) or in ${KEY_ENV}. Changing it changes every "
    "pseudonym."
)


def load_key(key_file: Path | None, *, create: bool = False) -> bytes:
    """The secret key: from ``$ABG_AUDIT_PSEUDONYM_KEY``, else the key file (``KEY_FORMAT_HELP``).

    ``create`` makes a new random key file (owner-only) when none exists; the demo uses it.
    """
    env = os.environ.get(KEY_ENV)
    if env:
        return _checked(env.strip(), KEY_ENV)
    if key_file is None:
        raise ConfigError(f"no pseudonym key: set {KEY_ENV} or [privacy] key_file in the site configuration")
    if not key_file.exists():
        if not create:
            raise ConfigError(f"pseudonym key file {key_file} does not exist")
        key_file.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        fd = os.open(key_file, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w") as handle:
            handle.write(secrets.token_hex(32))
    mode = key_file.stat().st_mode
    if mode & 0o077:
        raise ConfigError(f"pseudonym key file {key_file} is readable by others; run chmod 600 on it")
    return _checked(key_file.read_text(encoding="utf-8").strip(), f"pseudonym key file {key_file}")


def _checked(key: str, where: str) -> bytes:
    """The key as HMAC key bytes, refused when too short to be a secret (never quoted)."""
    if len(key) < MIN_KEY_CHARS:
        raise ConfigError(
            f"{where}: the pseudonym key has {len(key)} characters, fewer than the {MIN_KEY_CHARS} required; "
            "make a new one with: python3 -c 'import secrets; print(secrets.token_hex(32))' "
            "(a new key changes every pseudonym)"
        )
    return key.encode("utf-8")


def key_id(key: bytes) -> str:
    """A short fingerprint of the key, kept with each run so pseudonyms from different keys
    are never compared; it does not reveal the key."""
    return hmac.new(key, b"abg-audit pseudonym key id", hashlib.sha256).hexdigest()[:12]


def domain_key(key: bytes, domain: str | None) -> bytes:
    """The HMAC key for one kind of identifier; ``None`` is the patient domain (the key itself)."""
    if domain is None:
        return key
    return hmac.new(key, f"abg-audit pseudonym domain {domain}".encode(), hashlib.sha256).digest()


# SHA-256's block size in bytes: an HMAC key is padded (or first hashed) to it (RFC 2104).
_SHA256_BLOCK = 64


def hmac_pads(key: bytes, domain: str | None = None) -> tuple[bytes, bytes]:
    """The inner and outer padded keys of HMAC-SHA256 for one domain (RFC 2104, section 2):
    the parameters of the SQL macro ``keyed_pseudonym`` (``sql/ingest/14_keyed_pseudonym.sql``),
    which computes ``pseudonym`` for a whole file's identifiers in DuckDB. As secret as the
    key: pass them as query parameters, never into SQL text or a log."""
    padded = domain_key(key, domain)
    if len(padded) > _SHA256_BLOCK:
        padded = hashlib.sha256(padded).digest()
    padded = padded.ljust(_SHA256_BLOCK, b"\0")
    return bytes(b ^ 0x36 for b in padded), bytes(b ^ 0x5C for b in padded)


def pseudonym(key: bytes, identifier: str, domain: str | None = None) -> str:
    return _pseudonym(hmac.new(domain_key(key, domain), digestmod=hashlib.sha256), identifier)


def _pseudonym(keyed: hmac.HMAC, identifier: str) -> str:
    """The pseudonym from an HMAC already keyed (copied, so the key is processed once)."""
    digest = keyed.copy()
    digest.update(identifier.strip().encode("utf-8"))
    return digest.hexdigest()[:PSEUDONYM_CHARS]


def add_pseudonym(
    frame: pl.DataFrame, key: bytes, column: str, output: str, domain: str | None = None
) -> pl.DataFrame:
    """Add the pseudonym column ``output`` of ``column``; each distinct identifier is hashed once."""
    if column not in frame.columns:
        return frame.with_columns(pl.lit(None, dtype=pl.String).alias(output))
    distinct = frame.get_column(column).drop_nulls().unique()
    keyed = hmac.new(domain_key(key, domain), digestmod=hashlib.sha256)
    keys = pl.Series([_pseudonym(keyed, ident) for ident in distinct.to_list()], dtype=pl.String)
    return frame.with_columns(
        pl.col(column).replace_strict(distinct, keys, default=None, return_dtype=pl.String).alias(output)
    )


def add_patient_key(frame: pl.DataFrame, key: bytes, column: str = "patient_id") -> pl.DataFrame:
    """Add ``patient_key``; each distinct identifier is hashed once."""
    return add_pseudonym(frame, key, column, "patient_key")
