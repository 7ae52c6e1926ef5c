"""docker/: what can be checked without a container engine. The compose file parses and names
existing paths and services; the Dockerfile is the serving one (non-root, health check, no extras);
nginx balances over the replicas the compose file defines.

No YAML library is in the test environment, so the compose file is read by the small loader below,
which accepts only the subset of YAML 1.2 the file uses (block mappings and sequences, flow
sequences of scalars, plain and quoted scalars, comments) and refuses anything else, so a file
outside the subset fails the test instead of being misread.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parents[2]
DOCKER = ROOT / "docker"


# --- a loader for the YAML subset ----------------------------------------------------------------


class YamlSubsetError(ValueError):
    pass


def _strip_comment(line: str) -> str:
    """The line without a comment; '#' starts one at the line's start or after a space, outside quotes
    (YAML 1.2.2, 6.6 Comments)."""
    quote = None
    for i, ch in enumerate(line):
        if quote:
            if ch == quote and (quote == "'" or line[i - 1] != "\\"):
                quote = None
        elif ch in "\"'" and (i == 0 or line[i - 1] in " [,:-"):
            quote = ch
        elif ch == "#" and (i == 0 or line[i - 1] in " \t"):
            return line[:i].rstrip()
    return line.rstrip()


def _scalar(text: str) -> Any:
    text = text.strip()
    if text.startswith('"'):
        return json.loads(text)  # YAML's double-quoted escapes include JSON's (YAML 1.2.2, 7.3.1)
    if text.startswith("'"):
        if not text.endswith("'") or len(text) < 2:
            raise YamlSubsetError(f"unclosed quote: {text}")
        return text[1:-1].replace("''", "'")  # the only escape in single quotes (7.3.2)
    if text.startswith("["):
        if not text.endswith("]"):
            raise YamlSubsetError(f"flow sequence must close on its line: {text}")
        inner = text[1:-1].strip()
        return [_scalar(part) for part in _split_flow(inner)] if inner else []
    if text[:1] in "{&*!|>%@`":
        raise YamlSubsetError(f"outside the subset: {text}")
    return text


def _split_flow(inner: str) -> list[str]:
    parts, quote, start = [], None, 0
    for i, ch in enumerate(inner):
        if quote:
            if ch == quote and (quote == "'" or inner[i - 1] != "\\"):
                quote = None
        elif ch in "\"'":
            quote = ch
        elif ch in "[]{}":
            raise YamlSubsetError(f"nested flow collections are outside the subset: [{inner}]")
        elif ch == ",":
            parts.append(inner[start:i])
            start = i + 1
    parts.append(inner[start:])
    return parts


def _split_key(content: str) -> tuple[str, str] | None:
    """(key, rest) when `content` is a mapping entry 'key: rest' or 'key:'."""
    m = re.match(r'^("(?:[^"\\]|\\.)*"|\'[^\']*\'|[^\s"\'#][^:#]*?)\s*:(?:\s+(.*))?$', content)
    if not m:
        return None
    key = m.group(1)
    return (_scalar(key) if key[0] in "\"'" else key), (m.group(2) or "")


def load_yaml_subset(text: str) -> Any:
    lines: list[list[Any]] = []
    for raw in text.splitlines():
        if "\t" in raw[: len(raw) - len(raw.lstrip())]:
            raise YamlSubsetError("tabs in indentation")  # YAML 1.2.2, 6.1: indentation is spaces only
        line = _strip_comment(raw)
        if line.strip():
            lines.append([len(line) - len(line.lstrip(" ")), line.strip()])
    if not lines:
        return None
    value, i = _block(lines, 0, lines[0][0])
    if i != len(lines):
        raise YamlSubsetError(f"unexpected indentation at: {lines[i][1]}")
    return value


def _block(lines: list[list[Any]], i: int, indent: int) -> tuple[Any, int]:
    if lines[i][1] == "-" or lines[i][1].startswith("- "):
        return _sequence(lines, i, indent)
    return _mapping(lines, i, indent)


def _sequence(lines: list[list[Any]], i: int, indent: int) -> tuple[list[Any], int]:
    out: list[Any] = []
    while i < len(lines) and lines[i][0] == indent and (lines[i][1] == "-" or lines[i][1].startswith("- ")):
        rest = lines[i][1][1:].lstrip()
        if not rest:
            if i + 1 >= len(lines) or lines[i + 1][0] <= indent:
                raise YamlSubsetError("empty sequence entry")
            value, i = _block(lines, i + 1, lines[i + 1][0])
        elif _split_key(rest) is not None and not rest.startswith(("'", '"', "[")):
            # A compact mapping inside an entry ("- key: value"), indented where its key starts (8.2.1).
            lines[i] = [indent + len(lines[i][1]) - len(rest), rest]
            value, i = _mapping(lines, i, lines[i][0])
        else:
            value, i = _scalar(rest), i + 1
        out.append(value)
    return out, i


def _mapping(lines: list[list[Any]], i: int, indent: int) -> tuple[dict[str, Any], int]:
    out: dict[str, Any] = {}
    while i < len(lines) and lines[i][0] == indent:
        entry = _split_key(lines[i][1])
        if entry is None:
            raise YamlSubsetError(f"expected 'key: value' at: {lines[i][1]}")
        key, rest = entry
        if key in out:
            raise YamlSubsetError(f"duplicate key {key!r}")  # keys are unique (YAML 1.2.2, 3.2.1.1)
        if rest:
            out[key], i = _scalar(rest), i + 1
        elif i + 1 < len(lines) and lines[i + 1][0] > indent:
            out[key], i = _block(lines, i + 1, lines[i + 1][0])
        elif i + 1 < len(lines) and lines[i + 1][0] == indent and lines[i + 1][1].startswith("- "):
            out[key], i = _sequence(lines, i + 1, indent)  # "key:" then "- x" at the key's own indent
        else:
            out[key], i = None, i + 1
    return out, i


def test_the_loader_reads_the_subset_as_the_yaml_spec_says() -> None:
    # A worked example of our own, read by the rules of YAML 1.2.2: 8.2.1 block sequences (with a
    # compact nested mapping), 8.2.2 block mappings, 7.4.1 flow sequences, 7.3 quoted scalars
    # (a '' inside single quotes is one quote), 6.6 comments, and a sequence at its key's indent.
    text = """\
shop: garden   # a comment
tools:
  - rake
  - name: hoe
    sizes: [small, "large", '']
  - "trowel # not a comment"
quote: 'it''s'
empty:
plain: a:b:c
same-indent:
- one
- two
"""
    assert load_yaml_subset(text) == {
        "shop": "garden",
        "tools": ["rake", {"name": "hoe", "sizes": ["small", "large", ""]}, "trowel # not a comment"],
        "quote": "it's",
        "empty": None,
        "plain": "a:b:c",
        "same-indent": ["one", "two"],
    }
    for bad in ("a: {b: 1}\n", "a: 1\na: 2\n", "a:\n  b: 1\n c: 2\n", "a: &x 1\n"):
        with pytest.raises(YamlSubsetError):
            load_yaml_subset(bad)


# --- the compose file -------------------------------------------------------------------------


@pytest.fixture(scope="module")
def compose() -> dict[str, Any]:
    return load_yaml_subset((DOCKER / "compose.yaml").read_text(encoding="utf-8"))


def _api_services(compose: dict[str, Any], profile: str | None) -> list[str]:
    return sorted(
        name
        for name, svc in compose["services"].items()
        if "build" in svc and (svc.get("profiles") == ([profile] if profile else None))
    )


def test_compose_has_redis_two_replicas_and_a_balancer(compose: dict[str, Any]) -> None:
    services = compose["services"]
    default = {name for name, svc in services.items() if "profiles" not in svc}
    assert default == {"redis", "api-1", "api-2", "lb"}
    assert _api_services(compose, None) == ["api-1", "api-2"]
    for name in ("api-1", "api-2"):
        env = services[name]["environment"]
        assert env["CAIRN_SESSION_STORE"] == "redis://redis:6379/0"  # both replicas share the one Redis service
        assert {"redis": {"condition": "service_healthy"}} == services[name]["depends_on"]
    assert services["redis"]["healthcheck"]["test"][:2] == ["CMD", "redis-cli"]
    # The replicas' CAIRN_* settings are ones the service accepts (its own settings object).
    from service.config import Settings

    for name in ("api-1", "api-2"):
        fields = {k.removeprefix("CAIRN_").lower(): v for k, v in services[name]["environment"].items()}
        settings = Settings(**fields)
        # One worker each: nginx hashes a visit onto one replica, so its clicks reach one worker and
        # that worker's recent-writes cache saves the Redis read.
        assert settings.workers == 1 and settings.store_kind == "redis" and settings.state_cache_entries > 0
    assert set(services["lb"]["depends_on"]) == {"api-1", "api-2"}


def test_cluster_profile_adds_a_redis_cluster_and_its_own_replicas(compose: dict[str, Any]) -> None:
    services = compose["services"]
    cluster = {name for name, svc in services.items() if svc.get("profiles") == ["cluster"]}
    nodes = sorted(n for n in cluster if n.startswith("redis-node-"))
    assert len(nodes) >= 3  # a Redis Cluster needs at least three masters (Redis cluster tutorial, from memory)
    assert _api_services(compose, "cluster") == ["api-cluster-1", "api-cluster-2"]
    assert {"redis-cluster-init", "lb-cluster"} <= cluster
    subnet = compose["networks"]["cluster"]["ipam"]["config"][0]["subnet"]
    prefix = subnet.rsplit(".", 1)[0] + "."
    init = " ".join(services["redis-cluster-init"]["command"])
    for n in nodes:
        cmd = services[n]["command"]
        assert cmd[cmd.index("--cluster-enabled") + 1] == "yes"
        ip = services[n]["networks"]["cluster"]["ipv4_address"]
        port = cmd[cmd.index("--port") + 1]
        assert ip.startswith(prefix) and cmd[cmd.index("--cluster-announce-ip") + 1] == ip
        assert f"{ip}:{port}" in init  # the init job joins every node
        assert n in services["redis-cluster-init"]["depends_on"]
        # The surviving masters keep their slots when one is down (redis.conf, cluster-require-full-coverage).
        assert cmd[cmd.index("--cluster-require-full-coverage") + 1] == "no"
    # The cluster replicas name every node with the redis-cluster:// scheme, as the service accepts it.
    from service.config import Settings, cluster_nodes

    addresses = sorted(
        (services[n]["networks"]["cluster"]["ipv4_address"], int(services[n]["command"][services[n]["command"].index("--port") + 1]))
        for n in nodes
    )
    for name in ("api-cluster-1", "api-cluster-2"):
        env = services[name]["environment"]
        assert env["CAIRN_SESSION_STORE"].startswith("redis-cluster://")
        assert sorted(cluster_nodes(env["CAIRN_SESSION_STORE"])[0]) == addresses
        settings = Settings(**{k.removeprefix("CAIRN_").lower(): v for k, v in env.items()})
        assert settings.store_kind == "redis-cluster" and settings.workers == 1


def test_compose_names_paths_that_exist(compose: dict[str, Any]) -> None:
    for name, svc in compose["services"].items():
        if "build" in svc:
            context = (DOCKER / svc["build"]["context"]).resolve()
            assert context == ROOT, name
            assert (context / svc["build"]["dockerfile"]).is_file(), name
        for volume in svc.get("volumes", []):
            source, target = volume.split(":")[:2]
            if source.startswith("."):
                host = (DOCKER / source).resolve()
                assert host.exists(), f"{name}: {source}"
                if target.endswith(".conf"):
                    assert host.is_file(), f"{name}: {source}"


@pytest.mark.parametrize("lb, profile", [("lb", None), ("lb-cluster", "cluster")])
def test_nginx_balances_over_exactly_the_profile_replicas(compose: dict[str, Any], lb: str, profile: str | None) -> None:
    svc = compose["services"][lb]
    [conf_volume] = [v for v in svc["volumes"] if v.endswith("/etc/nginx/nginx.conf:ro")]
    conf = (DOCKER / conf_volume.split(":")[0]).read_text(encoding="utf-8")
    upstream = re.search(r"upstream\s+(\w+)\s*\{([^}]*)\}", conf)
    assert upstream, "no upstream block"
    servers = re.findall(r"^\s*server\s+([\w.-]+):(\d+)", upstream.group(2), flags=re.M)
    replicas = _api_services(compose, profile)
    assert sorted(host for host, _ in servers) == replicas
    image_port = re.search(r"CAIRN_PORT=(\d+)", (DOCKER / "Dockerfile").read_text(encoding="utf-8")).group(1)
    assert {port for _, port in servers} == {image_port}
    assert f"proxy_pass http://{upstream.group(1)};" in conf
    # Each visit onto one replica: a consistent hash of the session id taken from the path. The map's
    # pattern is PCRE (nginx docs: map, regular expressions); this one reads the same in Python's re.
    assert re.search(r"^\s*hash\s+\$cairn_visit\s+consistent;", upstream.group(2), flags=re.M)
    [(pattern, value)] = re.findall(r"map\s+\$uri\s+\$cairn_visit\s*\{\s*~(\S+)\s+\$(\w+);", conf)
    for path in ("/v1/sessions/visit-1/clicks", "/v1/sessions/visit-1/recommendations", "/v1/sessions/visit-1"):
        assert re.match(pattern.replace("(?<", "(?P<"), path).group(value) == "visit-1", path
    listen = re.search(r"^\s*listen\s+(\d+);", conf, flags=re.M).group(1)
    [published] = svc["ports"]
    assert published.endswith(f":{listen}")
    assert published.startswith("127.0.0.1:")  # published on loopback only


# --- the Dockerfile ---------------------------------------------------------------------------


def _instructions(path: Path) -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) with backslash continuations joined (Dockerfile reference)."""
    out, pending = [], ""
    for raw in path.read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if not pending and (not line or line.startswith("#")):
            continue
        if line.endswith("\\"):
            pending += line[:-1] + " "
            continue
        line, pending = pending + line, ""
        word, _, rest = line.partition(" ")
        out.append((word.upper(), rest.strip()))
    return out


def test_dockerfile_is_the_serving_image() -> None:
    steps = _instructions(DOCKER / "Dockerfile")
    final = max(i for i, (word, _) in enumerate(steps) if word == "FROM")
    runtime = steps[final:]  # the image that ships: the last stage
    users = [arg for word, arg in runtime if word == "USER"]
    assert users and users[-1].split(":")[0] not in ("root", "0")
    [health] = [arg for word, arg in runtime if word == "HEALTHCHECK"]
    assert "/healthz" in health
    [entry] = [arg for word, arg in runtime if word == "ENTRYPOINT"]
    assert json.loads(entry) == ["cairn", "serve"]
    installs = [arg for word, arg in steps if word == "RUN" and "pip install" in arg]
    assert any("-r docker/requirements-serve.txt" in arg for arg in installs)
    assert any("--no-deps ." in arg for arg in installs)
    assert not any("[" in arg.split("pip install", 1)[1].split("&&")[0] for arg in installs)  # no extras
    copied = [arg for word, arg in steps if word == "COPY" and "--from" not in arg]
    for arg in copied:
        for source in arg.split()[:-1]:
            assert (ROOT / source).exists(), source
