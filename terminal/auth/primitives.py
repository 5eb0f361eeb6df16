"""The two primitives authentication rests on: HKDF-SHA256 and truncated HMAC-SHA-256.

Both come from the standard library's :mod:`hmac` and :mod:`hashlib`, so the
stack needs no cryptography package.  HKDF follows RFC 5869 (s2.2 extract,
s2.3 expand) line by line; the tests hold it to the RFC's test cases.  Tags
are HMAC-SHA-256 (RFC 2104) cut to their leading bytes, as RFC 2104 s5 and
RFC 4231 s4.6 (test case 5) truncate; they are compared with
:func:`hmac.compare_digest`, whose time does not depend on where two tags
first differ, so a forger learns nothing from how quickly a guess fails.
"""

from __future__ import annotations

import hashlib
import hmac

from ionotrail.terminal.errors import UsageError

HASH_BYTES = hashlib.sha256().digest_size
"""HashLen of RFC 5869 for SHA-256 (32)."""

MAX_EXPAND_BYTES = 255 * HASH_BYTES
"""RFC 5869 s2.3: L <= 255 * HashLen."""


def hkdf_extract(salt: bytes, ikm: bytes) -> bytes:
    """PRK = HMAC-Hash(salt, IKM) (RFC 5869 s2.2); an empty salt is HashLen zeros."""
    return hmac.digest(salt or bytes(HASH_BYTES), ikm, "sha256")


def hkdf_expand(prk: bytes, info: bytes, length: int) -> bytes:
    """OKM, the first ``length`` bytes of T(1) | T(2) | ... (RFC 5869 s2.3).

    T(i) = HMAC-Hash(PRK, T(i-1) | info | i), with T(0) empty and i one byte.
    """
    if not 0 < length <= MAX_EXPAND_BYTES:
        raise UsageError(f"HKDF output of {length} bytes: RFC 5869 allows 1 to {MAX_EXPAND_BYTES}")
    if len(prk) < HASH_BYTES:
        raise UsageError(f"an HKDF pseudorandom key is at least {HASH_BYTES} bytes, not {len(prk)}")
    okm = b""
    block = b""
    for counter in range(1, -(-length // HASH_BYTES) + 1):
        block = hmac.digest(prk, block + info + bytes((counter,)), "sha256")
        okm += block
    return okm[:length]


def hkdf(ikm: bytes, salt: bytes, info: bytes, length: int) -> bytes:
    """Extract then expand (RFC 5869 s2)."""
    return hkdf_expand(hkdf_extract(salt, ikm), info, length)


def hmac_tag(key: bytes, message: bytes, length: int) -> bytes:
    """The leading ``length`` bytes of HMAC-SHA-256(key, message) (RFC 2104 s5 truncation)."""
    if not 0 < length <= HASH_BYTES:
        raise UsageError(f"a tag is 1 to {HASH_BYTES} bytes of HMAC-SHA-256, not {length}")
    return hmac.digest(key, message, "sha256")[:length]


def tag_matches(key: bytes, message: bytes, tag: bytes) -> bool:
    """Whether ``tag`` is the truncated tag of ``message``, compared in constant time.

    The length of ``tag`` chooses the truncation; callers check it against the
    deployment's tag length first (a short tag is easier to forge).
    """
    if not 0 < len(tag) <= HASH_BYTES:
        return False
    return hmac.compare_digest(hmac.digest(key, message, "sha256")[: len(tag)], tag)
