"""Session state in a Redis Cluster: redis-py's asyncio RedisCluster, the same values and script.

`CAIRN_SESSION_STORE=redis-cluster://host:port,host:port,...` names startup nodes (any of them; the client
reads the slot map from the first that answers). Each session is one key, and the check-and-set
script touches only that key, so every command goes to the one master that owns the key's hash
slot: no cross-slot work, no MULTI across nodes.

When a master is down, the commands for its slots fail at once (a refused connection) and the
others keep working: the client does not require every slot to be covered, and `shard_of` names
the master of a session so the service keeps one breaker per master. Redis Cluster itself stops
serving all slots when one master is lost unless `cluster-require-full-coverage no` is set on the
nodes (see docker/compose.yaml); with it, the surviving masters keep their slots.

As with a single Redis there are no client retries (a retried check-and-set could report a
conflict for its own write); MOVED and ASK redirections are followed by the client as usual.
"""

from __future__ import annotations

from redis.asyncio.cluster import ClusterNode, RedisCluster
from redis.asyncio.retry import Retry
from redis.backoff import NoBackoff
from redis.exceptions import RedisClusterException, RedisError

from service.config import cluster_nodes, redacted
from service.errors import StoreError
from service.store.redis import REDIS_ERRORS, RedisCommands


class RedisClusterStore(RedisCommands):
    kind = "redis-cluster"

    def __init__(self, url: str, ttl_s: float, pool_size: int, timeout_s: float, connect_timeout_s: float, prefix: str = "cairn:") -> None:
        self.ttl_ms = max(1, int(round(ttl_s * 1000)))
        self._session_prefix = f"{prefix}s:"
        self._active_key = f"{prefix}active-model"
        self._serving_key = f"{prefix}serving-workers"
        try:
            nodes, user, password, tls = cluster_nodes(url)
            self._client = RedisCluster(
                startup_nodes=[ClusterNode(host, port) for host, port in nodes],
                require_full_coverage=False,  # a master down loses its own slots only
                retry=Retry(NoBackoff(), 0),
                max_connections=pool_size,  # per master
                socket_timeout=timeout_s,
                socket_connect_timeout=connect_timeout_s,
                username=user,
                password=password,
                ssl=tls,
            )
        except (ValueError, RedisError, RedisClusterException) as exc:
            raise StoreError(f"CAIRN_SESSION_STORE: cannot use {redacted(url)!r} ({redacted(str(exc))})") from exc

    def shard_of(self, session_id: str) -> str:
        """host:port of the master that holds the session, "" before the slot map is known."""
        try:
            node = self._client.get_node_from_key(self._session_prefix + session_id)
        except REDIS_ERRORS:
            return ""
        return "" if node is None else node.name
