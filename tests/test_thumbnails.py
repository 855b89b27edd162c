"""Thumbnail data URIs and tile HTML (xrec.notebook.thumbnails)."""

from __future__ import annotations

import base64
import io
import re
from dataclasses import replace
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from xrec.data.catalog import Catalog
from xrec.errors import ConfigError
from xrec.notebook.thumbnails import (
    Tile,
    caption_column,
    item_captions,
    source_colors,
    strip_html,
    thumbnail_uri,
    tile_html,
    tiles_for,
)


def _decode(uri: str) -> Image.Image:
    head, payload = uri.split(",", 1)
    assert re.fullmatch(r"data:image/(png|webp|jpeg);base64", head)
    # Decoding with Pillow and the standard library's base64 is the outside check (Pillow docs, Image.open).
    img = Image.open(io.BytesIO(base64.b64decode(payload, validate=True)))
    img.load()
    return img


@pytest.fixture()
def images(tmp_path):
    wide = Image.new("RGB", (200, 100), (255, 0, 0))
    wide.save(tmp_path / "wide.png")
    clear = Image.new("RGBA", (40, 40), (0, 0, 255, 0))  # fully transparent blue
    clear.save(tmp_path / "clear.png")
    (tmp_path / "broken.png").write_bytes(b"not an image at all")
    return tmp_path


@pytest.mark.parametrize("fmt", ["png", "webp", "jpeg"])
def test_thumbnail_decodes_back_to_a_square_of_the_asked_size(images, fmt):
    img = _decode(thumbnail_uri(images / "wide.png", 48, fmt=fmt))
    assert img.size == (48, 48)
    assert img.format == fmt.upper()
    rgb = np.asarray(img.convert("RGB"), dtype=np.int16)
    # The 2:1 picture fills the middle half of the rows; the bands above and below are white padding.
    assert np.abs(rgb[24, 24] - [255, 0, 0]).max() <= 8
    assert np.abs(rgb[2, 24] - [255, 255, 255]).max() <= 8


def test_transparent_pixels_become_white(images):
    rgb = np.asarray(_decode(thumbnail_uri(images / "clear.png", 16)).convert("RGB"))
    assert (rgb == 255).all()


def test_unreadable_or_missing_files_give_none(images):
    assert thumbnail_uri(images / "broken.png") is None
    assert thumbnail_uri(images / "absent.png") is None


def test_memoised_but_an_edited_file_is_read_again(images):
    path = images / "wide.png"
    first = thumbnail_uri(path, 32)
    assert thumbnail_uri(path, 32) is first  # same object: from the memo
    Image.new("RGB", (50, 50), (0, 200, 0)).save(path)
    import os

    st = os.stat(path)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 10_000_000))
    again = np.asarray(_decode(thumbnail_uri(path, 32)).convert("RGB"))
    assert again[16, 16, 1] > 150 and again[16, 16, 0] < 50


def test_bad_settings_are_config_errors(images):
    with pytest.raises(ConfigError, match="size"):
        thumbnail_uri(images / "wide.png", 0)
    with pytest.raises(ConfigError, match="fmt"):
        thumbnail_uri(images / "wide.png", fmt="gif")


def _catalog(tmp_path, with_image=True):
    Image.new("RGB", (30, 30), (10, 20, 30)).save(tmp_path / "a.png")
    frame = pd.DataFrame(
        {
            "item": ["a", "b", "c"],
            "name": ["Apple <b>pin</b> & co", "", "x" * 100],
            "image": ["a.png", "missing.png", "a.png"],
        }
    )
    if with_image:
        return Catalog.from_frame(frame, text=["name"], image="image", image_root=tmp_path, check_images=False)
    return Catalog.from_frame(frame[["item", "name"]], text=["name"])


def test_tiles_for_a_catalog(tmp_path):
    cat = _catalog(tmp_path)
    assert caption_column(cat) == "name"
    tiles = tiles_for(cat, [0, 1, 2], size=24)
    assert [t.item for t in tiles] == ["a", "b", "c"]
    assert _decode(tiles[0].image).size == (24, 24)
    assert tiles[1].image is None  # missing file: text tile
    assert tiles[1].caption == "b"  # blank name falls back to the id
    assert len(tiles[2].caption) == 60 and tiles[2].caption.endswith("…")
    assert item_captions(cat, [2], max_chars=5) == ["xxxx…"]
    no_images = tiles_for(_catalog(tmp_path, with_image=False), [0])
    assert no_images[0].image is None


class _Collect(HTMLParser):
    """Standard-library HTML parser (html.parser docs): collects text and attributes."""

    def __init__(self):
        super().__init__()
        self.text: list[str] = []
        self.attrs: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.attrs.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def test_captions_and_titles_are_escaped(tmp_path):
    cat = _catalog(tmp_path)
    tile = replace(tiles_for(cat, [0])[0], marks=("hit", "<odd>"), score=1.25, contributions={"a<b": 0.5, "text": -0.25})
    out = tile_html(tile)
    assert "<b>pin</b>" not in out and "&lt;b&gt;pin&lt;/b&gt; &amp; co" in out
    assert "<odd>" not in out and "xrec-mark-other" in out
    parser = _Collect()
    parser.feed(out)
    # The parser gives the unescaped text back exactly (html.parser, standard library).
    assert "Apple <b>pin</b> & co" in parser.text
    assert "<odd>" in parser.text
    assert "score 1.250" in parser.text
    tiles = [a for tag, a in parser.attrs if "xrec-tile" in (a.get("class") or "")]
    assert tiles[0]["data-item"] == "a" and tiles[0]["data-marks"] == "hit <odd>"
    bars = {a["data-source"]: float(a["data-value"]) for _, a in parser.attrs if a.get("class") == "xrec-contribution"}
    assert bars == {"a<b": 0.5, "text": -0.25}
    assert "<script" not in out and "://" not in out  # data URIs only: no address to fetch


def test_text_tile_and_strip(tmp_path):
    text_only = Tile(item="z", caption="Plain <name>")
    out = tile_html(text_only)
    assert 'class="xrec-no-image"' in out and "Plain &lt;name&gt;" in out and "<img" not in out
    strip = strip_html([text_only, Tile(item="y", caption="y", contributions={"pop": 2.0})], title="Top <10>")
    assert "Top &lt;10&gt;" in strip and strip.count('class="xrec-tile"') == 2
    assert "no items" in strip_html([], title="t")


def test_bar_lengths_share_one_scale_across_a_strip():
    tiles = [Tile(item="a", caption="a", contributions={"s": 1.0}), Tile(item="b", caption="b", contributions={"s": -0.5})]
    spans = re.findall(r"#eee ([0-9.]+)px,#0072B2 ([0-9.]+)px ([0-9.]+)px", strip_html(tiles, size=80))
    # Half the width (40 px) stands for the strip's largest contribution, 1.0, drawn right of the
    # centre; -0.5 gets half of that, drawn left of it.
    assert [tuple(map(float, s)) for s in spans] == [(40.0, 40.0, 80.0), (20.0, 20.0, 40.0)]


def test_source_colours_are_stable_and_distinct():
    colors = source_colors(["a", "b", "c"])
    assert list(colors) == ["a", "b", "c"] and len(set(colors.values())) == 3
    assert source_colors(["a", "b", "c"]) == colors
