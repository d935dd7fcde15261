"""Salted pseudonyms for patient, lesion and group identifiers in shared manifests.

A pseudonym is the keyed hash HMAC-SHA256 (RFC 2104 with SHA-256) of the
identifier's UTF-8 text under a salt the user keeps secret, written as the
first :data:`PSEUDONYM_HEX_DIGITS` hexadecimal digits (64 bits). The same salt
always gives the same pseudonym, so images of one patient stay linked across
manifests made with that salt; without the salt nobody can recompute the
mapping from a list of likely ids.

Pseudonymised is not anonymous: the images themselves, their file names,
capture dates and the rest of a row may still identify a person, and anyone
holding the salt can re-link the ids. Keep the salt apart from the data and
follow local law and your institution's rules when sharing.
"""

from __future__ import annotations

import hashlib
import hmac

import pandas as pd

PSEUDONYM_HEX_DIGITS = 16
MIN_SALT_BYTES = 16


def salt_bytes(salt: str | bytes) -> bytes:
    """The salt as bytes, refusing ones too short to resist guessing.

    Examples
    --------
    >>> salt_bytes("a salt of sixteen+ characters")[:6]
    b'a salt'
    >>> salt_bytes("short")
    Traceback (most recent call last):
    ...
    ValueError: salt must be at least 16 bytes long (got 5); use a long random secret
    """
    if isinstance(salt, str):
        salt = salt.encode("utf-8")
    if not isinstance(salt, (bytes, bytearray)):
        raise TypeError(f"salt must be str or bytes, got {type(salt).__name__}")
    if len(salt) < MIN_SALT_BYTES:
        raise ValueError(
            f"salt must be at least {MIN_SALT_BYTES} bytes long (got {len(salt)}); "
            "use a long random secret"
        )
    return bytes(salt)


def pseudonym(identifier: str, salt: str | bytes) -> str:
    """HMAC-SHA256 of ``identifier`` under ``salt``, first 16 hex digits.

    Examples
    --------
    >>> p = pseudonym("patient-7", "keep this salt somewhere safe")
    >>> len(p), p == pseudonym("patient-7", "keep this salt somewhere safe")
    (16, True)
    >>> p == pseudonym("patient-7", "another salt, also kept safe")
    False
    """
    key = salt_bytes(salt)
    digest = hmac.new(key, str(identifier).encode("utf-8"), hashlib.sha256).hexdigest()
    return digest[:PSEUDONYM_HEX_DIGITS]


def pseudonymise(values: pd.Series, salt: str | bytes) -> pd.Series:
    """Each non-missing value replaced by its :func:`pseudonym`; missing stays missing.

    Examples
    --------
    >>> s = pseudonymise(pd.Series(["P1", None, "P1"]), "keep this salt somewhere safe")
    >>> s[0] == s[2], s[1] is None
    (True, True)
    """
    key = salt_bytes(salt)
    cache: dict[str, str] = {}

    def one(v):
        if v is None or (not isinstance(v, str) and pd.isna(v)):
            return None
        v = str(v)
        if v not in cache:
            cache[v] = pseudonym(v, key)
        return cache[v]

    return pd.Series([one(v) for v in values], index=values.index, dtype=object)
