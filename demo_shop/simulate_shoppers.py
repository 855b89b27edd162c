"""Simulate the demo shop's shoppers and their purchases.

Every shopper mixes two or three *taste kinds*, each visible to one signal only:

========  ==========================================  ==========================
kind      what the shopper likes                      which signal can see it
========  ==========================================  ==========================
look      one colourway (background hue and motif)    image only
theme     two emoji subgroups ("animal mammal", ...)  description text only
spec      one product type in one price band          attributes only
circle    the item set of a community they belong to  co-purchases only
========  ==========================================  ==========================

Each purchase picks a kind by the shopper's mixture weights (or, with a small
probability, a random item), then an item of that kind's target set that the
shopper has not bought yet, favouring items with higher *appeal* (a per-item
log-normal weight, so some items sell more than others). Community item sets
are drawn uniformly from the catalog, so they share no content pattern.

Run from the repository root after ``generate_catalog.py``::

    python demo_shop/simulate_shoppers.py

Writes ``interactions.csv`` (shopper_id, item_id, timestamp) and, under
``truth/``, the parameters (``shopper_params.json``), each shopper's tastes
(``shoppers_latent.csv``) and the reason behind each purchase
(``purchases_latent.csv``).
"""

from __future__ import annotations

import argparse
import json
import sys
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
KINDS = ("look", "theme", "spec", "circle")
SIGNALS = {
    "look": "image: the favourite colourway is drawn in the picture and written nowhere",
    "theme": "text: the emoji subgroup words appear in the description, not in any attribute",
    "spec": "attributes: product_type (categorical) and the price band (numeric price)",
    "circle": "collaborative: a community buys from a random item set with no content pattern",
    "noise": "none: a random item weighted by appeal",
}


@dataclass(frozen=True)
class ShopperSettings:
    """Knobs of the simulation; saved next to the output so results can be explained."""

    seed: int = 7
    n_shoppers: int = 1200
    min_purchases: int = 15
    max_purchases: int = 25
    # Probability that a shopper mixes 2 (first) or 3 (second) taste kinds.
    n_kinds_probs: tuple[float, float] = (0.6, 0.4)
    # Dirichlet concentration of the mixture weights over a shopper's kinds.
    mixture_concentration: float = 2.0
    noise_share: float = 0.1
    themes_per_shopper: int = 2
    n_communities: int = 36
    community_size: int = 50
    appeal_sigma: float = 0.25
    start_epoch: int = 1740787200  # 2025-03-01T00:00:00Z
    start_spread_days: float = 180.0
    mean_gap_days: float = 2.5
    # New arrivals: this share of the catalog is on sale from the start, the
    # rest is released evenly over ``release_spread_days``. Shoppers favour
    # recent releases (weight 1 + novelty_boost * exp(-age / novelty_days)), so
    # many late purchases are of items with few purchases behind them, where
    # co-purchase signals are thin and content must carry the ranking.
    launch_share: float = 0.5
    release_spread_days: float = 220.0
    novelty_boost: float = 4.0
    novelty_days: float = 14.0
    kinds: tuple[str, ...] = field(default=KINDS)


def _targets(items: pd.DataFrame, settings: ShopperSettings, rng: np.random.Generator) -> dict[str, dict[str, np.ndarray]]:
    """Item positions each possible taste target points to, per kind."""
    pos = np.arange(len(items))
    look = {c: pos[items["colourway"].to_numpy() == c] for c in sorted(items["colourway"].unique())}
    theme = {t: pos[items["theme"].to_numpy() == t] for t in sorted(items["theme"].unique())}
    spec_key = items["product_type"].astype(str) + "/" + items["price_band"].astype(str) + "/" + items["size"].astype(str)
    spec = {s: pos[spec_key.to_numpy() == s] for s in sorted(spec_key.unique())}
    circle = {f"c{k:02d}": np.sort(rng.choice(len(items), size=settings.community_size, replace=False)) for k in range(settings.n_communities)}
    return {"look": look, "theme": theme, "spec": spec, "circle": circle}


def simulate(items: pd.DataFrame, settings: ShopperSettings = ShopperSettings()) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, dict]:
    """Simulate shoppers over the catalog's latent facts.

    Parameters
    ----------
    items
        ``truth/items_latent.csv``: item_id, colourway, theme, product_type, price_band.
    settings
        Simulation knobs; ``settings.seed`` fixes every random choice.

    Returns
    -------
    interactions, shoppers, purchases, params
        Purchases as (shopper_id, item_id, timestamp); each shopper's kinds, weights
        and targets; the kind behind each purchase; a JSON-ready parameter record.
    """
    items = items.sort_values("item_id", kind="stable").reset_index(drop=True)
    rng = np.random.default_rng(settings.seed)
    targets = _targets(items, settings, rng)
    appeal = rng.lognormal(0.0, settings.appeal_sigma, size=len(items))
    theme_names = sorted(targets["theme"])
    day = 86400.0
    late = rng.random(len(items)) >= settings.launch_share
    release = np.full(len(items), float(settings.start_epoch))
    release[late] += rng.uniform(0.0, settings.release_spread_days, size=int(late.sum())) * day

    shopper_rows, rows = [], []
    for s in range(settings.n_shoppers):
        shopper = f"s{s + 1:04d}"
        n_kinds = 2 + int(rng.choice(2, p=settings.n_kinds_probs))
        kinds = [settings.kinds[i] for i in np.sort(rng.choice(len(settings.kinds), size=n_kinds, replace=False))]
        weights = rng.dirichlet(np.full(n_kinds, settings.mixture_concentration)) * (1.0 - settings.noise_share)
        chosen: dict[str, list[str]] = {}
        pools: dict[str, np.ndarray] = {}
        for kind in kinds:
            if kind == "theme":
                picks = [theme_names[i] for i in np.sort(rng.choice(len(theme_names), size=settings.themes_per_shopper, replace=False))]
            else:
                names = sorted(targets[kind])
                picks = [names[int(rng.integers(len(names)))]]
            chosen[kind] = picks
            pools[kind] = np.unique(np.concatenate([targets[kind][p] for p in picks]))
        n_buys = int(rng.integers(settings.min_purchases, settings.max_purchases + 1))
        t = settings.start_epoch + rng.uniform(0.0, settings.start_spread_days) * day
        bought = np.zeros(len(items), dtype=bool)
        reasons = [*kinds, "noise"]
        probs = np.append(weights, settings.noise_share)
        everything = np.arange(len(items))
        for _ in range(n_buys):
            t += 60.0 + rng.exponential(settings.mean_gap_days) * day
            reason = reasons[int(rng.choice(len(reasons), p=probs))]
            pool = pools.get(reason, everything)
            free = pool[~bought[pool] & (release[pool] <= t)]
            if free.size == 0:
                reason = "noise"
                free = np.flatnonzero(~bought & (release <= t))
            w = appeal[free] * (1.0 + settings.novelty_boost * np.exp(-(t - release[free]) / (settings.novelty_days * day)))
            j = int(free[rng.choice(free.size, p=w / w.sum())])
            bought[j] = True
            rows.append((shopper, items["item_id"].iat[j], int(t), reason))
        shopper_rows.append(
            {
                "shopper_id": shopper,
                "kinds": "|".join(kinds),
                "weights": "|".join(f"{w:.4f}" for w in weights),
                **{f"{k}_target": "|".join(chosen[k]) if k in chosen else "" for k in settings.kinds},
                "n_purchases": n_buys,
            }
        )

    purchases = pd.DataFrame(rows, columns=["shopper_id", "item_id", "timestamp", "reason"])
    interactions = purchases[["shopper_id", "item_id", "timestamp"]].copy()
    shoppers = pd.DataFrame(shopper_rows)
    share = purchases["reason"].value_counts(normalize=True).sort_index()
    params = {
        "settings": asdict(settings),
        "signals": SIGNALS,
        "communities": {c: [items["item_id"].iat[j] for j in members] for c, members in targets["circle"].items()},
        "release_timestamp": {items["item_id"].iat[j]: int(release[j]) for j in range(len(items))},
        "target_sizes": {k: {name: int(len(v)) for name, v in targets[k].items()} for k in KINDS},
        "observed": {
            "n_shoppers": int(shoppers.shape[0]),
            "n_interactions": int(len(interactions)),
            "n_items_bought": int(interactions["item_id"].nunique()),
            "reason_share": {k: round(float(v), 4) for k, v in share.items()},
        },
    }
    return interactions, shoppers, purchases[["shopper_id", "item_id", "reason"]], params


def run(folder: Path = HERE, settings: ShopperSettings = ShopperSettings()) -> dict:
    """Read ``truth/items_latent.csv`` under ``folder``, simulate, and write the outputs there."""
    items = pd.read_csv(folder / "truth" / "items_latent.csv", dtype=str)
    interactions, shoppers, purchases, params = simulate(items, settings)
    interactions.to_csv(folder / "interactions.csv", index=False, lineterminator="\n")
    shoppers.to_csv(folder / "truth" / "shoppers_latent.csv", index=False, lineterminator="\n")
    purchases.to_csv(folder / "truth" / "purchases_latent.csv", index=False, lineterminator="\n")
    (folder / "truth" / "shopper_params.json").write_text(json.dumps(params, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    return params


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--folder", type=Path, default=HERE, help="demo shop folder (default: this folder)")
    parser.add_argument("--seed", type=int, default=ShopperSettings.seed)
    parser.add_argument("--shoppers", type=int, default=ShopperSettings.n_shoppers)
    args = parser.parse_args(argv)
    params = run(args.folder, ShopperSettings(seed=args.seed, n_shoppers=args.shoppers))
    obs = params["observed"]
    print(f"{obs['n_shoppers']} shoppers, {obs['n_interactions']} purchases; reasons: {obs['reason_share']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
