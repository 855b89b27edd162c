"""A catalog and its interactions, checked against each other."""

from __future__ import annotations

from dataclasses import dataclass

from xrec.data.catalog import Catalog
from xrec.data.interactions import Interactions
from xrec.errors import DataError


@dataclass(frozen=True)
class Dataset:
    """Catalog + interactions; every interaction names a catalog item.

    Parameters
    ----------
    catalog
        The items.
    interactions
        The events; every item they name must be in ``catalog`` (else :class:`DataError`).
    name
        Short label used in reports and blend files.
    """

    catalog: Catalog
    interactions: Interactions
    name: str = "dataset"

    def __post_init__(self) -> None:
        unknown = ~self.interactions.frame["item"].isin(set(self.catalog.item_ids))
        if unknown.any():
            bad = self.interactions.frame.loc[unknown, "item"].unique()
            count = int(unknown.sum())
            what = "interaction names an item" if count == 1 else "interactions name items"
            raise DataError(f"{count} {what} missing from the catalog, first: {list(bad[:5])}")

    def fingerprint(self) -> str:
        """Identifies the data a blend was chosen on: interactions hash + catalog hash."""
        return f"{self.interactions.fingerprint()}-{self.catalog.fingerprint()}"
