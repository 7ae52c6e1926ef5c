"""The prepared data set: what `cairn prepare` writes and every offline step reads.

A split is stored column-wise: every click of every session, concatenated in session order and
time order within a session, plus offsets into that array (session s owns
``items[offsets[s]:offsets[s + 1]]``). Sessions are ordered by their start time, which is the
order session-parallel training needs. Item indices are dense 0..n_items-1; ``item_ids[i]`` is
the original id (as a string) of index i.

On disk, a folder:
    train.npz, valid.npz, test.npz   arrays items (int32), offsets (int64), times (int64, epoch s)
    item_ids.json                    list of original item ids, index order
    prepare_report.json              what each step removed (written by the ingest)
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from service.errors import InputDataError

SPLITS = ("train", "valid", "test")


@dataclass(frozen=True)
class SessionSplit:
    items: np.ndarray  # int32 [n_clicks]
    offsets: np.ndarray  # int64 [n_sessions + 1], offsets[0] == 0, offsets[-1] == n_clicks
    times: np.ndarray  # int64 [n_clicks], epoch seconds

    @property
    def n_sessions(self) -> int:
        return len(self.offsets) - 1

    @property
    def n_clicks(self) -> int:
        return int(self.offsets[-1])

    def lengths(self) -> np.ndarray:
        return np.diff(self.offsets)

    def session(self, s: int) -> np.ndarray:
        return self.items[self.offsets[s] : self.offsets[s + 1]]

    def sessions(self) -> list[np.ndarray]:
        return [self.session(s) for s in range(self.n_sessions)]

    def subset(self, sessions: np.ndarray) -> "SessionSplit":
        """The split of these sessions (indices into this split), in the order given."""
        sessions = np.asarray(sessions, dtype=np.int64)
        lengths = self.lengths()[sessions]
        offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
        clicks = np.concatenate([np.arange(self.offsets[s], self.offsets[s + 1]) for s in sessions.tolist()]) if len(sessions) else np.zeros(0, np.int64)
        return SessionSplit(items=self.items[clicks], offsets=offsets, times=self.times[clicks])

    def sample(self, sessions: int, seed: int) -> "SessionSplit":
        """At most `sessions` of the sessions that have a next click to predict (0: all of them),
        drawn without replacement from `seed` and kept in their order in the split; this split
        itself when that is every session."""
        usable = np.flatnonzero(self.lengths() >= 2)
        if 0 < sessions < len(usable):
            usable = np.sort(np.random.default_rng(seed).choice(usable, size=sessions, replace=False))
        return self if len(usable) == self.n_sessions else self.subset(usable)

    @staticmethod
    def from_sessions(sessions: list[list[int]] | list[np.ndarray], times: list[list[int]] | None = None) -> "SessionSplit":
        """Build a split from Python lists (tests and small tools)."""
        lengths = np.array([len(s) for s in sessions], dtype=np.int64)
        offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
        items = np.concatenate([np.asarray(s, dtype=np.int32) for s in sessions]) if sessions else np.zeros(0, np.int32)
        if times is None:
            t = np.arange(len(items), dtype=np.int64)
        else:
            t = np.concatenate([np.asarray(x, dtype=np.int64) for x in times]) if times else np.zeros(0, np.int64)
        return SessionSplit(items=items.astype(np.int32), offsets=offsets, times=t)


@dataclass(frozen=True)
class PreparedData:
    train: SessionSplit
    valid: SessionSplit
    test: SessionSplit
    item_ids: list[str]

    @property
    def n_items(self) -> int:
        return len(self.item_ids)

    def split(self, name: str) -> SessionSplit:
        return {"train": self.train, "valid": self.valid, "test": self.test}[name]

    def fingerprint(self) -> str:
        """SHA-256 over the training clicks and the item map: names the data an artifact came from."""
        h = hashlib.sha256()
        h.update(np.ascontiguousarray(self.train.items).tobytes())
        h.update(np.ascontiguousarray(self.train.offsets).tobytes())
        h.update("\n".join(self.item_ids).encode("utf-8"))
        return h.hexdigest()

    def save(self, folder: Path) -> None:
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        for name in SPLITS:
            s = self.split(name)
            np.savez(folder / f"{name}.npz", items=s.items, offsets=s.offsets, times=s.times)
        (folder / "item_ids.json").write_text(json.dumps(self.item_ids), encoding="utf-8")

    @staticmethod
    def load(folder: Path) -> "PreparedData":
        folder = Path(folder)
        if not folder.is_dir():
            raise InputDataError(f"{folder}: no prepared data set here (run `cairn prepare` first)")
        splits = {}
        for name in SPLITS:
            path = folder / f"{name}.npz"
            if not path.exists():
                raise InputDataError(f"{path}: missing; {folder} is not a complete prepared data set")
            with np.load(path) as z:
                splits[name] = SessionSplit(
                    items=z["items"].astype(np.int32), offsets=z["offsets"].astype(np.int64), times=z["times"].astype(np.int64)
                )
        ids_path = folder / "item_ids.json"
        if not ids_path.exists():
            raise InputDataError(f"{ids_path}: missing; {folder} is not a complete prepared data set")
        item_ids = json.loads(ids_path.read_text(encoding="utf-8"))
        return PreparedData(train=splits["train"], valid=splits["valid"], test=splits["test"], item_ids=item_ids)
