"""`cairn serve`: the HTTP service on uvicorn (uvloop, httptools).

Flags override the CAIRN_ environment variables (see service/config.py for all of them). Before
uvicorn starts, the settings, the artifact they name and the port are checked here, so a bad one
stops start-up with one line naming it. With --workers N > 1, uvicorn runs N processes that share
one listening socket and the Redis store; each rebuilds the same settings from the environment.
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import socket
import tempfile
from pathlib import Path

from service.api.logs import configure_logging
from service.config import RECOMMENDERS, Settings, export_environment, load_settings
from service.errors import SettingsError
from service.errors import ArtifactError

# flag -> settings field
_FLAGS = {
    "--host": "host",
    "--port": "port",
    "--workers": "workers",
    "--recommender": "recommender",
    "--artifacts": "artifacts",
    "--artifact-name": "artifact_name",
    "--artifact-version": "artifact_version",
    "--session-store": "session_store",
    "--log-level": "log_level",
    "--tls-certfile": "tls_certfile",
    "--tls-keyfile": "tls_keyfile",
}


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--host", help="address to listen on (CAIRN_HOST, default 127.0.0.1)")
    parser.add_argument("--port", type=int, help="port to listen on (CAIRN_PORT, default 8000)")
    parser.add_argument("--workers", type=int, help="worker processes; more than one needs a redis:// session store (CAIRN_WORKERS, default 1)")
    parser.add_argument("--recommender", choices=RECOMMENDERS, help="which recommender answers (CAIRN_RECOMMENDER, default gru)")
    parser.add_argument("--artifacts", metavar="DIR", help="the artifacts folder, <name>/<version>/ inside (CAIRN_ARTIFACTS, default model_store)")
    parser.add_argument("--artifact-name", help="artifact name (CAIRN_ARTIFACT_NAME; default: the only name in the store)")
    parser.add_argument("--artifact-version", help="artifact version (CAIRN_ARTIFACT_VERSION; default: the newest)")
    parser.add_argument(
        "--session-store", help="'memory', redis://host:port/db (rediss:// for TLS) or redis-cluster://host:port,host:port,... (CAIRN_SESSION_STORE, default memory)"
    )
    parser.add_argument("--log-level", choices=("debug", "info", "warning", "error"), help="(CAIRN_LOG_LEVEL, default info)")
    parser.add_argument(
        "--access-log", action="store_true", default=None, help="log each request line; it shows session ids (CAIRN_ACCESS_LOG)"
    )
    parser.add_argument("--tls-certfile", help="PEM certificate chain: serve HTTPS (CAIRN_TLS_CERTFILE; with --tls-keyfile)")
    parser.add_argument("--tls-keyfile", help="PEM private key of that certificate (CAIRN_TLS_KEYFILE)")


def settings_from_args(args: argparse.Namespace) -> Settings:
    fields = {**_FLAGS, "--access-log": "access_log"}
    overrides = {field: getattr(args, field, None) for field in fields.values()}
    return load_settings(overrides, flags={field: flag for flag, field in fields.items()})


def preflight(settings: Settings) -> None:
    """Fail now, with one line, on what would otherwise fail inside every worker."""
    from service.artifacts.format import verify_artifact
    from service.runtime.active import artifact_path, resolve_choice
    from service.store.base import open_store

    if settings.experiment is not None:
        # The arms name their artifacts; CAIRN_ARTIFACT_* are not used while an experiment runs.
        from service.events.experiment import load_experiment

        for arm in load_experiment(settings.experiment).arms:
            path = artifact_path(settings, arm.artifact_name, arm.artifact_version)
            if not path.is_dir():
                raise SettingsError(f"CAIRN_EXPERIMENT: arm {arm.name!r}: no artifact {arm.artifact} in {str(settings.artifacts)!r}")
            try:
                verify_artifact(path)
            except ArtifactError as exc:
                raise SettingsError(f"CAIRN_EXPERIMENT: arm {arm.name!r}: artifact {arm.artifact} cannot be served: {exc}") from exc
    else:
        choice = resolve_choice(settings)
        try:
            verify_artifact(artifact_path(settings, choice.name, choice.version))
        except ArtifactError as exc:
            raise SettingsError(f"artifact {choice.tag} cannot be served: {exc}") from exc
    if settings.events_kind == "folder":
        from service.events.sinks import check_folder

        check_folder(Path(settings.events))
    for name, path in (("--tls-certfile", settings.tls_certfile), ("--tls-keyfile", settings.tls_keyfile)):
        if path is not None and not path.is_file():
            raise SettingsError(f"{name} {str(path)!r}: no such file")
    if settings.tls_certfile is not None:
        import ssl

        try:
            ssl.create_default_context(ssl.Purpose.CLIENT_AUTH).load_cert_chain(settings.tls_certfile, settings.tls_keyfile)
        except (ssl.SSLError, OSError) as exc:
            raise SettingsError(f"--tls-certfile/--tls-keyfile: not a certificate and its key ({exc.__class__.__name__})") from exc
    open_store(settings)  # parses the store URL; connects nothing
    with socket.socket(socket.AF_INET6 if ":" in settings.host else socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # as uvicorn binds
        try:
            probe.bind((settings.host, settings.port))
        except OSError as exc:
            raise SettingsError(f"--port {settings.port} on {settings.host}: cannot listen ({exc.strerror})") from exc


def run(args: argparse.Namespace) -> int:
    import uvicorn

    settings = settings_from_args(args)
    configure_logging(settings.log_level)  # before the preflight, whose warnings are worth their time stamp
    preflight(settings)
    options = {
        "host": settings.host,
        "port": settings.port,
        "loop": "uvloop" if importlib.util.find_spec("uvloop") else "asyncio",
        "http": "httptools",
        "lifespan": "on",
        "log_config": None,  # uvicorn's loggers go to the root handler configured above
        "log_level": settings.log_level,
        "access_log": settings.access_log,
        "server_header": False,
        "timeout_graceful_shutdown": 5,
        "limit_concurrency": settings.max_connections,  # connections and tasks per worker; more get a 503
    }
    if settings.tls_certfile is not None:
        options["ssl_certfile"] = str(settings.tls_certfile)
        options["ssl_keyfile"] = str(settings.tls_keyfile)
    if settings.workers == 1:
        from service.api.app import create_app

        uvicorn.run(create_app(settings), **options)
    else:
        export_environment(settings)  # spawned workers rebuild the same settings from it
        # The workers keep their metrics in files of this folder, so that one scrape of any worker
        # reports the whole service (prometheus-client's multi-process mode reads this variable).
        with tempfile.TemporaryDirectory(prefix="cairn-metrics-") as folder:
            os.environ["PROMETHEUS_MULTIPROC_DIR"] = folder
            uvicorn.run("service.api.app:app_from_environment", factory=True, workers=settings.workers, **options)
    return 0
