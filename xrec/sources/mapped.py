"""Content → collaborative mapping: new items placed in the ALS factor space by their content.

Kind ``"mapped_factors"`` (:class:`MappedFactorsSource`). Collaborative factors cannot see an
item nobody has bought; content can. Following Gantner, Drumond, Freudenthaler, Rendle &
Schmidt-Thieme, "Learning Attribute-to-Feature Mappings for Cold-Start Recommendations"
(ICDM 2010), the source fits ALS on the training rows, learns a map from each item's content
vector to its ALS item factor on the *known* items (those with training interactions), and
gives every *new* item (no training interaction) the factor its content maps to. Known items
keep their own factors, and the users' ALS factors score both, so the source is low-rank.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any, ClassVar, Self

import numpy as np
import pandas as pd

from xrec._validation import check_int, check_number
from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources._factor_map import FactorMap, choose_map
from xrec.sources.base import LowRankSource, make_source
from xrec.sources.early_fusion import FUSION_MODALITIES

__all__ = ["MAPPINGS", "MappedFactorsSource", "choose_new_item_scale"]

#: Accepted ``mapping`` settings; ``"auto"`` picks ridge or k-NN on the held-aside known items.
MAPPINGS = ("ridge", "knn", "auto")


class MappedFactorsSource(LowRankSource):
    """ALS factors for known items, content-mapped factors for new items, one user factor for both.

    Parameters
    ----------
    modalities
        Content the map reads: any of ``"attributes"``, ``"text"``, ``"image"`` and the names in
        ``vectors``; each modality's item vectors are L2-normalized and concatenated (as in
        ``early_fusion``), so one map can read, say, your own vectors beside the text.
    vectors
        Your own item vectors as extra modalities: name -> a vector file path, or a table of
        :func:`~xrec.sources.vectors.read_item_vectors` options, e.g.
        ``modalities = ["attributes", "mine"]`` with ``vectors = { mine = "mine.parquet" }``
        (the ``vectors`` kind's file layouts). Paths are relative to the spec file in a spec.
    mapping
        ``"ridge"`` (linear map, ridge penalty chosen from ``alphas``), ``"knn"`` (similarity-
        weighted mean of the factors of the most content-similar known items, count chosen from
        ``neighbors``) or ``"auto"`` (both; the lower validation error wins).
    alphas
        Ridge penalties to try.
    neighbors
        Neighbour counts to try.
    validation_share
        Share of the known items held aside (seeded) to choose the mapping and its setting;
        the error is the mean squared error of the users' scores of those items,
        ``(f − f̂)ᵀ (UᵀU / n) (f − f̂)``. The chosen map is then refitted on every known item.
    min_count
        Fewest training interactions of a known item used to learn the map (its factor is
        better determined); every item with training interactions keeps its own factor.
    als
        Settings of the ALS fit (see the ``als`` kind), e.g. ``{"factors": 48}``.
    text_columns, text_encoder, image_encoder, image_crop, cache_dir, progress
        Content encoding, as for ``early_fusion``.
    seed
        Seed of the validation draw.
    new_item_scale
        Multiplier of the mapped factors. A map shrinks towards the mean factor, so mapped
        items score lower than known items of the same appeal; where known and new items
        compete in one ranking, a scale above 1 lets new items in. Choose it on a mixed
        validation split with :func:`choose_new_item_scale`; 1 is the plain map of the paper.

    Attributes
    ----------
    user_factors_, item_factors_
        ALS user factors; item factors with new items' rows mapped from content.
    new_items_
        Indices of the items that got mapped factors (no training interaction).
    map_
        The chosen map (method, setting).
    validation_
        One row per candidate mapping: ``method``, ``setting``, ``validation_error``.
    """

    kind = "mapped_factors"
    path_settings: ClassVar[tuple[str, ...]] = ("vectors",)

    def __init__(
        self,
        modalities: Sequence[str] = ("attributes", "text"),
        mapping: str = "auto",
        alphas: Sequence[float] = (0.01, 0.1, 1.0, 10.0, 100.0),
        neighbors: Sequence[int] = (5, 10, 20, 50),
        validation_share: float = 0.2,
        min_count: int = 1,
        als: Mapping[str, Any] | None = None,
        text_columns: Sequence[str] | None = None,
        text_encoder: str = "minilm",
        image_encoder: str = "efficientnet_lite0",
        image_crop: float = 1.0,
        cache_dir: str | None = None,
        progress: bool = False,
        seed: int = 0,
        new_item_scale: float = 1.0,
        vectors: Mapping[str, Any] | None = None,
    ) -> None:
        self.modalities = modalities
        self.mapping = mapping
        self.alphas = alphas
        self.neighbors = neighbors
        self.validation_share = validation_share
        self.min_count = min_count
        self.als = als
        self.text_columns = text_columns
        self.text_encoder = text_encoder
        self.image_encoder = image_encoder
        self.image_crop = image_crop
        self.cache_dir = cache_dir
        self.progress = progress
        self.seed = seed
        self.new_item_scale = new_item_scale
        self.vectors = vectors

    def _check(self) -> tuple[list[str], list[float], list[int]]:
        where = "mapped_factors setting"
        mods = [self.modalities] if isinstance(self.modalities, str) else list(self.modalities)
        if self.vectors is not None and not isinstance(self.vectors, Mapping):
            raise ConfigError(f"{where} 'vectors': a table of name = vector file, got {self.vectors!r}")
        known = [*FUSION_MODALITIES, *(self.vectors or {})]
        if not mods or any(m not in known for m in mods) or len(set(mods)) != len(mods):
            raise ConfigError(f"{where} 'modalities' must list distinct names among {known}, got {self.modalities!r}")
        if self.mapping not in MAPPINGS:
            raise ConfigError(f"{where} 'mapping' must be one of {list(MAPPINGS)}, got {self.mapping!r}")
        alphas = [check_number(a, f"{where} 'alphas'", low=0, low_open=True, expected="positive numbers") for a in self.alphas]
        neighbors = [check_int(k, f"{where} 'neighbors'", low=1, expected="integers >= 1") for k in self.neighbors]
        if (self.mapping in ("ridge", "auto") and not alphas) or (self.mapping in ("knn", "auto") and not neighbors):
            raise ConfigError(f"{where} 'alphas' / 'neighbors': give at least one value for mapping={self.mapping!r}")
        check_number(self.validation_share, f"{where} 'validation_share'", low=0, high=1, low_open=True, high_open=True,
                     expected="a number strictly between 0 and 1")
        check_int(self.min_count, f"{where} 'min_count'", low=1, expected="an integer >= 1")
        check_int(self.seed, f"{where} 'seed'", low=0)
        check_number(self.new_item_scale, f"{where} 'new_item_scale'", low=0, low_open=True, expected="a positive number")
        if self.als is not None and not isinstance(self.als, Mapping):
            raise ConfigError(f"{where} 'als' must be a table of ALS settings, got {type(self.als).__name__}")
        return mods, alphas, neighbors

    def content_vectors(self, fold: Fold) -> np.ndarray:
        """The concatenated, per-modality L2-normalized content vector of every item."""
        mods, _, _ = self._check()
        fused = make_source(
            "early_fusion", modalities=mods, text_columns=self.text_columns, text_encoder=self.text_encoder,
            image_encoder=self.image_encoder, image_crop=self.image_crop, cache_dir=self.cache_dir, progress=self.progress,
            vectors={m: v for m, v in (self.vectors or {}).items() if m in mods} or None,
        )  # fmt: skip
        return fused.fit(fold).item_factors_ * np.float32(np.sqrt(len(mods)))  # undo the fused row's 1/sqrt(m) norm

    def fit(self, fold: Fold) -> Self:
        """Fit ALS on ``fold.train``, learn the map on known items, map the new ones; returns ``self``."""
        _, alphas, neighbors = self._check()
        als = make_source("als", **{"progress": self.progress, **dict(self.als or {})}).fit(fold)
        content = self.content_vectors(fold)
        counts = fold.item_train_counts
        learn_on = np.flatnonzero(counts >= int(self.min_count))
        if len(learn_on) < 3:
            raise ConfigError(f"mapped_factors: only {len(learn_on)} items have >= min_count={self.min_count} training rows; need 3")
        methods = ["ridge", "knn"] if self.mapping == "auto" else [self.mapping]
        self.map_, rows = choose_map(
            content[learn_on], als.item_factors_[learn_on], als.user_factors_, methods=methods, alphas=alphas,
            neighbors=neighbors, validation_share=float(self.validation_share), seed=int(self.seed),
        )  # fmt: skip
        self.validation_ = pd.DataFrame(rows)
        self.new_items_ = np.flatnonzero(counts == 0)
        self.known_factors_ = np.array(als.item_factors_, dtype=np.float32, copy=True)
        self.mapped_factors_ = self.map_.predict(content[self.new_items_]) if len(self.new_items_) else np.zeros((0, als.item_factors_.shape[1]), np.float32)
        self.user_factors_ = als.user_factors_
        self.item_factors_ = self._placed(float(self.new_item_scale))
        self.fitted_ = True
        return self

    def _placed(self, scale: float) -> np.ndarray:
        out = self.known_factors_.copy()
        out[self.new_items_] = self.mapped_factors_ * np.float32(scale)
        return np.ascontiguousarray(out)

    def with_new_item_scale(self, scale: float) -> MappedFactorsSource:
        """A fitted copy with another ``new_item_scale`` (no refit; shares the learned arrays)."""
        self._check_fitted()
        check_number(scale, "new_item_scale", low=0, low_open=True, expected="a positive number")
        other = type(self)(**{**self.get_params(), "new_item_scale": float(scale)})
        for name in ("map_", "validation_", "new_items_", "known_factors_", "mapped_factors_", "user_factors_", "fitted_"):
            setattr(other, name, getattr(self, name))
        other.item_factors_ = other._placed(float(scale))
        return other

    @property
    def chosen(self) -> dict[str, Any]:
        """The chosen mapping: ``{"method": ..., "setting": ...}``."""
        self._check_fitted()
        m: FactorMap = self.map_
        return {"method": m.method, "setting": m.setting}


def choose_new_item_scale(
    source: MappedFactorsSource,
    validation_fold: Fold,
    scales: Sequence[float] = (1.0, 1.5, 2.0, 3.0, 4.0),
    *,
    metric: str = "ndcg@10",
    objective: str = "overall",
) -> tuple[float, pd.DataFrame]:
    """The ``new_item_scale`` with the best ``metric`` on a (mixed) validation fold.

    Parameters
    ----------
    source
        A :class:`MappedFactorsSource` fitted on ``validation_fold`` (its training rows).
    validation_fold
        A validation fold holding known and new items, e.g. from ``split_dataset(...,
        "mixed_last")``; the scale only matters where new items compete with known ones.
    scales
        Candidates (each > 0); ties go to the first listed.
    metric
        ``"name@k"`` of a per-user metric, full ranking.
    objective
        ``"overall"``: the metric's mean over every validation user. ``"sides"``: the
        validation users are split into those holding out a new item (no training
        interaction) and the others, and a scale is judged by its worse side relative to the
        best any candidate scale reaches on that side, ``min_s m_s(scale) / max_c m_s(c)``
        (the maximin of :mod:`xrec.blend._sides`, here over one setting): a scale that
        shuts new items out, or one that pushes them over every known item, scores low.

    Returns
    -------
    (float, pandas.DataFrame)
        The chosen scale and one row per candidate (``scale``, ``metric``, ``value``, and
        for ``"sides"`` also ``known``, ``new``, ``objective``).
    """
    from xrec._validation import check_fitted, parse_metric_column
    from xrec.evaluate import evaluate

    if objective not in ("overall", "sides"):
        raise ConfigError(f"objective: unknown {objective!r}; choose one of ['overall', 'sides']")
    name, k = parse_metric_column(metric)
    col = f"{name}@{k}"
    check_fitted(source, how="fit the source on the validation fold first")
    held = validation_fold.heldout
    is_new = validation_fold.item_train_counts[held["item_idx"].to_numpy()] == 0
    new_side = pd.Series(is_new).groupby(held["user_idx"].to_numpy()).any()
    rows = []
    for scale in scales:
        card = evaluate(source.with_new_item_scale(scale), validation_fold, ks=(k,), metrics=(name,))
        per_user = card.per_user.set_index("user")[col]
        side = new_side.reindex(per_user.index).fillna(False).to_numpy(dtype=bool)
        rows.append({"scale": float(scale), "metric": metric, "value": float(per_user.mean()),
                     "known": float(per_user[~side].mean()) if (~side).any() else float("nan"),
                     "new": float(per_user[side].mean()) if side.any() else float("nan")})
    table = pd.DataFrame(rows)
    if objective == "sides":
        best = table[["known", "new"]].max()
        if not (best > 0).all():
            raise ConfigError(f"objective 'sides': no candidate scale scores above 0 on side(s) {list(best.index[~(best > 0)])}")
        table["objective"] = (table[["known", "new"]] / best).min(axis=1)
        return float(table.loc[table["objective"].idxmax(), "scale"]), table
    return float(table.loc[table["value"].idxmax(), "scale"]), table.drop(columns=["known", "new"])
