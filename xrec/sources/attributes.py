"""Attribute similarity: a user's profile of attribute vectors against every item."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Self

from xrec.encoders.attributes import AttributeEncoder
from xrec.fold import Fold
from xrec.sources._profiles import check_half_life, l2_normalize, user_profiles
from xrec.sources.base import LowRankSource


class AttributeSource(LowRankSource):
    """Cosine between a user's attribute profile and each item's attribute vector.

    Item vectors are :class:`~xrec.encoders.attributes.AttributeEncoder` rows, L2-normalized.
    A user's profile is the (optionally recency-weighted) mean of the vectors of their
    training items, L2-normalized; users without training rows get a zero profile.

    Parameters
    ----------
    columns
        Attribute columns to use; ``None`` uses every attribute column of the catalog schema.
    numeric_bins
        Quantile bins for numeric columns (one-hot) instead of robust-scaled values.
    half_life_days
        Weight of a training interaction halves every ``half_life_days`` days before the
        user's latest training interaction; ``None`` weights all equally.
    block_weights
        Per-column multipliers passed to the encoder.

    Attributes
    ----------
    encoder_
        The fitted :class:`AttributeEncoder`.
    user_factors_
        ``(n_users, n_features)`` normalized profiles.
    item_factors_
        ``(n_items, n_features)`` normalized item vectors.
    """

    kind = "attributes"

    def __init__(
        self,
        columns: Sequence[str] | None = None,
        numeric_bins: int | None = None,
        half_life_days: float | None = None,
        block_weights: Mapping[str, float] | None = None,
    ) -> None:
        self.columns = columns
        self.numeric_bins = numeric_bins
        self.half_life_days = half_life_days
        self.block_weights = block_weights

    def fit(self, fold: Fold) -> Self:
        """Encode the catalog and build user profiles from ``fold.train``; returns ``self``."""
        check_half_life(self.kind, self.half_life_days)
        self.encoder_ = AttributeEncoder(
            columns=self.columns,
            numeric_bins=self.numeric_bins,
            block_weights=self.block_weights,
        ).fit(fold.catalog)
        self.item_factors_ = l2_normalize(self.encoder_.transform(fold.catalog))
        # the same (recency-weighted) profile mean as the content sources
        self.user_factors_ = user_profiles(fold, self.item_factors_, self.half_life_days)
        self.fitted_ = True
        return self
