"""Settings: CAIRN_ environment variables, flags over them, and one-line refusals of bad values."""

from __future__ import annotations

import argparse
import os
import socket
import subprocess
import sys
from pathlib import Path

import pytest

from service.api import serve_cli
from service.config import Settings, export_environment, load_settings
from service.errors import SettingsError


def parse(argv: list[str]) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    serve_cli.configure(parser)
    return parser.parse_args(argv)


def test_defaults():
    s = load_settings()
    assert (s.recommender, s.session_store, s.port, s.workers, s.history_length, s.session_ttl_s) == ("gru", "memory", 8000, 1, 20, 1800.0)
    assert s.artifacts == Path("model_store") and s.admin_token is None and s.artifact_name is None


def test_environment_then_flags(monkeypatch):
    monkeypatch.setenv("CAIRN_RECOMMENDER", "neighbours")
    monkeypatch.setenv("CAIRN_PORT", "9000")
    monkeypatch.setenv("CAIRN_SESSION_TTL_S", "60")
    monkeypatch.setenv("CAIRN_SESSION_STORE", "redis://127.0.0.1:7000/2")
    monkeypatch.setenv("CAIRN_REDIS_POOL_SIZE", "8")
    s = serve_cli.settings_from_args(parse(["--port", "9100", "--workers", "3"]))
    assert (s.recommender, s.port, s.workers, s.session_ttl_s, s.redis_pool_size) == ("neighbours", 9100, 3, 60.0, 8)
    assert s.store_kind == "redis"


@pytest.mark.parametrize(
    "env, flags, named",
    [
        ({"CAIRN_RECOMMENDER": "bogus"}, [], "CAIRN_RECOMMENDER='bogus'"),
        ({"CAIRN_SESSION_STORE": "mysql://db"}, [], "CAIRN_SESSION_STORE='mysql://db'"),
        ({"CAIRN_SESSION_TTL_S": "-1"}, [], "CAIRN_SESSION_TTL_S='-1'"),
        ({"CAIRN_HISTORY_LENGTH": "0"}, [], "CAIRN_HISTORY_LENGTH='0'"),
        ({"CAIRN_ARTIFACT_VERSION": "../v1"}, [], "CAIRN_ARTIFACT_VERSION='../v1'"),
        ({"CAIRN_ORT_THREADS": "many"}, [], "CAIRN_ORT_THREADS='many'"),
        ({}, ["--port", "0"], "--port=0"),
        ({}, ["--workers", "2"], "CAIRN_SESSION_STORE=memory"),
        ({"CAIRN_RECOMENDER": "gru"}, [], "did you mean CAIRN_RECOMMENDER?"),
    ],
)
def test_bad_values_fail_with_one_line_naming_them(monkeypatch, env, flags, named):
    for k, v in env.items():
        monkeypatch.setenv(k, v)
    with pytest.raises(SettingsError) as info:
        serve_cli.settings_from_args(parse(flags))
    message = str(info.value)
    assert named in message and "\n" not in message, message


def test_a_short_token_is_refused_without_being_shown(monkeypatch):
    monkeypatch.setenv("CAIRN_ADMIN_TOKEN", "hunter2")
    with pytest.raises(SettingsError) as info:
        load_settings()
    assert "CAIRN_ADMIN_TOKEN=<hidden>" in str(info.value) and "hunter2" not in str(info.value)


def test_export_environment_rebuilds_the_same_settings(monkeypatch, tmp_path):
    s = Settings(recommender="popularity", artifacts=tmp_path, session_store="redis://127.0.0.1:7/1", workers=2,
                 admin_token="a-long-enough-admin-token", access_log=True, session_ttl_s=12.5)
    saved = dict(os.environ)
    try:
        export_environment(s)
        assert load_settings() == s
    finally:
        os.environ.clear()
        os.environ.update(saved)


def run_serve(args: list[str], env: dict[str, str], cwd: Path) -> subprocess.CompletedProcess:
    clean = {k: v for k, v in os.environ.items() if not k.startswith("CAIRN_")}
    return subprocess.run([sys.executable, "-m", "service.cli", "serve", *args], env={**clean, **env}, cwd=cwd,
                          capture_output=True, text=True, timeout=60)


def test_cairn_serve_refuses_bad_settings_with_one_line(tmp_path, model_store):
    r = run_serve([], {"CAIRN_RECOMMENDER": "bogus"}, tmp_path)
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "CAIRN_RECOMMENDER='bogus'" in r.stderr, r.stderr
    r = run_serve(["--artifacts", str(tmp_path / "empty")], {}, tmp_path)
    assert r.returncode == 2 and "CAIRN_ARTIFACTS" in r.stderr and "no artifacts" in r.stderr and r.stderr.count("\n") == 1
    r = run_serve(["--artifacts", str(model_store), "--artifact-version", "v7"], {}, tmp_path)
    assert r.returncode == 2 and "CAIRN_ARTIFACT_VERSION='v7'" in r.stderr and "v1, v2" in r.stderr, r.stderr
    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        port = busy.getsockname()[1]
        r = run_serve(["--artifacts", str(model_store), "--artifact-version", "v0-broken", "--port", str(port)], {}, tmp_path)
        assert r.returncode == 2 and "checksum" in r.stderr and r.stderr.count("\n") == 1, r.stderr
        r = run_serve(["--artifacts", str(model_store), "--artifact-version", "v1", "--port", str(port)], {}, tmp_path)
        assert r.returncode == 2 and f"--port {port}" in r.stderr and r.stderr.count("\n") == 1, r.stderr


def test_budget_and_guard_defaults():
    s = load_settings()
    assert s.default_budget_ms == 50 and s.guards is True and s.latency_quantile == 0.95
    assert (s.model_breaker_min_calls, s.model_breaker_failure_ratio, s.model_breaker_cool_down_s, s.model_breaker_trial_calls) == (20, 0.5, 5.0, 3)
    assert (s.store_breaker_min_calls, s.store_breaker_failure_ratio, s.store_breaker_cool_down_s, s.store_breaker_trial_calls) == (20, 0.5, 1.0, 3)


def test_guard_settings_from_the_environment(monkeypatch):
    monkeypatch.setenv("CAIRN_GUARDS", "false")
    monkeypatch.setenv("CAIRN_DEFAULT_BUDGET_MS", "80")
    monkeypatch.setenv("CAIRN_MODEL_BREAKER_MIN_CALLS", "7")
    monkeypatch.setenv("CAIRN_STORE_BREAKER_COOL_DOWN_S", "0.25")
    s = load_settings()
    assert (s.guards, s.default_budget_ms, s.model_breaker_min_calls, s.store_breaker_cool_down_s) == (False, 80, 7, 0.25)


@pytest.mark.parametrize(
    "env, named",
    [
        ({"CAIRN_MODEL_BREAKER_FAILURE_RATIO": "1.5"}, "CAIRN_MODEL_BREAKER_FAILURE_RATIO='1.5'"),
        ({"CAIRN_STORE_BREAKER_MIN_CALLS": "0"}, "CAIRN_STORE_BREAKER_MIN_CALLS='0'"),
        ({"CAIRN_LATENCY_QUANTILE": "0"}, "CAIRN_LATENCY_QUANTILE='0'"),
        ({"CAIRN_SESSION_STORE": "redis-cluster://a:1,b"}, "cluster node 'b': use host:port"),
        ({"CAIRN_SESSION_STORE": "redis-cluster://a:1/2"}, "only database 0"),
        ({"CAIRN_SESSION_STORE": "redis+cluster://a:1/0"}, "CAIRN_SESSION_STORE='redis+cluster://a:1/0'"),
        ({"CAIRN_TLS_CERTFILE": "/x/cert.pem"}, "CAIRN_TLS_CERTFILE and CAIRN_TLS_KEYFILE go together"),
    ],
)
def test_bad_guard_store_and_tls_values_are_named(monkeypatch, env, named):
    for k, v in env.items():
        monkeypatch.setenv(k, v)
    with pytest.raises(SettingsError) as info:
        load_settings()
    assert named in str(info.value) and "\n" not in str(info.value), str(info.value)


def test_cluster_urls():
    from service.config import cluster_nodes

    s = load_settings({"session_store": "redis-cluster://127.0.0.1:7001,127.0.0.2:7002"})
    assert s.store_kind == "redis-cluster"
    assert cluster_nodes(s.session_store) == ([("127.0.0.1", 7001), ("127.0.0.2", 7002)], None, None, False)
    # Credentials percent-decoded as in redis:// URLs (RFC 3986, 2.1); rediss-cluster:// means TLS.
    assert cluster_nodes("rediss-cluster://cairn:p%40ss@h:6379") == ([("h", 6379)], "cairn", "p@ss", True)


def test_a_password_in_the_store_url_is_never_shown(monkeypatch):
    monkeypatch.setenv("CAIRN_SESSION_STORE", "rediss-cluster://cairn:hunter2-secret@h:notaport")
    with pytest.raises(SettingsError) as info:
        load_settings()
    assert "hunter2-secret" not in str(info.value) and "cairn:***@h:notaport" in str(info.value)


def test_the_recent_writes_cache_is_on_with_one_worker_and_off_with_more_unless_set():
    from service.config import DEFAULT_STATE_CACHE_SESSIONS, Settings

    redis = "redis://127.0.0.1:1/0"  # never connected: settings only
    assert Settings(session_store=redis).state_cache_entries == DEFAULT_STATE_CACHE_SESSIONS
    assert Settings(session_store=redis, workers=4).state_cache_entries == 0  # kernel-balanced workers: stale entries would cost steps
    assert Settings(session_store=redis, workers=4, state_cache_sessions=500).state_cache_entries == 500  # set: taken as it is
    assert Settings(session_store=redis, state_cache_sessions=0).state_cache_entries == 0
