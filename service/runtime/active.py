"""The model a process serves, and switching it at run time without dropping a request.

A `LoadedModel` is one artifact made ready: its id map, the popularity and neighbour recommenders,
and the GRU on one ONNX Runtime session behind the step batcher. `ActiveModel` holds the choice
(artifact name, version, which recommender answers) and the model loaded for it. A switch loads
and verifies the new artifact off the event loop first; an artifact that fails leaves the old one
serving. Requests take the pair once at their start, so a switch never mixes two models within
one answer; the old model is closed after the longest request budget has passed.

With a shared store (Redis) the choice is kept in the store too, and a background task reads it
every `model_poll_s`, so every worker and replica follows a switch made through any of them.

`wrap_model` (tests and benchmarks only) wraps each loaded GRU recommender in a class of the
caller's, to make the model slow or failing without patching anything; `on_replaced` hears of
every new artifact that starts serving (the model's circuit breaker starts afresh).
"""

from __future__ import annotations

import asyncio
import dataclasses
import gc
import json
import logging
import os
import socket
import time
from collections.abc import Awaitable, Callable, Collection
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from service.artifacts.format import Artifact, list_artifacts, load_artifact
from service.config import ARTIFACT_PART, RECOMMENDERS, Settings
from service.errors import ArtifactError, CairnError, ModelNotReadyError, SettingsError, StepError, StoreError
from service.runtime.batching import StepBatcher
from service.artifacts.item_clusters import ClusterFit, cluster_fit, load_item_clusters
from service.artifacts.item_vectors import PACKED, REDUCED_FROM, load_item_vectors
from service.runtime.clustered_step import ClusteredStep
from service.runtime.onnx_step import OnnxStep
from service.runtime.reduced_step import ReducedStep
from service.runtime.recommenders import GruRecommender, NeighbourRecommender, PopularityRecommender, Recommender
from service.runtime.session_knn import SessionKnnRecommender
from service.store.base import SessionStore

log = logging.getLogger("cairn.service")
WORKER = f"{socket.gethostname()}:{os.getpid()}"  # how this process names itself in the serving reports

RETIRE_AFTER_S = 11.0  # longest request budget (10 s) and a margin: no request still uses the old model
RETRY_REFUSED_S = 30.0  # a shared choice this process could not load is tried again after this long

ModelWrapper = Callable[[Recommender], Recommender]
Step = OnnxStep | ReducedStep | ClusteredStep  # one GRU step, whichever path scores it


@dataclass(frozen=True)
class ModelChoice:
    name: str
    version: str
    recommender: str  # gru | neighbours | popularity | session-knn
    # When a switch chose this (epoch seconds); 0.0 for the choice a worker was configured with. Of
    # two choices the one switched to last wins, so workers agree whatever order they learn them in.
    switched_at: float = field(default=0.0, compare=False)

    @property
    def tag(self) -> str:
        return f"{self.name}/{self.version}"

    def to_bytes(self) -> bytes:
        fields = {"name": self.name, "version": self.version, "recommender": self.recommender, "switched_at": self.switched_at}
        return json.dumps(fields).encode()

    def supersedes(self, other: ModelChoice) -> bool:
        """Whether this choice wins over `other`: switched to later (ties broken by name, for a total order)."""
        return (self.switched_at, self.tag, self.recommender) > (other.switched_at, other.tag, other.recommender)

    @classmethod
    def from_bytes(cls, raw: bytes) -> ModelChoice:
        try:
            data = json.loads(raw)
            choice = cls(str(data["name"]), str(data["version"]), str(data["recommender"]), float(data.get("switched_at", 0.0)))
        except (ValueError, KeyError, TypeError) as exc:
            raise StoreError(f"the stored active-model choice is unreadable ({type(exc).__name__})") from exc
        if choice.recommender not in RECOMMENDERS:
            raise StoreError(f"the stored active-model choice names recommender {choice.recommender!r}")
        return choice


class LoadedModel:
    """One artifact ready to serve. Build with `load_model` (blocking), then `start` on the event loop."""

    def __init__(self, artifact: Artifact, step: Step, max_batch: int) -> None:
        if step.n_items != artifact.n_items:
            raise ArtifactError(f"{artifact.path}: step graph scores {step.n_items} items, the id map has {artifact.n_items}")
        self.artifact = artifact
        self.tag = f"{artifact.name}/{artifact.version}"
        self.scoring: str = getattr(step, "scoring", "exact")  # exact | fp16 | int8 | int4 | int4+int8 | clustered: which path scores the GRU's answers
        self.small_batch_rows: int = getattr(step, "small_up_to", 0)  # int4+int8: passes of up to this many clicks read int4
        self.item_index = artifact.item_index
        self.item_ids = artifact.item_ids  # index -> id
        self.popularity = PopularityRecommender(artifact.popularity)
        self.neighbours = NeighbourRecommender(artifact.neighbour_items, artifact.neighbour_scores, self.popularity)
        self.exclude_seen = artifact.exclude_seen  # the default for requests that do not say
        self.session_knn: SessionKnnRecommender | None = None
        if artifact.session_index is not None:
            params = artifact.session_knn
            self.session_knn = SessionKnnRecommender(artifact.session_index, self.popularity, params["neighbours"], params["weighting"])
        self.batcher = StepBatcher(step, max_batch=max_batch)
        self._gru = GruRecommender(self.batcher)
        self.gru: Recommender = self._gru  # what the click path calls; `wrap` may put a test double around it

    def wrap(self, wrapper: ModelWrapper) -> None:
        self.gru = wrapper(self._gru)

    def hidden_from_bytes(self, raw: bytes | None) -> np.ndarray | None:
        """A stored hidden state, or None when it is missing or of another shape."""
        return self._gru.hidden_from_bytes(raw)

    def start(self) -> None:
        self.batcher.start()

    async def close(self) -> None:
        await self.batcher.close()
        self.batcher.step.close()  # this model's ONNX Runtime session is freed on shutdown or retirement

    def index_of(self, item_id: str) -> int:
        """Index of an item id in this model's vocabulary, -1 when the model does not know it."""
        return self.item_index.get(item_id, -1)

    def known_indices(self, item_ids: tuple[str, ...]) -> list[int]:
        """Indices of the known ids among `item_ids`, in order."""
        index = self.item_index
        return [i for i in (index.get(x, -1) for x in item_ids) if i >= 0]

    def ids_of(self, indices: list[int]) -> list[str]:
        ids = self.item_ids
        return [ids[i] for i in indices]


SMALL_AND_SHARED = "int4+int8"  # the path of two packed tables: int4 for batches of few rows, int8 for larger ones


def scoring_path(
    setting: str, n_items: int, precisions: Collection[str] | None, clusters: ClusterFit | None = None, packed: Collection[str] = PACKED
) -> str:
    """What answers: `setting` when the artifact can do it, else exact (logged by the caller;
    int4+int8 falls back to whichever of the two the artifact has packed).
    `precisions`: the reduced precisions whose tables the artifact holds (fp16, int8, int4), None
    when it has no item-vector files at all; `clusters`: what the export measured for the
    artifact's clustered index, None without one; `packed`: the precisions whose graph packs its
    table (int8 only in exports since it does; see service/artifacts/item_vectors.PACKED)."""
    if precisions is None:
        return "exact"
    if setting == "auto":
        if n_items < REDUCED_FROM:
            return "exact"
        if clusters is not None and clusters.served_by_auto:  # its rule: service/artifacts/item_clusters.py
            return "clustered"
        # Both packed tables where the export wrote both (int4 for lone clicks, int8 for shared
        # passes); else packed int8 before int4: as fast for one click on some CPUs and faster for a
        # shared pass on all (README, Large catalogues); an int8 table fed to its graph (older
        # exports) only where there is no int4.
        if {"int4", "int8"} <= set(precisions) & set(packed):
            return SMALL_AND_SHARED
        order = ("int8", "int4") if "int8" in packed else ("int4", "int8")
        return next((p for p in order if p in precisions), "exact")
    if setting == SMALL_AND_SHARED and not {"int4", "int8"} <= set(precisions) & set(packed):
        # The one of the two the artifact has packed, else exact.
        return next((p for p in ("int8", "int4") if p in precisions and p in packed), "exact")
    if setting in ("fp16", "int8", "int4") and setting not in precisions:
        return "exact"
    if setting == "clustered" and clusters is None:
        return "exact"
    return setting


def open_step(artifact: Artifact, scoring: str, threads: int = 1, probe: int = 0) -> Step:
    """The GRU step of a verified artifact for a scoring setting (exact | fp16 | int8 | int4 |
    int4+int8 | clustered | auto; see `scoring_path`): the exact step graph, or for the other paths the feature graph over
    memory-mapped item tables (the exact graph with its private copy of the tables is then not
    opened). `probe` > 0 overrides the clustered index's probe count (`auto` judges by the export's)."""
    tables = load_item_vectors(artifact.path, artifact.manifest, artifact.n_items)
    fit = cluster_fit(artifact.manifest, artifact.n_items) if tables is not None else None
    path_name = scoring_path(scoring, artifact.n_items, None if tables is None else set(tables.codes), fit, tables.packed if tables is not None else ())
    if path_name != scoring and scoring != "auto":
        log.warning(
            "%s has no files for CAIRN_SCORING=%s (not exported with them: `cairn export --precisions`, `--clustered-index`): scoring %s",
            artifact.path,
            scoring,
            "exactly" if path_name == "exact" else f"with {path_name}",
        )
    if path_name == "exact" or tables is None:
        return OnnxStep(artifact.step_graph, threads=threads)
    if path_name == "clustered":
        # The index's arrays are opened only for the path that reads them.
        clusters = load_item_clusters(artifact.path, artifact.manifest, artifact.n_items, probe)
        if clusters is None:  # cannot happen: scoring_path chose clustered from the index's fit
            raise ArtifactError(f"{artifact.path}: no clustered index to open")
        return ClusteredStep(tables, clusters, threads=threads)
    if path_name == SMALL_AND_SHARED:
        return ReducedStep(tables, "int8", threads=threads, small="int4")
    return ReducedStep(tables, path_name, threads=threads)


def load_model(path: Path, ort_threads: int, max_batch: int, scoring: str = "exact", probe: int = 0) -> LoadedModel:
    """Verify and load an artifact and open its step (`open_step`). Blocking: run it off the event loop."""
    artifact = load_artifact(path)
    step = open_step(artifact, scoring, ort_threads, probe)
    # One step now: a graph that cannot run fails the load, and the first visitor does not pay
    # ONNX Runtime's first-call set-up.
    try:
        step.run(np.zeros(1, dtype=np.int64), step.zero_hidden(1), 1)
    except StepError as exc:
        raise ArtifactError(f"{path}: the step graph does not run ({exc})") from exc
    return LoadedModel(artifact, step, max_batch)


def resolve_choice(settings: Settings) -> ModelChoice:
    """The artifact the settings name, with the defaults filled in; SettingsError when there is none."""
    return resolve_choices(settings)[0]


def resolve_choices(settings: Settings) -> list[ModelChoice]:
    """What to serve, best first: the version the settings name, or else the name's versions that
    verify, newest (created last) first, so that start-up can fall back past one that fails to
    load. A newer version that does not verify is skipped with a loud warning. SettingsError when
    nothing can be served."""
    store = settings.artifacts
    listings = list_artifacts(store)  # within a name, by creation time: newest last
    if not listings:
        raise SettingsError(f"CAIRN_ARTIFACTS={str(store)!r}: no artifacts there (write one with `cairn export`)")
    names = sorted({a.name for a in listings})
    name = settings.artifact_name
    if name is None:
        if len(names) > 1:
            raise SettingsError(f"CAIRN_ARTIFACT_NAME is unset and {str(store)!r} holds {len(names)} names ({', '.join(names)}); set it")
        name = names[0]
    versions = [a for a in listings if a.name == name]
    if not versions:
        raise SettingsError(f"CAIRN_ARTIFACT_NAME={name!r}: not in {str(store)!r} (names: {', '.join(names)})")
    if settings.artifact_version is not None:
        if settings.artifact_version not in {a.version for a in versions}:
            listed = ", ".join(a.version for a in versions)
            raise SettingsError(f"CAIRN_ARTIFACT_VERSION={settings.artifact_version!r}: {name!r} has no such version (versions: {listed})")
        return [ModelChoice(name, settings.artifact_version, settings.recommender)]
    good = [a for a in versions if a.problem is None]
    if not good:
        problems = "; ".join(f"{a.version}: {a.problem}" for a in versions)
        raise SettingsError(f"no version of {name!r} verifies ({problems})")
    for broken in versions[versions.index(good[-1]) + 1 :]:
        log.warning("NOT serving the newest artifact %s/%s: %s; falling back to an older version", name, broken.version, broken.problem)
    return [ModelChoice(name, a.version, settings.recommender) for a in reversed(good)]


def _check_can_serve(model: LoadedModel, choice: ModelChoice) -> None:
    if choice.recommender == "session-knn" and model.session_knn is None:
        raise ArtifactError(f"{choice.tag} has no session index, so it cannot serve session-knn (export it again with this cairn)")


def artifact_path(settings: Settings, name: str, version: str) -> Path:
    return Path(settings.artifacts) / name / version


class ActiveModel:
    """The (model, choice) pair a process serves; `switch` changes it, `follow` tracks the shared choice."""

    def __init__(
        self,
        settings: Settings,
        store: SessionStore,
        wrap_model: ModelWrapper | None = None,
        on_replaced: Callable[[str], None] | None = None,
        slot: str = "",
    ) -> None:
        self.settings = settings
        self.store = store
        self.slot = slot  # an experiment arm's name: its choice is shared under its own key
        self._wrap_model = wrap_model
        self._on_replaced = on_replaced
        self._follow_failing = False  # the last poll of the shared choice failed (logged once, not every poll)
        self._current: tuple[LoadedModel, ModelChoice] | None = None
        self._lock = asyncio.Lock()
        self._retiring: set[asyncio.Task] = set()
        self._retired: list[LoadedModel] = []
        self._refused: tuple[bytes, float] | None = None  # shared choice that failed here, and when; not retried every poll
        # What loading each artifact ("name/version") here came to: None loaded, else the problem.
        # The listing reports it: loading (tables, step graph) checks more than the checksums.
        self.load_results: dict[str, str | None] = {}

    @property
    def current(self) -> tuple[LoadedModel, ModelChoice]:
        if self._current is None:
            raise ModelNotReadyError("no artifact loaded yet")
        return self._current

    @property
    def ready(self) -> bool:
        return self._current is not None

    async def open(self, choice: ModelChoice) -> None:
        await self._install(choice)

    async def switch(self, choice: ModelChoice, publish: bool = True) -> None:
        """Serve `choice` from now on; ArtifactError (the old model keeps serving) when it cannot be loaded.

        With `publish`, the choice is written to the store after the artifact loaded and before it
        serves here, so a choice that other workers follow is always one that loads.
        """
        before_swap: Callable[[], Awaitable[None]] | None = None
        if publish:
            choice = dataclasses.replace(choice, switched_at=time.time())

            async def publish_choice() -> None:
                await self.store.save_active_model(choice.to_bytes(), self.slot)

            before_swap = publish_choice
        await self._install(choice, before_swap)
        if publish:
            self._refused = None

    async def _install(self, choice: ModelChoice, before_swap: Callable[[], Awaitable[None]] | None = None) -> None:
        if choice.recommender not in RECOMMENDERS:
            raise SettingsError(f"recommender {choice.recommender!r}: use one of {', '.join(RECOMMENDERS)}")
        for part in (choice.name, choice.version):
            if not ARTIFACT_PART.fullmatch(part):  # also keeps a stored choice from naming a path outside the store
                raise ArtifactError(f"artifact name or version {part!r}: use 1-64 letters, digits, '.', '_' or '-'")
        async with self._lock:
            old = self._current
            if old is not None and old[0].tag == choice.tag:
                _check_can_serve(old[0], choice)
                if before_swap is not None:
                    await before_swap()
                self._current = (old[0], choice)  # same artifact (another recommender, or none): nothing to load
            else:
                path = artifact_path(self.settings, choice.name, choice.version)
                if not path.is_dir():
                    raise ArtifactError(f"no artifact {choice.tag} in {str(self.settings.artifacts)!r}")
                try:
                    model = await asyncio.to_thread(
                        load_model, path, self.settings.ort_threads, self.settings.max_batch, self.settings.scoring, self.settings.probe_clusters
                    )
                except ArtifactError as exc:
                    self.load_results[choice.tag] = str(exc)
                    raise
                self.load_results[choice.tag] = None
                if self._wrap_model is not None:
                    model.wrap(self._wrap_model)
                try:
                    _check_can_serve(model, choice)
                except ArtifactError:
                    await model.close()
                    raise
                model.start()
                if before_swap is not None:
                    try:
                        await before_swap()
                    except BaseException:
                        await model.close()
                        raise
                self._current = (model, choice)
                if old is not None:
                    self._retire(old[0])
                if self._on_replaced is not None:
                    self._on_replaced(model.tag)
                # The model's id map and tables are a few hundred thousand long-lived objects; the
                # cyclic GC would walk them all in every full collection (tens of ms, the latency
                # tail). Freezing moves them out of its sight; reference counting still frees them.
                gc.freeze()
        if old is None or old[1] != choice:
            log.info("serving %s with %s", choice.tag, choice.recommender)

    def _retire(self, model: LoadedModel) -> None:
        async def later() -> None:
            await asyncio.sleep(RETIRE_AFTER_S)
            await model.close()
            self._retired.remove(model)

        self._retired.append(model)
        task = asyncio.get_running_loop().create_task(later())
        self._retiring.add(task)
        task.add_done_callback(self._retiring.discard)

    async def adopt_shared(self) -> None:
        """One poll of `follow`: agree with the shared choice, or put ours back when it is newer or gone.

        The newest switch wins everywhere: a worker serving an older choice adopts the shared one; a
        worker whose choice is newer than the stored one (the store lost it, say a Redis restarted
        without persistence, and a restarted worker wrote its configured choice) writes its own back.
        Then it reports what it serves, for the listing."""
        raw = await self.store.load_active_model(self.slot)
        mine = self._current[1] if self._current is not None else None
        now = asyncio.get_running_loop().time()
        if raw is None:
            if mine is not None:
                await self.store.save_active_model(mine.to_bytes(), self.slot)
        elif not (self._refused is not None and self._refused[0] == raw and now < self._refused[1] + RETRY_REFUSED_S):
            choice = ModelChoice.from_bytes(raw)
            if mine is not None and mine.supersedes(choice):
                await self.store.save_active_model(mine.to_bytes(), self.slot)
            elif mine is None or mine != choice or mine.switched_at != choice.switched_at:
                try:
                    await self._install(choice)
                except CairnError as exc:
                    self._refused = (raw, now)
                    log.error("cannot follow the shared model choice %s: %s", choice.tag, exc)
        await self.report()

    async def report(self) -> None:
        """Tell the store what this worker serves (GET /v1/artifacts lists every worker's report)."""
        if self._current is None:
            return
        choice = self._current[1]
        value = {"artifact": choice.tag, "recommender": choice.recommender, "switched_at": choice.switched_at, "seen_at": time.time()}
        await self.store.report_serving(WORKER + (f"/{self.slot}" if self.slot else ""), json.dumps(value).encode())

    async def follow(self) -> None:
        """Poll the shared choice until cancelled; store trouble is logged (once per outage) and retried at the next poll."""
        while True:
            await asyncio.sleep(self.settings.model_poll_s)
            try:
                await self.adopt_shared()
            except StoreError as exc:
                if not self._follow_failing:
                    log.warning("reading the shared model choice failed, retrying every %g s: %s", self.settings.model_poll_s, exc)
                self._follow_failing = True
                continue
            if self._follow_failing:
                log.info("reading the shared model choice works again")
                self._follow_failing = False

    async def close(self) -> None:
        for task in list(self._retiring):
            task.cancel()
        for model in list(self._retired):
            await model.close()
        self._retired.clear()
        if self._current is not None:
            await self._current[0].close()
            self._current = None
        gc.unfreeze()  # what `_install` froze can be collected again (a test process outlives many apps)
