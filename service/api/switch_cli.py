"""`cairn switch`: choose what a running service serves (or roll back), without a hand-written curl.

    cairn switch NAME/VERSION [--recommender gru|neighbours|popularity|session-knn] [--arm ARM] [--url http://127.0.0.1:8000]

It calls the admin route `PUT /v1/serving` with the bearer token from CAIRN_ADMIN_TOKEN (read through
the settings object, like every other setting). The default URL is the one `cairn serve` listens on
with the same settings (CAIRN_HOST, CAIRN_PORT). The service's own answer is printed: what serves
now, or why it refused (404 unknown artifact, 409 failed verification, 401/403 token).
"""

from __future__ import annotations

import argparse
import json
import urllib.error
import urllib.request
from urllib.parse import urlsplit

from service.config import RECOMMENDERS, load_settings
from service.errors import CairnError, SettingsError

TIMEOUT_S = 30.0  # a switch loads and verifies the artifact before it answers


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("artifact", metavar="NAME/VERSION", help="the artifact to serve, as listed by `cairn artifacts`")
    parser.add_argument("--recommender", choices=RECOMMENDERS, help="which recommender answers (default: the one serving now)")
    parser.add_argument("--arm", help="while an experiment runs: the arm to switch")
    parser.add_argument("--url", help="the service's base URL (default: http://CAIRN_HOST:CAIRN_PORT)")


def run(args: argparse.Namespace) -> int:
    name, slash, version = args.artifact.partition("/")
    if not slash or not name or not version or "/" in version:
        raise CairnError(f"NAME/VERSION {args.artifact!r}: give the artifact as name/version, e.g. garden-gru/demo")
    settings = load_settings()
    if settings.admin_token is None:
        raise SettingsError("CAIRN_ADMIN_TOKEN is not set: the switch needs the service's admin token")
    url = (args.url or f"http://{settings.host}:{settings.port}").rstrip("/")
    parts = urlsplit(url)
    if parts.scheme not in ("http", "https") or not parts.hostname or parts.path not in ("", "/"):
        raise CairnError(f"--url {args.url!r}: give the service's base URL, such as http://127.0.0.1:8000")
    body = {"name": name, "version": version}
    if args.recommender is not None:
        body["recommender"] = args.recommender
    if args.arm is not None:
        body["arm"] = args.arm
    request = urllib.request.Request(
        f"{url}/v1/serving",
        data=json.dumps(body).encode(),
        method="PUT",
        headers={"Content-Type": "application/json", "Authorization": f"Bearer {settings.admin_token.get_secret_value()}"},
    )
    try:
        with urllib.request.urlopen(request, timeout=TIMEOUT_S) as resp:
            answer = json.loads(resp.read())
    except urllib.error.HTTPError as exc:
        try:
            message = json.loads(exc.read()).get("message", exc.reason)
        except (ValueError, AttributeError):
            message = exc.reason
        raise CairnError(f"the service refused ({exc.code}): {message}") from None
    except (urllib.error.URLError, OSError) as exc:
        reason = getattr(exc, "reason", exc)
        raise CairnError(f"--url {url}: no answer ({reason})") from None
    arm = f" in arm {answer['arm']}" if answer.get("arm") else ""
    print(f"now serving {answer['artifact']} with {answer['recommender']}{arm}")
    return 0
