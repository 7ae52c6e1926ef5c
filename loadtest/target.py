"""The one URL check of the load test: load goes only to loopback or to the base URL given."""

from __future__ import annotations

from urllib.parse import urlsplit

from service.errors import LoadTestError


def check_service_url(url: str) -> str:
    """The URL without a trailing slash, or a LoadTestError naming what is wrong with it."""
    parts = urlsplit(url)
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise LoadTestError(f"--url {url!r}: give the service's base URL, such as http://127.0.0.1:8000")
    if parts.path not in ("", "/") or parts.query or parts.fragment:
        raise LoadTestError(f"--url {url!r}: give the base URL only (no path, query or fragment); the load test adds /v1/...")
    try:
        parts.port
    except ValueError as exc:
        raise LoadTestError(f"--url {url!r}: bad port ({exc})") from exc
    return url.rstrip("/")
