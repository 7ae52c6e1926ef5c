"""The admin bearer token check (RFC 6750 bearer tokens), in constant time.

`hmac.compare_digest` takes time independent of where two equal-length byte strings differ, but
returns at once when the lengths differ (Python's documentation says so), which tells a guesser the
token's length. Both sides are therefore reduced to their SHA-256 digests first: always 32 bytes,
so neither the position of the first wrong byte nor the length of the token shows in the time.
"""

from __future__ import annotations

import hashlib
import hmac

from pydantic import SecretStr


def token_matches(given: str, expected: SecretStr) -> bool:
    """Whether `given` is the admin token, compared in constant time."""
    a = hashlib.sha256(given.encode("utf-8", "surrogatepass")).digest()
    b = hashlib.sha256(expected.get_secret_value().encode("utf-8", "surrogatepass")).digest()
    return hmac.compare_digest(a, b)
