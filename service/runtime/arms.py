"""An experiment's arms side by side: one `ActiveModel` per arm, each visit served by its arm's.

Each arm loads its own artifact (arms naming the same artifact still load it once each: a switch of
one arm never touches another). An arm is switched like the single model is (`PUT /v1/serving`
with `"arm"`, or `cairn switch --arm`): the new artifact is loaded and verified first, one that
fails leaves the arm as it was, and with Redis the arm's choice is shared under its own key
(`<prefix>active-model:arm:<experiment>:<arm>`), which every worker follows; a restarted worker
serves the arm's last switch, and a new experiment (another name) starts from its declaration. The arm a visit belongs to never
changes (service/events/experiment.py); only what serves the arm does.
"""

from __future__ import annotations

from collections.abc import Callable

from service.config import Settings
from service.errors import CairnError, SettingsError
from service.events.experiment import Experiment
from service.runtime.active import ActiveModel, ModelChoice, ModelWrapper
from service.store.base import SessionStore


class Arms:
    def __init__(
        self,
        experiment: Experiment,
        settings: Settings,
        store: SessionStore,
        wrap_model: ModelWrapper | None = None,
        on_replaced: Callable[[str, str], None] | None = None,
    ) -> None:
        """`on_replaced(tag, arm)` hears of each arm's new artifact (the arm's guard starts afresh)."""
        self.experiment = experiment

        def replaced(arm: str) -> Callable[[str], None] | None:
            return None if on_replaced is None else lambda tag: on_replaced(tag, arm)

        self.models: dict[str, ActiveModel] = {
            arm.name: ActiveModel(settings, store, wrap_model=wrap_model, on_replaced=replaced(arm.name), slot=f"arm:{experiment.name}:{arm.name}")
            for arm in experiment.arms
        }
        self._by_name = {arm.name: arm for arm in experiment.arms}

    def for_session(self, session_id: str) -> tuple[ActiveModel, str]:
        arm = self.experiment.assign(session_id)
        return self.models[arm.name], arm.name

    def model(self, arm: str) -> ActiveModel:
        try:
            return self.models[arm]
        except KeyError:
            raise SettingsError(f"arm {arm!r}: the experiment's arms are {', '.join(self.models)}") from None

    async def open(self, shared: Callable[[str], object]) -> None:
        """Load every arm: the choice shared for it in the store (`shared(slot)` -> ModelChoice | None) if
        it loads, else the declared one."""
        for name, active in self.models.items():
            arm = self._by_name[name]
            declared = ModelChoice(arm.artifact_name, arm.artifact_version, arm.recommender)
            choice = await shared(active.slot)  # type: ignore[misc]
            try:
                await active.open(choice or declared)
            except CairnError:
                if choice is None or choice == declared:
                    raise
                await active.open(declared)

    async def follow(self) -> None:
        import asyncio

        await asyncio.gather(*(active.follow() for active in self.models.values()))

    async def close(self) -> None:
        for active in self.models.values():
            await active.close()
