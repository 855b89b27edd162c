"""Checks of the demo shop's committed data and its generators.

The demo shop is invented data: these tests check the data itself (counts,
files, the planted signals stay where they belong, determinism), never the
correctness of xrec's algorithms.
"""

from __future__ import annotations

import colorsys
import importlib.util
import re
import shutil
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image
from skimage.color import rgb2hsv

import xrec
from xrec.data.demo import CATEGORICAL, NUMERIC, TEXT, demo_shop_truth, load_demo_shop
from xrec.errors import DataError

FOLDER = Path(xrec.__file__).resolve().parents[1] / "demo_shop"
EMOJI_TEST = Path("/usr/share/unicode/emoji/emoji-test.txt")
FONT = Path("/usr/share/fonts/truetype/noto/NotoColorEmoji.ttf")


def _script(name: str):
    """Import one of the generator scripts in demo_shop/ (not a package)."""
    key = f"_demo_shop_{name}"
    if key in sys.modules:
        return sys.modules[key]
    spec = importlib.util.spec_from_file_location(key, FOLDER / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[key] = module
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def shop():
    return load_demo_shop()


@pytest.fixture(scope="module")
def truth():
    return demo_shop_truth()


# ------------------------------------------------------------------ loading


def test_loads_with_declared_schema(shop):
    schema = shop.catalog.schema
    assert schema.categorical == CATEGORICAL == ("product_type", "theme_group", "size")
    assert schema.numeric == NUMERIC == ("price",)
    assert schema.text == TEXT == ("name", "description")
    assert schema.image == "image"
    assert shop.catalog.image_root == FOLDER.resolve()
    assert shop.name == "demo_shop"
    assert set(shop.catalog.items["product_type"]) == {"sticker", "pin", "patch"}
    assert set(shop.catalog.items["size"]) == {"small", "medium", "large"}
    assert (shop.catalog.items["price"] > 0).all()


def test_counts_in_range(shop):
    assert 600 <= shop.catalog.n_items <= 1500
    assert 1000 <= shop.interactions.n_users <= 3000
    per_shopper = shop.interactions.frame.groupby("user").size()
    assert per_shopper.min() >= 15 and per_shopper.max() <= 40
    # nearly every product sells; a few late releases may not (cold items are realistic)
    assert shop.interactions.frame["item"].nunique() >= 0.98 * shop.catalog.n_items


def test_explicit_folder_gives_the_same_data(shop):
    by_path = load_demo_shop(str(FOLDER), check_images=False)
    assert by_path.fingerprint() == shop.fingerprint()


def test_missing_folder_is_a_clear_error(tmp_path):
    with pytest.raises(DataError, match="does not exist"):
        load_demo_shop(tmp_path / "nowhere")
    with pytest.raises(DataError, match="catalog.csv"):
        load_demo_shop(tmp_path)
    with pytest.raises(DataError, match="items_latent.csv"):
        demo_shop_truth(tmp_path)


def test_missing_image_is_reported(tmp_path):
    copy = tmp_path / "shop"
    copy.mkdir()
    for name in ("catalog.csv", "interactions.csv"):
        shutil.copy(FOLDER / name, copy / name)
    (copy / "images").mkdir()
    with pytest.raises(DataError, match="missing image file"):
        load_demo_shop(copy)


# ------------------------------------------------------------------ images


def test_every_image_exists_opens_and_is_small(shop):
    # PNG signature bytes from the PNG specification (RFC 2083, section 3.1).
    signature = b"\x89PNG\r\n\x1a\n"
    total = 0
    for k in range(shop.catalog.n_items):
        path = shop.catalog.image_path(k)
        data = path.read_bytes()
        assert data[:8] == signature, path
        # A tIME chunk (RFC 2083, 4.2.8) would hold a build time and break byte-identical rebuilds.
        assert b"tIME" not in data, path
        total += len(data)
        with Image.open(path) as im:
            assert im.size == (96, 96)
            im.verify()
    assert total < 8 * 2**20, f"images take {total / 2**20:.1f} MB"


def _border_hsv(path: Path) -> tuple[float, float]:
    """Hue (degrees, circular mean) and median saturation of the outer 5-pixel ring.

    Every product frame leaves that ring as bare background. HSV as defined by
    Smith (1978), computed by scikit-image's ``rgb2hsv`` (checked against the
    standard library's ``colorsys`` in the test below).
    """
    with Image.open(path) as im:
        a = np.asarray(im.convert("RGB"), dtype=np.float64) / 255.0
    ring = np.ones(a.shape[:2], dtype=bool)
    ring[5:-5, 5:-5] = False
    hsv = rgb2hsv(a)[ring]
    angle = 2 * np.pi * hsv[:, 0]
    hue = np.degrees(np.arctan2((hsv[:, 1] * np.sin(angle)).sum(), (hsv[:, 1] * np.cos(angle)).sum())) % 360.0
    return float(hue), float(np.median(hsv[:, 1]))


def test_hsv_conversion_agrees_with_colorsys():
    # the standard library's colorsys implements Smith's (1978) HSV
    rgb = np.random.default_rng(0).random((50, 3))
    ours = rgb2hsv(rgb[None])[0]
    ref = np.array([colorsys.rgb_to_hsv(*px) for px in rgb])
    np.testing.assert_allclose(ours, ref, atol=1e-9)


def test_colourway_recoverable_from_pixels(shop, truth):
    """The nearest colourway by background hue, and the tone by saturation, match the truth file."""
    items = truth["items"].set_index("item_id").loc[shop.catalog.item_ids]
    colourways = truth["catalog_params"]["colourways"]
    tones = truth["catalog_params"]["tones"]
    # vivid and pastel saturation ranges do not overlap: split halfway between them
    cut = (max(tones["pastel"]["saturation"]) + min(tones["vivid"]["saturation"])) / 2
    correct = 0
    for k, expected in enumerate(items["colourway"]):
        hue, sat = _border_hsv(shop.catalog.image_path(k))
        tone = "vivid" if sat > cut else "pastel"
        candidates = [cw for cw, spec in colourways.items() if spec["tone"] == tone]
        gap = [min(abs(hue - colourways[cw]["hue"]), 360 - abs(hue - colourways[cw]["hue"])) for cw in candidates]
        correct += candidates[int(np.argmin(gap))] == expected
    assert correct / len(items) >= 0.98


# ------------------------------------------------------------------ text


def _colourway_words(truth) -> set[str]:
    words = set()
    for cw in truth["catalog_params"]["colourways"]:
        words.update(cw.split("_"))
    words.discard("cw")
    return words | {"colourway", "colorway", "colour", "color"}


def test_colourway_never_in_text_or_attributes(shop, truth):
    words = _colourway_words(truth)
    assert {"red", "blue", "green", "pastel", "vivid"} <= words
    pattern = re.compile(r"\b(?:" + "|".join(sorted(words)) + r")\b", re.IGNORECASE)
    items = shop.catalog.items
    for col in ("name", "description", "product_type", "theme_group", "size"):
        hits = items.loc[items[col].str.contains(pattern), col]
        assert hits.empty, f"{col} mentions a colourway word: {hits.head(3).tolist()}"
    assert "colourway" not in items.columns and "tone" not in items.columns


def test_theme_in_text_but_not_an_attribute(shop, truth):
    gen = _script("generate_catalog")
    items = truth["items"].set_index("item_id").loc[shop.catalog.item_ids]
    phrases = [gen.theme_phrase(t) for t in items["theme"]]
    assert all(p in d for p, d in zip(phrases, shop.catalog.items["description"], strict=True))
    subgroups = set(items["theme"])
    for col in shop.catalog.schema.attribute_columns:
        assert not set(shop.catalog.items[col].astype(str)) & subgroups, col
    # the subgroup is finer than the group attribute: several subgroups per group
    assert items.groupby(shop.catalog.items["theme_group"].to_numpy())["theme"].nunique().min() >= 2


def test_descriptions_vary(shop, truth):
    gen = _script("generate_catalog")
    items = truth["items"].set_index("item_id").loc[shop.catalog.item_ids]
    descriptions = shop.catalog.items["description"]
    assert descriptions.nunique() == len(descriptions)
    assert items["pattern"].nunique() >= 8
    # The wording left after blanking the product's own name and theme.
    skeletons = pd.Series(
        [
            d.replace(gen._cap(gen.clean_name(n)), "<N>").replace(gen.clean_name(n), "<N>").replace(gen.theme_phrase(t), "<T>")
            for d, n, t in zip(descriptions, items["emoji_name"], items["theme"], strict=True)
        ]
    )
    assert skeletons.nunique() >= 0.5 * len(skeletons)
    first_words = descriptions.str.split().str[0].str.lower()
    assert first_words.value_counts(normalize=True).iloc[0] < 0.25


def test_names_and_themes_match_unicode_data(truth):
    """Emoji names and subgroups are the ones in Unicode's emoji-test.txt (the outside source)."""
    if not EMOJI_TEST.is_file():
        pytest.skip("unicode-data is not installed")
    gen = _script("generate_catalog")
    official = {e.codepoints: e for e in gen.read_emoji_test(EMOJI_TEST)}
    for row in truth["items"].itertuples():
        e = official[row.emoji_codepoints]
        assert (e.name, e.subgroup) == (row.emoji_name, row.theme)


def test_price_bands_do_not_overlap_within_a_type(shop, truth):
    items = truth["items"].set_index("item_id").loc[shop.catalog.item_ids]
    price = shop.catalog.items["price"].to_numpy()
    for ptype in ("sticker", "pin", "patch"):
        of_type = items["product_type"].to_numpy() == ptype
        bands = [price[of_type & (items["price_band"].to_numpy() == b)] for b in ("budget", "standard", "premium")]
        assert bands[0].max() < bands[1].min() and bands[1].max() < bands[2].min(), ptype


# ------------------------------------------------------------------ shoppers


def test_parameters_file_present_and_consistent(shop, truth):
    params = truth["params"]
    for key in ("settings", "signals", "communities", "target_sizes", "observed"):
        assert key in params
    assert set(params["signals"]) == {"look", "theme", "spec", "circle", "noise"}
    assert params["observed"]["n_interactions"] == len(shop.interactions)
    assert params["observed"]["n_shoppers"] == shop.interactions.n_users
    shares = params["observed"]["reason_share"]
    # each taste kind explains a comparable share of purchases
    for kind in ("look", "theme", "spec", "circle"):
        assert 0.15 <= shares[kind] <= 0.30, (kind, shares)
    reasons = truth["purchases"]["reason"].value_counts(normalize=True)
    assert reasons.round(4).to_dict() == pytest.approx(shares, abs=1e-4)


def test_community_sets_have_no_content_pattern(truth):
    items = truth["items"].set_index("item_id")
    n_colourways = items["colourway"].nunique()
    for members in truth["params"]["communities"].values():
        # a random 50-item draw spreads over most colourways and product types
        sub = items.loc[members]
        assert sub["colourway"].nunique() >= n_colourways // 2
        assert sub["product_type"].nunique() == 3


def test_purchases_follow_the_planted_tastes(truth):
    """A purchase explained by a kind lands in that shopper's target set."""
    items = truth["items"].set_index("item_id")
    shoppers = truth["shoppers"].set_index("shopper_id")
    communities = truth["params"]["communities"]
    sample = truth["purchases"].iloc[::7]
    for row in sample.itertuples():
        s, it = shoppers.loc[row.shopper_id], items.loc[row.item_id]
        if row.reason == "look":
            assert it["colourway"] == s["look_target"]
        elif row.reason == "theme":
            assert it["theme"] in s["theme_target"].split("|")
        elif row.reason == "spec":
            assert f"{it['product_type']}/{it['price_band']}/{it['size']}" == s["spec_target"]
        elif row.reason == "circle":
            assert row.item_id in communities[s["circle_target"]]


def test_no_purchase_before_release(shop, truth):
    release = pd.Series(truth["params"]["release_timestamp"])
    frame = shop.interactions.frame
    assert (frame["timestamp"].to_numpy() >= release.loc[frame["item"]].to_numpy()).all()
    # some of the catalog arrives late, so new arrivals exist
    assert (release > release.min()).mean() > 0.2


def test_simulation_is_deterministic_and_matches_committed_file(truth):
    sim = _script("simulate_shoppers")
    items = truth["items"].astype(str)
    small = sim.ShopperSettings(n_shoppers=60)
    a = sim.simulate(items, small)
    b = sim.simulate(items, small)
    for x, y in zip(a[:3], b[:3], strict=True):
        pd.testing.assert_frame_equal(x, y)
    assert a[3] == b[3]
    other = sim.simulate(items, sim.ShopperSettings(n_shoppers=60, seed=small.seed + 1))[0]
    assert not other.equals(a[0])
    # the committed purchases are what the default settings produce
    full = sim.simulate(items, sim.ShopperSettings(**{k: tuple(v) if isinstance(v, list) else v for k, v in truth["params"]["settings"].items()}))[0]
    committed = pd.read_csv(FOLDER / "interactions.csv", dtype={"shopper_id": str, "item_id": str})
    pd.testing.assert_frame_equal(full.reset_index(drop=True), committed)


@pytest.mark.skipif(not (FONT.is_file() and EMOJI_TEST.is_file()), reason="font or unicode-data not installed")
def test_catalog_generation_is_deterministic(tmp_path):
    gen = _script("generate_catalog")
    gen.generate(tmp_path / "a", limit=6, progress=False)
    gen.generate(tmp_path / "b", limit=6, progress=False)
    files = sorted(p.relative_to(tmp_path / "a") for p in (tmp_path / "a").rglob("*") if p.is_file())
    assert len(files) == 6 + 3
    for rel in files:
        assert (tmp_path / "a" / rel).read_bytes() == (tmp_path / "b" / rel).read_bytes(), rel


def test_readme_documents_rebuild_and_licences():
    text = (FOLDER / "README.md").read_text(encoding="utf-8")
    assert "apt-get install -y fonts-noto-color-emoji unicode-data" in text
    assert "python demo_shop/generate_catalog.py" in text and "python demo_shop/simulate_shoppers.py" in text
    assert "SIL Open Font License 1.1" in text and "Unicode License v3" in text
