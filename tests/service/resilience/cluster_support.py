"""A real three-master Redis Cluster on loopback for the cluster tests (slots assigned by
`redis-cli --cluster create`)."""

from __future__ import annotations

import contextlib
import shutil
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis as redis_sync

MASTERS = 3


@contextlib.contextmanager
def running_cluster(folder: Path, kit) -> Iterator[list]:
    """Three cluster-enabled redis-servers, joined into one cluster with every slot assigned."""
    if shutil.which("redis-cli") is None:
        pytest.fail("redis-cli is not installed: the cluster tests need it (it comes with redis-server)")
    nodes = []
    try:
        for _ in range(MASTERS):
            port = kit.free_port(cluster_bus=True)
            nodes.append(
                kit.RedisProcess(
                    port, "--cluster-enabled", "yes", "--cluster-config-file", str(folder / f"nodes-{port}.conf"),
                    # Without this, the surviving masters stop serving every slot once they mark one
                    # master failed (redis.conf's documentation of cluster-require-full-coverage).
                    "--cluster-require-full-coverage", "no",
                ).start()
            )  # fmt: skip
        create = subprocess.run(
            ["redis-cli", "--cluster", "create", *[f"127.0.0.1:{n.port}" for n in nodes], "--cluster-replicas", "0", "--cluster-yes"],
            capture_output=True, text=True, timeout=60, stdin=subprocess.DEVNULL,
        )  # fmt: skip
        assert create.returncode == 0, create.stdout + create.stderr
        deadline = time.monotonic() + 20
        while not all("cluster_state:ok" in redis_sync.Redis(port=n.port).execute_command("CLUSTER", "INFO").decode() for n in nodes):
            assert time.monotonic() < deadline, "the cluster did not reach cluster_state:ok"
            time.sleep(0.05)
        yield nodes
    finally:
        for n in nodes:
            n.kill()


def url_of(nodes) -> str:
    return "redis-cluster://" + ",".join(f"127.0.0.1:{n.port}" for n in nodes)


def master_of_slot_zero(nodes) -> object:
    """The node that owns hash slot 0 (redis-py reads the command table from it by default)."""
    for n in nodes:
        for start, end, *_ in redis_sync.Redis(port=n.port).execute_command("CLUSTER", "SLOTS"):
            if start == 0:
                return next(m for m in nodes if m.port == _[0][1])
    raise AssertionError("no master owns slot 0")
