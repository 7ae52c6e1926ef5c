"""The admin token check and the edge's body limit on the admin route.

The comparison is hmac.compare_digest over SHA-256 digests, so its time does not depend on where a
guess goes wrong nor on its length (Python documentation of hmac.compare_digest: equal-length
inputs take time independent of their contents). A timing measurement through HTTP could not tell
a few nanoseconds apart, so these tests check what the function answers; the reasoning above is
why its time is constant.
"""

from __future__ import annotations

import pytest
from pydantic import SecretStr

from service.api.auth import token_matches

TOKEN = SecretStr("an-admin-token-0123456789")


@pytest.mark.parametrize(
    "given, ok",
    [
        ("an-admin-token-0123456789", True),
        ("an-admin-token-012345678", False),  # one character short
        ("an-admin-token-01234567890", False),  # one too many
        ("bn-admin-token-0123456789", False),  # wrong first character
        ("an-admin-token-012345678X", False),  # wrong last character
        ("", False),
        ("an-admin-token-0123456789\u00e9", False),  # non-ASCII does not raise
    ],
)
def test_token_matches(given, ok):
    assert token_matches(given, TOKEN) is ok


def test_an_oversized_admin_body_is_refused_before_authentication_and_parsing(server, token):
    # The edge counts the body before any route runs: without a token, a chunked body over the limit
    # (no Content-Length) is a 413, not the 401 the route would give, and it is not even JSON.
    chunks = (b"[" * 4096 for _ in range(5))
    with server.client() as c:
        r = c.put("/v1/serving", content=chunks, headers={"content-type": "application/json"})
        assert r.status_code == 413 and r.json()["error"] == "body_too_large"
        r = c.put("/v1/serving", content=b"{" * (16 * 1024 + 1), headers={"content-type": "application/json", "authorization": f"Bearer {token}"})
        assert r.status_code == 413
        assert c.get("/v1/artifacts").json()["active"]["version"] == "v1"
