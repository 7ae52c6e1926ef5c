"""Loopback ports and the one URL check: load goes only to loopback or to the URL given."""

from __future__ import annotations

import socket
from urllib.parse import urlsplit

from service.load.errors import LoadTestError


def free_loopback_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago (the OS picks it; port 0 trick)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


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
