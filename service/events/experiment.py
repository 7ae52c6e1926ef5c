"""An experiment: visits split between arms by a keyed hash of the session id.

Declared in a small TOML or JSON file (CAIRN_EXPERIMENT):

    name = "gru-vs-markov"
    salt = "spring-2027"          # the hash key: a new salt reshuffles visits between arms
    [[arms]]
    name = "gru"
    artifact = "garden-gru/demo"  # name/version in the artifacts folder
    recommender = "gru"           # gru | neighbours | popularity
    share = 0.5

A visit's arm: u = the first 8 bytes of HMAC-SHA256(salt, session id) as an unsigned integer over
2^64, uniform on [0, 1); the arm is the first whose cumulative share exceeds u. No state: every
worker and replica, before and after a restart, puts a visit in the same arm. The raw session id
is hashed (not its pseudonym), so the arm does not depend on CAIRN_EVENTS_KEY.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from service.config import ARTIFACT_PART, RECOMMENDERS
from service.errors import ExperimentError

ARM_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_-]{0,31}")
SHARE_TOLERANCE = 1e-6


@dataclass(frozen=True)
class Arm:
    name: str
    artifact_name: str
    artifact_version: str
    recommender: str
    share: float

    @property
    def artifact(self) -> str:
        return f"{self.artifact_name}/{self.artifact_version}"


@dataclass(frozen=True)
class Experiment:
    name: str
    salt: str
    arms: tuple[Arm, ...]

    def __post_init__(self) -> None:
        bounds, total = [], 0.0
        for arm in self.arms:
            total += arm.share
            bounds.append(total)
        object.__setattr__(self, "_bounds", tuple(bounds))
        object.__setattr__(self, "_key", self.salt.encode())

    def position(self, session_id: str) -> float:
        """The visit's uniform draw in [0, 1) (HMAC-SHA256, RFC 2104, keyed by the salt)."""
        digest = hmac.new(self._key, session_id.encode(), hashlib.sha256).digest()  # type: ignore[attr-defined]
        return int.from_bytes(digest[:8], "big") / 2.0**64

    def assign(self, session_id: str) -> Arm:
        u = self.position(session_id)
        for arm, bound in zip(self.arms, self._bounds):  # type: ignore[attr-defined]
            if u < bound:
                return arm
        return self.arms[-1]  # float rounding of the cumulative shares

    def shares(self) -> dict[str, float]:
        return {a.name: a.share for a in self.arms}

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "arms": [{"name": a.name, "artifact": a.artifact, "recommender": a.recommender, "share": a.share} for a in self.arms],
        }  # the salt stays out: with it, anyone could tell which arm a session id gets


def load_experiment(path: Path) -> Experiment:
    """Read and check a declaration; ExperimentError names the file, the field and the value."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ExperimentError(f"{path}: cannot read the experiment ({getattr(exc, 'strerror', None) or exc})") from None
    try:
        data = json.loads(text) if path.suffix.lower() == ".json" else tomllib.loads(text)
    except (ValueError, tomllib.TOMLDecodeError) as exc:
        raise ExperimentError(f"{path}: not valid {'JSON' if path.suffix.lower() == '.json' else 'TOML'} ({exc})") from None
    return parse_experiment(data, str(path))


def parse_experiment(data: Any, where: str = "experiment") -> Experiment:
    if not isinstance(data, dict):
        raise ExperimentError(f"{where}: expected a table with name, salt and arms")
    unknown = sorted(set(data) - {"name", "salt", "arms"})
    if unknown:
        raise ExperimentError(f"{where}: unknown field {unknown[0]!r} (fields: name, salt, arms)")
    name, salt, arms = data.get("name"), data.get("salt"), data.get("arms")
    if not isinstance(name, str) or not ARM_NAME.fullmatch(name):
        raise ExperimentError(f"{where}: name={name!r}: use 1-32 letters, digits, '_' or '-'")
    if not isinstance(salt, str) or len(salt) < 8:
        raise ExperimentError(f"{where}: salt={salt!r}: use a string of at least 8 characters")
    if not isinstance(arms, list) or len(arms) < 2:
        raise ExperimentError(f"{where}: arms: declare at least two arms")
    parsed = [_arm(a, f"{where}: arms[{i}]") for i, a in enumerate(arms)]
    names = [a.name for a in parsed]
    if len(set(names)) != len(names):
        raise ExperimentError(f"{where}: arms: arm names must differ ({', '.join(names)})")
    total = sum(a.share for a in parsed)
    if abs(total - 1.0) > SHARE_TOLERANCE:
        raise ExperimentError(f"{where}: arms: the shares add up to {total:g}, not 1")
    return Experiment(name, salt, tuple(parsed))


def _arm(data: Any, where: str) -> Arm:
    if not isinstance(data, dict):
        raise ExperimentError(f"{where}: expected a table with name, artifact, recommender and share")
    unknown = sorted(set(data) - {"name", "artifact", "recommender", "share"})
    if unknown:
        raise ExperimentError(f"{where}: unknown field {unknown[0]!r} (fields: name, artifact, recommender, share)")
    name = data.get("name")
    if not isinstance(name, str) or not ARM_NAME.fullmatch(name):
        raise ExperimentError(f"{where}: name={name!r}: use 1-32 letters, digits, '_' or '-'")
    artifact = data.get("artifact")
    parts = artifact.split("/") if isinstance(artifact, str) else []
    if len(parts) != 2 or not all(ARTIFACT_PART.fullmatch(p) for p in parts):
        raise ExperimentError(f"{where}: artifact={artifact!r}: use NAME/VERSION as in the artifacts folder")
    recommender = data.get("recommender", "gru")
    if recommender not in RECOMMENDERS:
        raise ExperimentError(f"{where}: recommender={recommender!r}: use one of {', '.join(RECOMMENDERS)}")
    share = data.get("share")
    if isinstance(share, bool) or not isinstance(share, (int, float)) or not 0 < share <= 1:
        raise ExperimentError(f"{where}: share={share!r}: use a number above 0 and at most 1")
    return Arm(name, parts[0], parts[1], recommender, float(share))
