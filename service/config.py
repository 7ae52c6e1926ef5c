"""The service's settings: one pydantic-settings object, the only reader of the environment.

Every knob is an environment variable with the `CAIRN_` prefix (`artifacts` <- `CAIRN_ARTIFACTS`);
`cairn serve` flags override them. A bad value stops start-up with one line that names the
setting and the value (`SettingsError`), never a traceback.
"""

from __future__ import annotations

import difflib
import os
import re
from enum import StrEnum
from pathlib import Path
from typing import Any, Literal

from pydantic import Field, SecretStr, ValidationError, field_validator, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from service.errors import SettingsError

ENV_PREFIX = "CAIRN_"


class RecommenderKind(StrEnum):
    """Which recommender answers the visits: chosen by CAIRN_RECOMMENDER or a switch at run time."""

    GRU = "gru"
    NEIGHBOURS = "neighbours"
    POPULARITY = "popularity"
    SESSION_KNN = "session-knn"  # needs an artifact with a session index (written by `cairn export`)


RECOMMENDERS = tuple(k.value for k in RecommenderKind)
ARTIFACT_PART = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")  # as service.artifacts.format accepts
DEFAULT_STATE_CACHE_SESSIONS = 20_000  # a state is about 1 KB: some 20 MB a worker
_MIN_TOKEN = 16  # shorter admin tokens are guessable placeholders (common practice)



class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix=ENV_PREFIX, extra="forbid", frozen=True)

    # Which recommender answers, and from which artifact.
    recommender: Literal["gru", "neighbours", "popularity", "session-knn"] = "gru"
    artifacts: Path = Path("model_store")  # folder of <name>/<version>/ artifacts
    artifact_name: str | None = None  # default: the only name in the store
    artifact_version: str | None = None  # default: that name's newest version
    # Session store: "memory" (in this process), a redis:// (rediss:// for TLS) URL shared by workers
    # and replicas, or redis-cluster://host:port,host:port,... (rediss-cluster:// for TLS).
    session_store: str = "memory"
    admin_token: SecretStr | None = None  # bearer token for PUT /v1/serving; unset: switching disabled

    # HTTP server.
    host: str = "127.0.0.1"
    port: int = Field(8000, ge=1, le=65535)
    workers: int = Field(1, ge=1, le=64)
    log_level: Literal["debug", "info", "warning", "error"] = "info"
    access_log: bool = False  # uvicorn's access log shows session ids in paths; off unless asked for
    tls_certfile: Path | None = None  # PEM certificate chain: serve HTTPS directly (else plain HTTP behind a TLS proxy)
    tls_keyfile: Path | None = None  # its PEM private key
    # Slow or stuck clients: a request body must arrive whole within body_timeout_s (else 408), and a
    # worker holds at most max_connections connections at once (more are answered 503 at once).
    body_timeout_s: float = Field(5.0, gt=0, le=300)
    max_connections: int = Field(1000, ge=1, le=100_000)
    # The demo shop (/shop/) and operator view (/operator/) pages; off: not even mounted, so the API
    # serves exactly as without them.
    pages: bool = False

    # Sessions.
    history_length: int = Field(20, ge=1, le=200)  # clicks kept per session (replayed on a model switch)
    session_ttl_s: float = Field(1800.0, ge=0.05, le=30 * 86400)  # inactivity timeout, 30 min (common practice)
    memory_max_sessions: int = Field(100_000, ge=1)  # memory store: least recently used beyond this are dropped
    event_memory: int = Field(16, ge=0, le=255)  # recent event_ids kept per session for de-duplication
    # Redis stores: sessions whose last written state a worker keeps, so their next click here skips
    # the read (service/store/recent.py; the check-and-set still guards every write). 0: off.
    # Unset: on with --workers 1, off with more: the kernel hands connections to the workers at
    # random, so a visit's clicks spread over them, and an entry another worker has since outdated
    # costs a wasted scoring step.
    state_cache_sessions: int | None = Field(None, ge=0, le=10_000_000)

    @property
    def state_cache_entries(self) -> int:
        """What `state_cache_sessions` comes to for this process."""
        if self.state_cache_sessions is not None:
            return self.state_cache_sessions
        return DEFAULT_STATE_CACHE_SESSIONS if self.workers == 1 else 0

    # Answers.
    default_count: int = Field(10, ge=1, le=100)  # items per answer when a request does not say
    default_budget_ms: int = Field(50, ge=1, le=10_000)  # time budget when a request does not say

    # Guards: deadlines and circuit breakers (service/resilience). false: none of it, to measure its cost.
    guards: bool = True
    latency_quantile: float = Field(0.95, gt=0, le=1)  # the model may start only if this quantile of its steps fits
    latency_window: int = Field(256, ge=8, le=100_000)  # recent calls the quantile is taken over
    latency_max_age_s: float = Field(30.0, gt=0, le=3600)  # older samples leave the window
    latency_probe_s: float = Field(1.0, gt=0, le=3600)  # no model sample this long and an idle loop: one call runs to measure again
    # A breaker opens when, over `window_s`, at least `min_calls` calls were made and `failure_ratio`
    # of them failed or timed out; after `cool_down_s` it lets `trial_calls` calls through, and
    # closes when they all succeed.
    model_breaker_window_s: float = Field(10.0, gt=0, le=3600)
    model_breaker_min_calls: int = Field(20, ge=1, le=100_000)
    model_breaker_failure_ratio: float = Field(0.5, gt=0, le=1)
    model_breaker_cool_down_s: float = Field(5.0, ge=0, le=3600)
    model_breaker_trial_calls: int = Field(3, ge=1, le=1000)
    store_breaker_window_s: float = Field(10.0, gt=0, le=3600)
    store_breaker_min_calls: int = Field(20, ge=1, le=100_000)
    store_breaker_failure_ratio: float = Field(0.5, gt=0, le=1)
    store_breaker_cool_down_s: float = Field(1.0, ge=0, le=3600)  # short: Redis back means sessions stored again soon
    store_breaker_trial_calls: int = Field(3, ge=1, le=1000)

    # Model runtime.
    ort_threads: int = Field(1, ge=1, le=64)  # ONNX Runtime intra-op threads of the one step session
    max_batch: int = Field(64, ge=1, le=1024)  # most clicks the GRU runner scores in one call
    # How the GRU scores the items: exact (every item in float32, the step graph), fp16, int8 or
    # int4 (approximate candidates from reduced-precision vectors, re-scored exactly; needs an
    # artifact with item vectors), int4+int8 (both packed tables: int4 for the batch sizes it
    # scored faster at load, int8 for the rest), clustered (exact scores of the items in the
    # nearest clusters of the artifact's clustered index), auto (from item_vectors.REDUCED_FROM items on:
    # clustered when the export measured >= 99% top-20 agreement for it reading <= 25% of the
    # items, else int4+int8 where both are exported, else int8, else int4; below: exact).
    scoring: Literal["auto", "exact", "fp16", "int8", "int4", "int4+int8", "clustered"] = "auto"
    probe_clusters: int = Field(0, ge=0, le=1_000_000)  # clustered: clusters scored per click; 0 = the artifact's own choice
    model_poll_s: float = Field(0.5, ge=0.05, le=10.0)  # how often workers read the shared active-model choice

    # Redis.
    redis_pool_size: int = Field(32, ge=1, le=10_000)  # connections per worker (per cluster master; one bounded pool)
    redis_timeout_s: float = Field(0.25, gt=0, le=60)  # per command
    redis_connect_timeout_s: float = Field(1.0, gt=0, le=60)
    redis_pool_timeout_s: float = Field(0.5, gt=0, le=60)  # wait for a free pooled connection
    redis_prefix: str = Field("cairn:", pattern=r"^[A-Za-z0-9:._-]{0,32}$")

    # Click events (service/events): "off", a folder (JSON Lines, one file per worker, rotated by
    # size and by hour) or a redis:// URL (one stream, `<prefix>events`, trimmed approximately).
    # A click only appends to a bounded in-process buffer; a background task writes batches every
    # `events_flush_s`; a full buffer drops events and counts them (cairn_events_dropped_total).
    events: str = "off"
    events_buffer: int = Field(50_000, ge=1, le=10_000_000)  # events a worker holds unwritten at most
    events_flush_s: float = Field(0.5, gt=0, le=60)  # how often the writer flushes: a kill loses at most this much
    events_file_mb: float = Field(64.0, gt=0, le=100_000)  # folder sink: a file is closed past this size (and each hour)
    events_stream_max: int = Field(10_000_000, ge=1000)  # Redis sink: stream length kept (approximately, MAXLEN ~)
    events_key: SecretStr | None = None  # set: session ids in events are keyed-hash pseudonyms (HMAC-SHA256)
    # An experiment (service/events/experiment.py): path of a TOML or JSON file naming the arms;
    # each visit's arm comes from a keyed hash of its session id. Unset: no experiment.
    experiment: Path | None = None

    @field_validator("session_store")
    @classmethod
    def _store_kind(cls, value: str) -> str:
        if value == "memory" or value.startswith(("redis://", "rediss://", "unix://")):
            return value
        if value.startswith(CLUSTER_SCHEMES):
            cluster_nodes(value)  # raises ValueError naming what is wrong
            return value
        raise ValueError("use 'memory', a redis://host:port/db URL or redis-cluster://host:port,host:port,...")

    @field_validator("events")
    @classmethod
    def _events_sink(cls, value: str) -> str:
        if value.startswith(CLUSTER_SCHEMES) or value.startswith("unix://"):
            raise ValueError("use 'off', a folder or a redis://host:port/db URL (a single Redis, not a cluster)")
        if value.strip() == "":
            raise ValueError("use 'off', a folder or a redis://host:port/db URL")
        return value

    @field_validator("events_key")
    @classmethod
    def _events_key_strength(cls, value: SecretStr | None) -> SecretStr | None:
        if value is None or value.get_secret_value() == "":
            return None
        if len(value.get_secret_value()) < _MIN_TOKEN:
            raise ValueError(f"shorter than {_MIN_TOKEN} characters; use a long random key")
        return value

    @field_validator("artifact_name", "artifact_version")
    @classmethod
    def _artifact_part(cls, value: str | None) -> str | None:
        if value in (None, ""):
            return None
        if not ARTIFACT_PART.fullmatch(value):
            raise ValueError("use 1-64 letters, digits, '.', '_' or '-', starting with a letter or digit")
        return value

    @field_validator("admin_token")
    @classmethod
    def _token_strength(cls, value: SecretStr | None) -> SecretStr | None:
        if value is None or value.get_secret_value() == "":
            return None
        if len(value.get_secret_value()) < _MIN_TOKEN:
            raise ValueError(f"shorter than {_MIN_TOKEN} characters; use a long random token")
        return value

    @model_validator(mode="after")
    def _tls_pair(self) -> Settings:
        if (self.tls_certfile is None) != (self.tls_keyfile is None):
            raise ValueError("CAIRN_TLS_CERTFILE and CAIRN_TLS_KEYFILE go together: set both or neither")
        return self

    @model_validator(mode="after")
    def _workers_need_shared_store(self) -> Settings:
        if self.workers > 1 and self.session_store == "memory":
            raise ValueError(
                f"{self.workers} workers with CAIRN_SESSION_STORE=memory would each keep their own sessions; "
                "use a redis:// store or one worker"
            )
        return self

    @property
    def events_kind(self) -> str:
        """off, redis or folder."""
        if self.events == "off":
            return "off"
        return "redis" if self.events.startswith(("redis://", "rediss://")) else "folder"

    @property
    def store_kind(self) -> str:
        if self.session_store == "memory":
            return "memory"
        return "redis-cluster" if self.session_store.startswith(CLUSTER_SCHEMES) else "redis"


CLUSTER_SCHEMES = ("redis-cluster://", "rediss-cluster://")


def cluster_nodes(url: str) -> tuple[list[tuple[str, int]], str | None, str | None, bool]:
    """(host, port) of each startup node, user name, password and TLS of a redis-cluster:// URL.

    `redis-cluster://[user:password@]host:port[,host:port...]`; rediss-cluster:// connects with TLS.
    Credentials are percent-decoded, as in redis:// URLs. ValueError names what is wrong (never the password).
    """
    from urllib.parse import unquote

    scheme, _, rest = url.partition("://")
    tls = scheme == "rediss-cluster"
    user = password = None
    if "@" in rest:
        credentials, _, rest = rest.rpartition("@")
        user_part, colon, password_part = credentials.partition(":")
        user = unquote(user_part) or None
        password = unquote(password_part) if colon else None
    rest = rest.rstrip("/")
    if "/" in rest or "?" in rest:
        raise ValueError("a Redis Cluster has only database 0: give host:port pairs without a path or options")
    nodes = []
    for part in rest.split(","):
        host, colon, port = part.strip().rpartition(":")
        if not colon or not host or not port.isdigit() or not 1 <= int(port) <= 65535:
            raise ValueError(f"cluster node {part.strip()!r}: use host:port")
        nodes.append((host.strip("[]"), int(port)))
    return nodes, user, password, tls


def redacted(url: str) -> str:
    """A store URL as it may be shown in messages and logs: any password replaced by ***."""
    scheme, sep, rest = url.partition("://")
    if not sep or "@" not in rest:
        return url
    credentials, _, location = rest.rpartition("@")  # the last @: a password may hold one unencoded
    user, colon, _ = credentials.partition(":")
    return f"{scheme}://{user}{':***' if colon else ''}@{location}"


def load_settings(overrides: dict[str, Any] | None = None, flags: dict[str, str] | None = None) -> Settings:
    """Settings from the environment, `overrides` (field -> value, e.g. from CLI flags) winning.

    `flags` maps a field to the flag it came from, so an error names what the user typed.
    """
    overrides = {k: v for k, v in (overrides or {}).items() if v is not None}
    unknown = sorted(k for k in os.environ if k.startswith(ENV_PREFIX) and k[len(ENV_PREFIX) :].lower() not in Settings.model_fields)
    if unknown:
        # A misspelt setting would otherwise be ignored silently, and the default used in its place.
        known = [f"{ENV_PREFIX}{f.upper()}" for f in Settings.model_fields]
        close = difflib.get_close_matches(unknown[0], known, n=1)
        hint = f" (did you mean {close[0]}?)" if close else ""
        raise SettingsError(f"{unknown[0]}={os.environ[unknown[0]]!r}: no such setting{hint}")
    try:
        return Settings(**overrides)
    except ValidationError as exc:
        raise SettingsError(_one_line(exc, overrides, flags or {})) from None


def _one_line(exc: ValidationError, overrides: dict[str, Any], flags: dict[str, str]) -> str:
    parts = []
    for err in exc.errors(include_url=False):
        loc = [str(p) for p in err.get("loc", ())]
        field = loc[0] if loc else ""
        msg = err.get("msg", "invalid").removeprefix("Value error, ")
        if not field:  # a rule across fields; its message names them
            parts.append(msg)
            continue
        name = flags[field] if field in overrides and field in flags else f"{ENV_PREFIX}{field.upper()}"
        value = overrides.get(field, err.get("input"))
        shown = "<hidden>" if field in ("admin_token", "events_key") else repr(redacted(value) if field in ("session_store", "events") and isinstance(value, str) else value)
        parts.append(f"{name}={shown}: {msg}")
    return "; ".join(parts) or "invalid settings"


def export_environment(settings: Settings) -> None:
    """Write settings back as CAIRN_ variables, so worker processes spawned later rebuild the same object."""
    for name in Settings.model_fields:
        value = getattr(settings, name)
        key = f"{ENV_PREFIX}{name.upper()}"
        if value is None:
            os.environ.pop(key, None)
        elif isinstance(value, SecretStr):
            os.environ[key] = value.get_secret_value()
        elif isinstance(value, bool):
            os.environ[key] = "true" if value else "false"
        else:
            os.environ[key] = str(value)
