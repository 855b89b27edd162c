"""Bridges from image vectors into the text space, for cross-modal scoring without CLIP.

Four estimators share one shape: ``fit(image, text)`` on (image, description) pairs,
``transform(image)`` puts image inputs into the shared space and
``transform_text(text)`` puts text vectors there (the identity when the shared space
*is* the text space).

- :class:`ConSEBridge` — ConSE (Norouzi et al., "Zero-Shot Learning by Convex
  Combination of Semantic Embeddings", ICLR 2014): an image becomes the convex
  combination of the text vectors of its top-``T`` ImageNet class names, weighted by
  the classifier's probabilities renormalized over those ``T``. Its image input is the
  1,000 class probabilities; it needs no pairs.
- :class:`CCABridge` — canonical correlation analysis (scikit-learn's ``CCA``) fitted on
  the catalog's own pairs; both sides go to the canonical space.
- :class:`RidgeBridge` — ridge regression (scikit-learn's ``Ridge``) from image features
  to text vectors, fitted on the catalog's own pairs.
- :class:`ContrastiveBridge` — linear heads on both sides trained on the catalog's own
  pairs with the symmetric InfoNCE loss of CLIP (both towers frozen).

:func:`bridge_recall` measures a bridge by text → image retrieval on held-out pairs.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from xrec.encoders._bridge_base import Bridge, paired_rows
from xrec.encoders._by_name import IMAGE_ENCODERS, TEXT_ENCODERS, make_image_encoder, make_text_encoder
from xrec.encoders._cca import CCABridge
from xrec.encoders._conse import ConSEBridge
from xrec.encoders._contrastive import ContrastiveBridge, symmetric_info_nce
from xrec.encoders._imagenet_probs import ImageNetProbsEncoder, class_name_vectors
from xrec.encoders._ridge_bridge import RidgeBridge
from xrec.errors import ConfigError, DataError

__all__ = [
    "BRIDGES",
    "IMAGE_ENCODERS",
    "TEXT_ENCODERS",
    "Bridge",
    "CCABridge",
    "ConSEBridge",
    "ContrastiveBridge",
    "ImageNetProbsEncoder",
    "RidgeBridge",
    "bridge_recall",
    "class_name_vectors",
    "make_bridge",
    "make_image_encoder",
    "make_text_encoder",
    "symmetric_info_nce",
]

BRIDGES: dict[str, type[Bridge]] = {
    "conse": ConSEBridge,
    "cca": CCABridge,
    "ridge": RidgeBridge,
    "contrastive": ContrastiveBridge,
}


def make_bridge(name: str, **settings: Any) -> Bridge:
    """A bridge by name (``"conse"``, ``"cca"``, ``"ridge"``, ``"contrastive"``) with its settings.

    Raises
    ------
    ConfigError
        For an unknown name or setting.
    """
    from xrec._settings import check_settings

    if name not in BRIDGES:
        raise ConfigError(f"bridge {name!r} is unknown; known: {sorted(BRIDGES)}")
    cls = BRIDGES[name]
    check_settings(cls, settings, f"bridge {name!r}")
    return cls(**settings)


# ---------------------------------------------------------------------------------------
# measurement
# ---------------------------------------------------------------------------------------


def _unit_rows(a: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(a, axis=1, keepdims=True)
    return np.divide(a, norms, out=np.zeros_like(a), where=norms > 0)


def bridge_recall(
    bridge: Bridge,
    image: np.ndarray,
    text: np.ndarray,
    *,
    k: int = 10,
    test_fraction: float = 0.3,
    seed: int = 0,
    center: bool = False,
) -> dict[str, float]:
    """Text → image retrieval recall@k of a bridge on held-out catalog pairs.

    A seeded ``test_fraction`` of the pairs is held out; the bridge is fitted on the
    rest (ConSE ignores them). Each held-out item's text vector is the query; the
    target is the same item's bridged image among all held-out items; its rank counts
    every other held-out image scoring at least as high (ties never favour the bridge).

    Parameters
    ----------
    bridge
        An unfitted bridge (it is fitted here).
    image
        ``(n, ·)`` the bridge's image input (``bridge.input``: probabilities or features).
    text
        ``(n, dim)`` text vectors of the same items.
    k
        Cut-off.
    test_fraction
        Share of pairs held out, in (0, 1).
    seed
        Seed of the held-out draw.
    center
        Subtract each side's mean over all given items before the cosine, as the content
        sources' ``center`` setting does with the catalog's mean (no pairing is used).

    Returns
    -------
    dict
        ``recall`` (share of held-out items whose own image is in the top ``k``),
        ``random`` (``k / n_test``, the expectation of a random ranking), ``lift``
        (``recall / random``), ``n_test``, ``n_train``.
    """
    x, y = paired_rows(image, text)
    if not 0.0 < test_fraction < 1.0:
        raise ConfigError(f"test_fraction must be in (0, 1), got {test_fraction!r}")
    n = len(x)
    rng = np.random.default_rng(seed)
    order = rng.permutation(n)
    n_test = max(1, int(round(test_fraction * n)))
    if n_test >= n:
        raise DataError(f"too few pairs ({n}) to hold out {test_fraction:.0%} and fit on the rest")
    test, train = np.sort(order[:n_test]), np.sort(order[n_test:])
    bridge.fit(x[train], y[train])
    queries = bridge.transform_text(y).astype(np.float64)
    targets = bridge.transform(x).astype(np.float64)
    if center:
        queries -= queries.mean(axis=0)
        targets -= targets.mean(axis=0)
    queries, targets = _unit_rows(queries[test]), _unit_rows(targets[test])
    sims = queries @ targets.T
    own = np.diag(sims)
    rank = (sims >= own[:, None]).sum(axis=1)  # 1 = best; counts the target itself
    recall = float(np.mean(rank <= k))
    random = min(1.0, k / n_test)
    return {"recall": recall, "random": random, "lift": recall / random, "n_test": n_test, "n_train": len(train)}
