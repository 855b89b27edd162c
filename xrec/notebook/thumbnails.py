"""Item thumbnails as ``data:`` URIs, and HTML tiles and strips built from them.

Everything here is plain HTML with inline styles: no script, no external file, no network,
so the same markup works in a notebook output, an ipywidgets ``HTML`` value and a saved
report. Images are read with Pillow, fitted into a small square on white and encoded once
per ``(file, size, format)`` (the file's modification time and length are part of the key,
so an edited file is read again).

The gallery (:mod:`xrec.notebook.gallery`) and the cross-modal explorer both draw their
items with :func:`tiles_for` / :func:`tile_html` / :func:`strip_html`.
"""

from __future__ import annotations

import base64
import html
import io
import math
import os
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

from xrec._validation import check_choice, check_int
from xrec.data.catalog import Catalog

__all__ = [
    "DEFAULT_SIZE",
    "MARK_STYLES",
    "Tile",
    "caption_column",
    "item_captions",
    "largest_contribution",
    "source_colors",
    "strip_html",
    "thumbnail_uri",
    "tile_html",
    "tiles_for",
]

#: Side of the square thumbnails, in pixels.
DEFAULT_SIZE = 96
#: Images over this many pixels are not decoded (Pillow's own decompression-bomb threshold).
_MAX_PIXELS = 89_478_485
_FORMATS = {"png": ("PNG", "image/png"), "webp": ("WEBP", "image/webp"), "jpeg": ("JPEG", "image/jpeg")}

#: Marks a tile can carry: name -> (badge text, colour). Other names get a grey badge.
MARK_STYLES: dict[str, tuple[str, str]] = {
    "hit": ("held-out hit", "#2f7d32"),
    "added": ("added", "#1f5fbf"),
    "dropped": ("dropped", "#8a5a00"),
    "new": ("new item", "#6a3d9a"),
}

# Colour-blind-safe qualitative palette (Okabe & Ito, "Color Universal Design", 2008).
_PALETTE = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442", "#000000")

_CAPTION_COLUMNS = ("name", "title", "product_name", "label")


def thumbnail_uri(path: str | os.PathLike, size: int = DEFAULT_SIZE, *, fmt: str = "webp") -> str | None:
    """A ``data:`` URI of the image at ``path``, fitted into a ``size`` × ``size`` square.

    The image keeps its aspect ratio and is centred on white (transparent pixels are
    composited on white too); EXIF orientation is applied. Results are memoised per
    ``(path, size, fmt)`` and the file's modification time and length.

    Parameters
    ----------
    path
        Image file.
    size
        Side of the square, in pixels (1 to 1024).
    fmt
        ``"webp"`` (the default: about a third of PNG's bytes on the demo shop's art; PNG
        when this Pillow was built without WebP), ``"png"`` (lossless) or ``"jpeg"``.

    Returns
    -------
    str or None
        ``"data:image/png;base64,..."``, or ``None`` when the file is missing, is not an
        image Pillow can read, or is over the pixel limit (the caller draws a text tile).
    """
    size = check_int(size, "size", low=1, high=1024)
    fmt = check_choice(fmt, "fmt", tuple(_FORMATS))
    p = Path(path)
    try:
        stat = p.stat()
    except OSError:
        return None
    return _encoded(str(p.resolve()), stat.st_mtime_ns, stat.st_size, size, fmt)


@lru_cache(maxsize=8192)
def _encoded(path: str, mtime_ns: int, length: int, size: int, fmt: str) -> str | None:
    from PIL import Image, ImageOps

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            with Image.open(path) as img:
                if img.width * img.height > _MAX_PIXELS:
                    return None
                img.draft("RGB", (size, size))  # JPEG: let the decoder shrink by powers of two
                img = ImageOps.exif_transpose(img)
                rgba = img.convert("RGBA")
    except (OSError, ValueError, SyntaxError, Image.DecompressionBombError):
        return None
    white = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
    rgb = Image.alpha_composite(white, rgba).convert("RGB")
    square = ImageOps.pad(rgb, (size, size), method=Image.Resampling.LANCZOS, color=(255, 255, 255))
    if fmt == "webp" and not _has_webp():
        fmt = "png"
    pil_format, mime = _FORMATS[fmt]
    buf = io.BytesIO()
    square.save(buf, format=pil_format, **({"optimize": True} if fmt == "png" else {"quality": 85}))
    return f"data:{mime};base64,{base64.b64encode(buf.getvalue()).decode('ascii')}"


@lru_cache(maxsize=1)
def _has_webp() -> bool:
    from PIL import features

    return bool(features.check("webp"))


def caption_column(catalog: Catalog) -> str | None:
    """The catalog column used as an item's caption: the first of ``name``, ``title``,
    ``product_name``, ``label``, else the first declared text column, else ``None`` (item ids)."""
    cols = catalog.items.columns
    for name in _CAPTION_COLUMNS:
        if name in cols:
            return name
    return catalog.schema.text[0] if catalog.schema.text else None


def item_captions(catalog: Catalog, positions: Sequence[int], column: str | None = None, *, max_chars: int = 60) -> list[str]:
    """Short captions of the items at ``positions``: ``column`` (default :func:`caption_column`),
    cut to ``max_chars`` characters, or the item id where the value is blank."""
    column = caption_column(catalog) if column is None else column
    ids = catalog.item_ids
    out = []
    for pos in positions:
        text = "" if column is None else catalog.items[column].iat[int(pos)]
        text = text.strip() if isinstance(text, str) else ("" if text is None or text != text else str(text))
        text = text or str(ids[int(pos)])
        out.append(text if len(text) <= max_chars else text[: max_chars - 1].rstrip() + "…")
    return out


def source_colors(names: Sequence[str]) -> dict[str, str]:
    """One colour per source name, in the given order (the palette repeats after eight)."""
    return {name: _PALETTE[i % len(_PALETTE)] for i, name in enumerate(names)}


@dataclass(frozen=True)
class Tile:
    """One item as drawn: its id, caption, thumbnail (or ``None`` for a text tile) and extras.

    Attributes
    ----------
    item
        Item id (shown on hover and stored in ``data-item``).
    caption
        Text under the picture (and inside the tile when there is no picture).
    image
        A ``data:`` URI from :func:`thumbnail_uri`, or ``None``.
    score
        Shown as a line under the caption when given.
    marks
        Names from :data:`MARK_STYLES` (or any other word) shown as badges.
    contributions
        Source name -> signed contribution to the score, drawn as one small bar per source.
    """

    item: str
    caption: str
    image: str | None = None
    score: float | None = None
    marks: tuple[str, ...] = ()
    contributions: Mapping[str, float] = field(default_factory=dict)


def tiles_for(
    catalog: Catalog,
    positions: Sequence[int],
    *,
    size: int = DEFAULT_SIZE,
    fmt: str = "webp",
    caption: str | None = None,
) -> list[Tile]:
    """Plain tiles (id, caption, thumbnail) of the catalog items at ``positions``.

    Items without an image column, or whose image cannot be read, get ``image=None``.
    Add scores, marks or contributions with :func:`dataclasses.replace`.
    """
    positions = [int(p) for p in positions]
    captions = item_captions(catalog, positions, caption)
    ids = catalog.item_ids
    tiles = []
    for pos, text in zip(positions, captions, strict=True):
        uri = thumbnail_uri(catalog.image_path(pos), size, fmt=fmt) if catalog.schema.image else None
        tiles.append(Tile(item=str(ids[pos]), caption=text, image=uri))
    return tiles


def largest_contribution(tiles: Sequence[Tile]) -> float:
    """The largest absolute finite contribution over ``tiles`` (0 when there is none)."""
    return max((abs(float(v)) for t in tiles for v in t.contributions.values() if math.isfinite(float(v))), default=0.0)


def _fmt(value: float) -> str:
    return f"{value:+.3f}" if math.isfinite(value) else str(value)


def _contribution_bars(contributions: Mapping[str, float], colors: Mapping[str, str], scale: float, width: int) -> str:
    """One row per source: a bar from the centre line, right for positive, left for negative.

    Each row is one ``div`` painted by a CSS gradient (compact: reports hold hundreds of them);
    one line over the rows marks zero.
    """
    half = width / 2
    rows = []
    for name, value in contributions.items():
        v = float(value)
        share = 0.0 if not (math.isfinite(v) and scale > 0) else min(abs(v) / scale, 1.0)
        lo, hi = (half, half + share * half) if v >= 0 else (half - share * half, half)
        color = html.escape(colors.get(name, "#777"))
        rows.append(
            f'<div class="xrec-contribution" data-source="{html.escape(name)}" data-value="{v:.6g}" '
            f'title="{html.escape(f"{name}: {_fmt(v)}")}" style="height:4px;margin:1px 0;'
            f'background:linear-gradient(90deg,#eee {lo:.1f}px,{color} {lo:.1f}px {hi:.1f}px,#eee {hi:.1f}px)"></div>'
        )
    zero = f'<div style="position:absolute;left:{half:.0f}px;top:0;bottom:0;width:1px;background:#999"></div>'
    return f'<div class="xrec-contributions" style="position:relative;width:{width}px;margin-top:2px">{"".join(rows)}{zero}</div>'


def tile_html(tile: Tile, *, size: int = DEFAULT_SIZE, colors: Mapping[str, str] | None = None, scale: float | None = None) -> str:
    """One tile as an inline-block ``<div class="xrec-tile">`` (every text escaped).

    The element carries ``data-item`` (the item id) and ``data-marks`` (the marks,
    space-separated, with spaces inside a mark written ``_``: ``"hit blend_#3"``).

    Parameters
    ----------
    tile
        What to draw.
    size
        Side of the picture box in pixels (the thumbnail is shown at this size).
    colors
        Source name -> CSS colour of its contribution bar (default :func:`source_colors`).
    scale
        Contribution that fills half the bar's width (default: the largest absolute
        contribution of this tile). Pass one value for a whole strip to compare tiles.
    """
    colors = source_colors(list(tile.contributions)) if colors is None else colors
    marks = tile.marks
    border = MARK_STYLES["hit"][1] if "hit" in marks else "#ddd"
    dim = "opacity:0.55;" if "dropped" in marks else ""
    caption = html.escape(tile.caption)
    item = html.escape(tile.item)
    if tile.image is not None:
        picture = f'<img src="{html.escape(tile.image)}" alt="{caption}" width="{size}" height="{size}" style="display:block;width:{size}px;height:{size}px">'
    else:
        picture = (
            f'<div class="xrec-no-image" style="width:{size}px;height:{size}px;display:flex;align-items:center;'
            f"justify-content:center;text-align:center;background:#f4f4f4;color:#555;font-size:11px;overflow:hidden;"
            f'padding:4px;box-sizing:border-box">{caption}</div>'
        )
    badges = "".join(
        f'<span class="xrec-mark xrec-mark-{m if m in MARK_STYLES else "other"}" style="display:inline-block;margin:1px 2px 0 0;padding:0 3px;'
        f'border-radius:3px;font-size:10px;line-height:14px;color:#fff;background:{MARK_STYLES.get(m, (m, "#777"))[1]}">'
        f"{html.escape(MARK_STYLES.get(m, (m, ''))[0])}</span>"
        for m in marks
    )
    score = f'<div class="xrec-score" style="font-size:10px;color:#555">score {tile.score:.3f}</div>' if tile.score is not None else ""
    bars = ""
    if tile.contributions:
        top = max((abs(float(v)) for v in tile.contributions.values() if math.isfinite(float(v))), default=0.0)
        bars = _contribution_bars(tile.contributions, colors, top if scale is None else scale, size)
    # Space-separated, so CSS can select [data-marks~="hit"]; spaces inside a mark become "_".
    marks_attr = html.escape(" ".join("_".join(m.split()) for m in marks))
    return (
        f'<div class="xrec-tile" data-item="{item}" data-marks="{marks_attr}" title="{item}: {caption}" '
        f'style="display:inline-block;vertical-align:top;width:{size + 8}px;margin:3px;padding:3px;'
        f'border:2px solid {border};border-radius:4px;{dim}">'
        f'{picture}<div class="xrec-caption" style="font-size:11px;line-height:1.2;height:2.4em;overflow:hidden;'
        f'margin-top:2px">{caption}</div>{score}{badges}{bars}</div>'
    )


def strip_html(
    tiles: Sequence[Tile],
    *,
    title: str | None = None,
    size: int = DEFAULT_SIZE,
    colors: Mapping[str, str] | None = None,
    empty: str = "no items",
    scale: float | None = None,
) -> str:
    """A titled row of tiles (wrapping), with one contribution scale shared by all tiles.

    ``title`` and every caption are escaped; an empty ``tiles`` shows ``empty``. ``scale``
    (default: the largest absolute contribution in the strip) is the contribution that
    fills half a bar; pass the same value to several strips to compare them.
    """
    if colors is None:
        names = list(dict.fromkeys(name for t in tiles for name in t.contributions))
        colors = source_colors(names)
    if scale is None:
        scale = largest_contribution(tiles)
    body = "".join(tile_html(t, size=size, colors=colors, scale=scale) for t in tiles)
    if not tiles:
        body = f'<div style="color:#777;font-size:12px;padding:4px">{html.escape(empty)}</div>'
    head = f'<div class="xrec-strip-title" style="font-weight:600;font-size:13px;margin:4px 0 2px">{html.escape(title)}</div>' if title else ""
    return f'<div class="xrec-strip" style="font-family:system-ui,sans-serif;line-height:1.25">{head}<div style="display:flex;flex-wrap:wrap">{body}</div></div>'
