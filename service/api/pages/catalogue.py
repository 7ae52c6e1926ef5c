"""What the shop page lists: the active artifact's items, most clicked first, with their names.

Names come from the artifact's optional item_names.json (`cairn export --names`, which `make demo`
fills from the demo's catalogue.csv); an item without one is shown by its id. Built once per
loaded artifact, when the page is first asked for, never on the click path.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.artifacts.format import Artifact

GRID_ITEMS = 60  # items on the shop page at once: a catalogue page's worth (common practice)


@dataclass(frozen=True)
class ShopItem:
    item_id: str
    name: str  # the display name, or "" when the artifact has none for this item


class ShopCatalogue:
    def __init__(self, artifact: Artifact) -> None:
        self.tag = f"{artifact.name}/{artifact.version}"
        self.names = artifact.item_names
        order = np.argsort(-artifact.popularity, kind="stable")  # most clicked in training first
        self.items = [ShopItem(artifact.item_ids[i], artifact.item_names.get(artifact.item_ids[i], "")) for i in order]
        self._haystack = [f"{it.item_id}\n{it.name}".casefold() for it in self.items]

    def page(self, query: str = "", limit: int = GRID_ITEMS) -> list[ShopItem]:
        """The most clicked items whose id or name holds `query` (any case); all of them for ""."""
        needle = query.strip().casefold()
        if not needle:
            return self.items[:limit]
        out = []
        for item, text in zip(self.items, self._haystack):
            if needle in text:
                out.append(item)
                if len(out) == limit:
                    break
        return out


class CatalogueCache:
    """The catalogue of the artifact serving now; rebuilt when another artifact is loaded."""

    def __init__(self) -> None:
        self._artifact: Artifact | None = None
        self._catalogue: ShopCatalogue | None = None

    def of(self, artifact: Artifact) -> ShopCatalogue:
        if self._artifact is not artifact or self._catalogue is None:
            self._catalogue, self._artifact = ShopCatalogue(artifact), artifact
        return self._catalogue
