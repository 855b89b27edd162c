"""A shared space learnt from the catalog's own pairs with a symmetric contrastive loss.

Two linear heads — one on frozen image features, one on frozen text vectors — are
trained so that each item's image and description land close together and away from
the other items' (the symmetric InfoNCE objective of CLIP, Radford et al., "Learning
Transferable Visual Models From Natural Language Supervision", ICML 2021; here both
towers are locked, as the image tower is in LiT, Zhai et al., CVPR 2022). The head
weights are cached on disk (safetensors) under a hash of the pairs and the settings.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any, Self

import numpy as np

from xrec._files import write_bytes_atomic
from xrec._validation import check_choice, check_int, check_number
from xrec.encoders._bridge_base import Bridge, as_matrix, paired_rows
from xrec.errors import ConfigError, DataError

__all__ = ["ContrastiveBridge", "symmetric_info_nce"]

# bump when the training changes, so that cached heads of the old training are not reused
_VERSION = 2
_STATE = ("x_mean_", "y_mean_", "x_axes_", "image_head_", "text_head_")


def symmetric_info_nce(a: Any, b: Any, temperature: float) -> Any:
    """Symmetric InfoNCE loss of paired rows ``a[i]`` ↔ ``b[i]`` (torch tensors).

    Rows are scaled to unit length; ``s = a @ b.T / temperature``; the loss is the mean
    of the image→text and text→image cross-entropies with the diagonal as the target::

        L = ½ · mean_i [ logsumexp_j s_ij − s_ii ] + ½ · mean_j [ logsumexp_i s_ij − s_jj ]
    """
    import torch

    a = torch.nn.functional.normalize(a, dim=1)
    b = torch.nn.functional.normalize(b, dim=1)
    s = a @ b.T / temperature
    diag = torch.diagonal(s)
    rows = torch.logsumexp(s, dim=1) - diag
    cols = torch.logsumexp(s, dim=0) - diag
    return 0.5 * rows.mean() + 0.5 * cols.mean()


class ContrastiveBridge(Bridge):
    """Linear heads on frozen image features and text vectors, trained with symmetric InfoNCE.

    Both sides are centred on the training pairs' mean; the image side is optionally
    reduced to its top principal axes first. By default the image head is the ridge
    map into the text space and stays fixed, and only the text head (starting as the
    identity) is trained: with a few hundred pairs, training the large image head as
    well overfits within a few steps. The heads are trained full-batch with AdamW on a
    seeded share of the pairs; the rest (``val_fraction``) picks the step whose
    held-out loss is lowest (early stopping); then, with ``refit``, the heads are
    trained again from the start on every pair for that many steps, so no pair is
    left out of the final heads. Training is seeded and deterministic; the fitted
    heads are written to ``<cache>/bridges/`` as safetensors under a sha256 of the
    pairs and the settings, and a later fit on the same pairs reads them back.

    Parameters
    ----------
    init
        ``"ridge"``: the image head starts as the ridge map into the text space
        (scikit-learn's ``Ridge`` with ``alpha``) and the text head as the identity, so
        the loss fine-tunes the ridge bridge; ``"random"``: both heads start as seeded
        Gaussian matrices of width ``dim``.
    train_heads
        ``"text"``: only the text head is trained (the image head keeps the ridge map);
        ``"both"``: both heads are (required with ``init="random"``).
    dim
        Width of the shared space for ``init="random"`` (``"ridge"`` uses the text dimension).
    pca_components
        Image dimensions kept (principal axes of the training images) before the head;
        ``None`` keeps them all.
    temperature
        Softmax temperature of the loss (fixed).
    learning_rate, weight_decay
        AdamW's step size and decoupled weight decay.
    max_steps
        Full-batch steps at most.
    patience
        Stop after this many steps without a lower held-out loss.
    val_fraction
        Share of the pairs held out for early stopping, in (0, 0.5].
    refit
        After early stopping, train again on all pairs for the chosen number of steps
        (``False`` keeps the heads trained without the held-out share).
    alpha
        Ridge penalty of ``init="ridge"``.
    seed
        Seed of the held-out draw and of the random start.
    cache
        Read and write fitted heads in the cache folder.
    cache_dir
        Cache folder; ``None``: the embedding cache's default (``XREC_CACHE_DIR`` or ``.xrec-cache``).

    Attributes
    ----------
    image_head_, text_head_
        ``(reduced image dim, d)`` and ``(text dim, d)`` float32 heads.
    x_mean_, y_mean_, x_axes_
        Centring of each side and the image side's ``(image dim, k)`` principal axes
        (``None`` without PCA).
    best_step_
        Step with the lowest held-out loss (0 = the start); the number of steps of the refit.
    from_cache_
        Whether :meth:`fit` read the heads from the cache.
    """

    name = "contrastive"

    def __init__(
        self,
        init: str = "ridge",
        train_heads: str = "text",
        dim: int = 256,
        pca_components: int | None = None,
        temperature: float = 0.1,
        learning_rate: float = 3e-4,
        weight_decay: float = 0.1,
        max_steps: int = 500,
        patience: int = 50,
        val_fraction: float = 0.15,
        refit: bool = True,
        alpha: float = 1.0,
        seed: int = 0,
        cache: bool = True,
        cache_dir: str | None = None,
    ) -> None:
        self.init = init
        self.train_heads = train_heads
        self.dim = dim
        self.pca_components = pca_components
        self.temperature = temperature
        self.learning_rate = learning_rate
        self.weight_decay = weight_decay
        self.max_steps = max_steps
        self.patience = patience
        self.val_fraction = val_fraction
        self.refit = refit
        self.alpha = alpha
        self.seed = seed
        self.cache = cache
        self.cache_dir = cache_dir

    # -- settings and cache -----------------------------------------------------------------

    def _checked_settings(self) -> dict[str, Any]:
        label = "contrastive setting"
        out = {
            "init": check_choice(self.init, f"{label} 'init'", ("ridge", "random")),
            "train_heads": check_choice(self.train_heads, f"{label} 'train_heads'", ("text", "both")),
            "dim": check_int(self.dim, f"{label} 'dim'", low=1, expected="a positive int"),
            "pca_components": check_int(self.pca_components, f"{label} 'pca_components'", low=1, allow_none=True),
            "temperature": check_number(self.temperature, f"{label} 'temperature'", low=0, low_open=True),
            "learning_rate": check_number(self.learning_rate, f"{label} 'learning_rate'", low=0, low_open=True),
            "weight_decay": check_number(self.weight_decay, f"{label} 'weight_decay'", low=0),
            "max_steps": check_int(self.max_steps, f"{label} 'max_steps'", low=1),
            "patience": check_int(self.patience, f"{label} 'patience'", low=1),
            "val_fraction": check_number(self.val_fraction, f"{label} 'val_fraction'", low=0, high=0.5, low_open=True),
            "refit": bool(check_choice(self.refit, f"{label} 'refit'", (True, False))),
            "alpha": check_number(self.alpha, f"{label} 'alpha'", low=0),
            "seed": check_int(self.seed, f"{label} 'seed'", low=0),
            "version": _VERSION,
        }
        if out["init"] == "random" and out["train_heads"] != "both":
            raise ConfigError(f"{label} 'train_heads': a random start trains both heads; set train_heads='both' with init='random'")
        return out

    def _cache_path(self, x: np.ndarray, y: np.ndarray, settings: dict[str, Any]) -> Path:
        from xrec.encoders.cache import EmbeddingCache

        h = hashlib.sha256(json.dumps(settings, sort_keys=True).encode("utf-8"))
        for a in (x, y):
            h.update(repr(a.shape).encode("ascii"))
            h.update(np.ascontiguousarray(a, dtype="<f4").tobytes())
        return EmbeddingCache(self.cache_dir).root / "bridges" / f"contrastive-{h.hexdigest()}.safetensors"

    def _read(self, path: Path) -> bool:
        from safetensors.numpy import load

        try:
            arrays = load(path.read_bytes())
        except FileNotFoundError:
            return False
        except Exception:  # noqa: BLE001 - a damaged entry (any safetensors error) is refitted and overwritten
            return False
        if not set(_STATE) - {"x_axes_"} <= set(arrays):
            return False
        for key in _STATE:
            setattr(self, key, arrays.get(key))
        self.best_step_ = int(arrays["best_step"][0])
        return True

    def _write(self, path: Path) -> None:
        from safetensors.numpy import save

        arrays = {k: np.ascontiguousarray(getattr(self, k)) for k in _STATE if getattr(self, k) is not None}
        arrays["best_step"] = np.array([self.best_step_], dtype=np.int64)
        path.parent.mkdir(parents=True, exist_ok=True)
        write_bytes_atomic(path, save(arrays))

    # -- fit / transform --------------------------------------------------------------------

    def fit(self, image: np.ndarray | None = None, text: np.ndarray | None = None) -> Self:
        """Train the heads on the pairs ``image[i]`` ↔ ``text[i]`` (or read them from the cache)."""
        if image is None or text is None:
            raise DataError("contrastive bridge: fit needs image and text pairs")
        settings = self._checked_settings()
        x, y = paired_rows(image, text)
        n_val = int(round(settings["val_fraction"] * len(x)))
        if n_val < 2 or len(x) - n_val < 2:
            raise DataError(f"contrastive bridge: too few pairs ({len(x)}) to train on some and stop early on {settings['val_fraction']:.0%}")
        path = self._cache_path(x, y, settings) if self.cache else None
        self.from_cache_ = path is not None and self._read(path)
        if not self.from_cache_:
            self._train(x, y, settings, n_val)
            if path is not None:
                self._write(path)
        self.fitted_ = True
        return self

    def _train(self, x: np.ndarray, y: np.ndarray, settings: dict[str, Any], n_val: int) -> None:
        self.x_mean_ = x.mean(axis=0, dtype=np.float64).astype(np.float32)
        self.y_mean_ = y.mean(axis=0, dtype=np.float64).astype(np.float32)
        xc, yc = x - self.x_mean_, y - self.y_mean_
        self.x_axes_ = _principal_axes(xc, settings["pca_components"])
        if self.x_axes_ is not None:
            xc = xc @ self.x_axes_
        rng = np.random.default_rng(settings["seed"])
        order = rng.permutation(len(x))
        val, train = np.sort(order[:n_val]), np.sort(order[n_val:])
        start = None
        if settings["init"] == "random":
            d = settings["dim"]
            start = (
                (rng.standard_normal((xc.shape[1], d)) / np.sqrt(xc.shape[1])).astype(np.float32),
                (rng.standard_normal((yc.shape[1], d)) / np.sqrt(yc.shape[1])).astype(np.float32),
            )
        heads, self.best_step_ = _descend(xc, yc, train, val, start or _ridge_start(xc, yc, train, settings), settings)
        if settings["refit"]:
            # the step count is chosen; train again on every pair (the held-out share included)
            every = np.arange(len(x))
            heads, _ = _descend(xc, yc, every, None, start or _ridge_start(xc, yc, every, settings), settings, steps=self.best_step_)
        self.image_head_, self.text_head_ = heads

    def transform(self, image: np.ndarray) -> np.ndarray:
        """Image features → the shared space ``(n, d)``."""
        self._check_fitted()
        x = as_matrix(image, "image", len(self.x_mean_)) - self.x_mean_
        if self.x_axes_ is not None:
            x = x @ self.x_axes_
        return (x @ self.image_head_).astype(np.float32)

    def transform_text(self, text: np.ndarray) -> np.ndarray:
        """Text vectors → the shared space ``(n, d)``."""
        self._check_fitted()
        y = as_matrix(text, "text", len(self.y_mean_)) - self.y_mean_
        return (y @ self.text_head_).astype(np.float32)


def _principal_axes(xc: np.ndarray, k: int | None) -> np.ndarray | None:
    """``(dim, k)`` top right singular vectors of the centred ``xc`` (``None`` when ``k`` is ``None``)."""
    if k is None:
        return None
    k = min(int(k), len(xc) - 1, xc.shape[1])
    _, _, vt = np.linalg.svd(xc.astype(np.float64), full_matrices=False)
    # fix each axis's sign (largest entry positive) so refits give the same axes
    signs = np.sign(vt[np.arange(k), np.abs(vt[:k]).argmax(axis=1)])
    return np.ascontiguousarray((vt[:k] * signs[:, None]).T, dtype=np.float32)


def _ridge_start(xc: np.ndarray, yc: np.ndarray, rows: np.ndarray, settings: dict[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    """The ridge map of ``rows`` (image → centred text) and the identity: the heads' ridge start."""
    from sklearn.linear_model import Ridge

    ridge = Ridge(alpha=settings["alpha"], fit_intercept=False).fit(xc[rows].astype(np.float64), yc[rows].astype(np.float64))
    return np.ascontiguousarray(ridge.coef_.T, dtype=np.float32), np.eye(yc.shape[1], dtype=np.float32)


def _descend(
    xc: np.ndarray,
    yc: np.ndarray,
    rows: np.ndarray,
    val: np.ndarray | None,
    start: tuple[np.ndarray, np.ndarray],
    settings: dict[str, Any],
    steps: int | None = None,
) -> tuple[tuple[np.ndarray, np.ndarray], int]:
    """Full-batch AdamW on the symmetric InfoNCE loss of the pairs ``rows``, from the heads ``start``.

    With ``val``: stops ``patience`` steps after the lowest loss on the pairs ``val`` and
    returns the heads of that step and its number (0 = the start). Without: runs
    ``steps`` steps and returns the last heads.
    """
    import torch

    wx, wy = (torch.tensor(w, requires_grad=True) for w in start)
    trained = [wy] if settings["train_heads"] == "text" else [wx, wy]
    opt = torch.optim.AdamW(trained, lr=settings["learning_rate"], weight_decay=settings["weight_decay"])
    tau = settings["temperature"]
    xt, yt = torch.from_numpy(np.ascontiguousarray(xc[rows])), torch.from_numpy(np.ascontiguousarray(yc[rows]))

    def snapshot() -> tuple[np.ndarray, np.ndarray]:
        return wx.detach().numpy().copy(), wy.detach().numpy().copy()

    if val is None:
        for _ in range(int(steps or 0)):
            opt.zero_grad()
            symmetric_info_nce(xt @ wx, yt @ wy, tau).backward()
            opt.step()
        return snapshot(), int(steps or 0)
    xv, yv = torch.from_numpy(np.ascontiguousarray(xc[val])), torch.from_numpy(np.ascontiguousarray(yc[val]))

    def held_out() -> float:
        with torch.no_grad():
            return float(symmetric_info_nce(xv @ wx, yv @ wy, tau))

    best, best_step, best_heads, since = held_out(), 0, snapshot(), 0
    for step in range(1, settings["max_steps"] + 1):
        opt.zero_grad()
        symmetric_info_nce(xt @ wx, yt @ wy, tau).backward()
        opt.step()
        loss = held_out()
        if loss < best:
            best, best_step, best_heads, since = loss, step, snapshot(), 0
        else:
            since += 1
            if since >= settings["patience"]:
                break
    return best_heads, best_step
