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

Two changes to redis-py's cluster client (`_PacedCluster`), both for a master that is down:
- redis-py rebuilds its whole slot map before the next command after every failed one: a pure
  Python pass over 16,384 slots, about 9 ms of event loop paid by whichever visit comes next, per
  failed command. Here a failure only asks for a rebuild; a background task does it at most once
  per REFRESH_S, off the requests' path. Commands for the dead master's slots keep failing fast in
  the meantime (its breaker shuts them out), and work again when it returns.
- the client reads the command table from one node when it starts; if that node is the one that is
  down, every start failed. Here the other masters are asked in turn, so a worker starts degraded
  (store_unavailable for the dead master's sessions) and heals when the master returns.
"""

from __future__ import annotations

import asyncio
import logging
import math
import time
from typing import Any

from redis._parsers.commands import AsyncCommandsParser
from redis.asyncio.cluster import ClusterNode, RedisCluster
from redis.asyncio.retry import Retry
from redis.backoff import NoBackoff
from redis.exceptions import RedisClusterException, RedisError

from service.config import cluster_nodes, redacted
from service.errors import StoreError
from service.runtime.tasks import stop_task
from service.store.redis import REDIS_ERRORS, RedisCommands

log = logging.getLogger("cairn.service")
REFRESH_S = 1.0  # at most one slot-map rebuild a second after failures


class _AnyMasterCommandsParser(AsyncCommandsParser):
    """Reads the command table from the node given, or else from any other node that answers."""

    def __init__(self, cluster: RedisCluster) -> None:
        super().__init__()
        self._cluster = cluster

    async def initialize(self, node: ClusterNode | None = None) -> None:
        candidates = [node] if node is not None else []
        candidates += [n for n in self._cluster.nodes_manager.nodes_cache.values() if n is not node]
        last: BaseException | None = None
        for candidate in candidates:
            try:
                await super().initialize(candidate)
                return
            except REDIS_ERRORS as exc:
                last = exc
        raise last if last is not None else RedisClusterException("no cluster node to read the command table from")


class _PacedCluster(RedisCluster):
    """RedisCluster whose slot-map rebuilds after failed commands are paced (see the module docstring)."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.__dict__.update(_init_flag=True, _closing=False, _refresh_wanted=False, _last_refresh=-math.inf, refreshes=0)
        super().__init__(*args, **kwargs)
        self.commands_parser = _AnyMasterCommandsParser(self)

    @property
    def _initialize(self) -> bool:  # type: ignore[override]
        return self.__dict__["_init_flag"]

    @_initialize.setter
    def _initialize(self, value: bool) -> None:
        if value and not self.__dict__["_closing"] and self.__dict__["_init_flag"] is False:
            self.__dict__["_refresh_wanted"] = True  # a failed command: rebuild later, not before the next one
            return
        self.__dict__["_init_flag"] = value

    async def aclose(self) -> None:
        self.__dict__["_closing"] = True
        try:
            await super().aclose()
        finally:
            self.__dict__["_closing"] = False

    async def refresh_when_wanted(self) -> None:
        """Until cancelled: rebuild the slot map when a failure asked for it, at most once per REFRESH_S."""
        while True:
            await asyncio.sleep(REFRESH_S / 4)
            if not self.__dict__["_refresh_wanted"] or time.monotonic() - self.__dict__["_last_refresh"] < REFRESH_S:
                continue
            self.__dict__.update(_refresh_wanted=False, _last_refresh=time.monotonic(), _init_flag=True)
            self.__dict__["refreshes"] += 1
            try:
                await self.initialize()
            except REDIS_ERRORS as exc:
                log.debug("cluster topology refresh failed, retrying: %s", exc)
                self.__dict__["_refresh_wanted"] = True


class RedisClusterStore(RedisCommands):
    kind = "redis-cluster"

    def __init__(self, url: str, ttl_s: float, pool_size: int, timeout_s: float, connect_timeout_s: float, prefix: str = "cairn:") -> None:
        self.ttl_ms = max(1, int(round(ttl_s * 1000)))
        self._session_prefix = f"{prefix}s:"
        self._active_key = f"{prefix}active-model"
        self._serving_key = f"{prefix}serving-workers"
        try:
            nodes, user, password, tls = cluster_nodes(url)
            self._client = _PacedCluster(
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

        self._refresher: asyncio.Task | None = None

    async def _call(self, what: str, pending: Any) -> Any:
        if self._refresher is None:  # the first call runs on the event loop the store serves on
            self._refresher = asyncio.get_running_loop().create_task(self._client.refresh_when_wanted(), name="cairn-cluster-refresh")
        return await super()._call(what, pending)

    async def ping(self) -> None:
        # redis-py sends PING to one node (its default) unless told which: every master must answer,
        # or the store is degraded (a master down loses its visits).
        await self._call("PING", self._client.ping(target_nodes=RedisCluster.PRIMARIES))

    async def close(self) -> None:
        if self._refresher is not None:
            await stop_task(self._refresher)
            self._refresher = None
        await super().close()

    def shard_of(self, session_id: str) -> str:
        """host:port of the master that holds the session, "" before the slot map is known."""
        try:
            node = self._client.get_node_from_key(self._session_prefix + session_id)
        except REDIS_ERRORS:
            return ""
        return "" if node is None else node.name
