"""Free loopback ports, and checks that something listens on one. Everything the harness starts
binds to 127.0.0.1; nothing here ever connects elsewhere."""

from __future__ import annotations

import contextlib
import random
import socket

from service.errors import BenchError

REDIS_DEFAULT_PORT = 6379  # the machine's own Redis may listen here: never hand it out


def free_port(cluster_bus: bool = False) -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago (the OS picks it: bind to port 0), never
    6379; with `cluster_bus`, port + 10000 is free too (Redis Cluster's bus port)."""
    for _ in range(200):
        port = random.randint(20000, 55000) if cluster_bus else 0
        try:
            with socket.socket() as a:
                a.bind(("127.0.0.1", port))
                port = a.getsockname()[1]
                if cluster_bus:
                    with socket.socket() as b:
                        b.bind(("127.0.0.1", port + 10000))
        except OSError:
            continue
        if port != REDIS_DEFAULT_PORT:
            return port
    raise BenchError("no free loopback port after 200 tries")


def port_accepts(port: int, timeout: float = 0.2) -> bool:
    """True once a TCP connection to 127.0.0.1:port is accepted."""
    with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", port), timeout=timeout):
        return True
    return False


def redis_answers(port: int, timeout: float = 0.2) -> bool:
    """True once a plain-text PING on 127.0.0.1:port gets +PONG (RESP's simple-string reply)."""
    with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", port), timeout=timeout) as s:
        s.sendall(b"PING\r\n")
        return s.recv(64).startswith(b"+PONG")
    return False


def http_answers(port: int, path: str, timeout: float = 0.5) -> bool:
    """True once GET path on 127.0.0.1:port answers with any HTTP status line of 200, 404 or 405."""
    with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", port), timeout=timeout) as s:
        s.sendall(f"GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n".encode())
        return s.recv(64)[9:12] in (b"200", b"404", b"405")
    return False
