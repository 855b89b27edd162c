"""Build the demo shop's catalog: product images, names, descriptions and attributes.

The shop sells stickers, enamel pins and embroidered patches, each showing one
emoji from the Noto Color Emoji font on a coloured background. Three hidden
facts are planted so that each modality has something only it can see:

* the **colourway** (background hue, tone and motif) is drawn in the image and
  written nowhere else; it is kept in ``truth/items_latent.csv``;
* the **theme** (Unicode emoji subgroup, e.g. "animal-mammal") is written into
  the description but is not an attribute;
* the **price band**, **product type** and **size** are attributes (price,
  product_type, size).

Run from the repository root::

    python demo_shop/generate_catalog.py

Inputs come from two Debian packages (``fonts-noto-color-emoji``,
``unicode-data``); with the same package versions and seed the output files are
byte-identical.
"""

from __future__ import annotations

import argparse
import colorsys
import csv
import json
import re
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter, ImageFont

FONT_PATH = Path("/usr/share/fonts/truetype/noto/NotoColorEmoji.ttf")
EMOJI_TEST_PATH = Path("/usr/share/unicode/emoji/emoji-test.txt")
HERE = Path(__file__).resolve().parent

SEED = 20261201
# The CBDT bitmaps in Noto Color Emoji exist at this one size only.
FONT_SIZE = 109
IMAGE_SIZE = 96
# Drawing at twice the final size and shrinking gives smooth edges.
CANVAS = IMAGE_SIZE * 2
PALETTE_COLOURS = 96
MAX_PER_THEME = 16
MIN_PER_THEME = 5

# A colourway is a background: one of six hues spread round the wheel, in a
# vivid or a pastel tone, printed with a motif in a second shade of the same
# hue. Twelve backgrounds differing strongly in hue, in saturation and
# brightness, and in texture. The motif is there because an ImageNet CNN's
# pooled features respond to texture far more than to a flat colour field.
_HUES = {"red": 0.0, "yellow": 52.0, "green": 122.0, "cyan": 185.0, "blue": 228.0, "magenta": 300.0}
# (saturation range, brightness range) per tone
TONES: dict[str, tuple[tuple[float, float], tuple[float, float]]] = {
    "vivid": ((0.78, 0.95), (0.72, 0.88)),
    "pastel": ((0.22, 0.36), (0.93, 0.99)),
}
MOTIFS = ("stripes", "dots", "checks", "zigzag")
COLOURWAYS: dict[str, tuple[float, str, str]] = {
    f"cw_{hue}_{tone}": (deg, tone, MOTIFS[(2 * h + t) % len(MOTIFS)])
    for h, (hue, deg) in enumerate(_HUES.items())
    for t, tone in enumerate(TONES)
}
# Any emoji whose name holds one of these words is left out, so a colour word in
# the text can never be confused with (or hint at) the image-only colourway.
COLOUR_WORDS = (
    "red", "orange", "yellow", "green", "cyan", "blue", "violet", "purple", "magenta",
    "pink", "brown", "black", "white", "grey", "gray", "gold", "golden", "silver",
    "teal", "beige", "crimson", "scarlet", "amber", "colour", "color", "colourway",
    "vivid", "pastel", "stripes", "striped", "dots", "dotted", "checks", "checked", "zigzag",
)  # fmt: skip
_COLOUR_RE = re.compile(r"\b(" + "|".join(COLOUR_WORDS) + r")\b", re.IGNORECASE)
SKIP_GROUPS = ("Component", "Flags")
# Left out of a family-friendly gift shop.
SKIP_NAMES = ("middle finger", "cigarette", "coffin", "funeral urn", "bomb", "dagger", "pistol", "syringe", "drop of blood")

PRODUCT_TYPES = ("sticker", "pin", "patch")
SIZES = ("small", "medium", "large")
PRICE_BANDS = ("budget", "standard", "premium")
# Bands do not overlap within one product type; across types they may.
_BAND_RANGES = {"budget": (2.5, 5.0), "standard": (6.0, 11.0), "premium": (13.0, 24.0)}
_TYPE_PRICE_FACTOR = {"sticker": 1.0, "pin": 1.5, "patch": 1.25}

# ---------------------------------------------------------------- wording

_TYPE_NOUNS = {
    "sticker": ("sticker", "vinyl sticker", "die-cut sticker", "decal", "kiss-cut sticker"),
    "pin": ("enamel pin", "lapel pin", "hard enamel pin", "pin badge", "soft enamel pin"),
    "patch": ("embroidered patch", "iron-on patch", "sew-on patch", "stitched patch", "badge patch"),
}
_TYPE_DETAILS = {
    "sticker": (
        "Cut to shape with a clean border, it sticks to laptops, bottles and notebooks.",
        "Printed on durable vinyl and sealed with a scratch-resistant laminate.",
        "Waterproof and dishwasher-safe, so it survives daily life on a flask.",
        "Its die-cut outline follows the artwork, and it peels off without residue.",
        "A thick matte vinyl that shrugs off rain, sun and fingerprints.",
    ),
    "pin": (
        "Stamped metal with a polished rim and two rubber clutches on the back.",
        "Hard enamel filled and polished flat, with a sturdy pin post.",
        "A weighty little pin with a bright metal edge and a locking clasp.",
        "Each one comes on a backing card, ready to give.",
        "Smooth enamel sits inside raised metal lines, framed by a shiny rim.",
    ),
    "patch": (
        "Densely embroidered with a stitched border; iron it on or sew it in place.",
        "A merrowed edge keeps it neat, and the heat-seal back makes it easy to apply.",
        "Thread-rich embroidery on twill, finished with a tight satin-stitch border.",
        "Sew it onto a jacket or bag, or press it on with a hot iron.",
        "Made to last through the wash, with a firm backing and stitched edge.",
    ),
}
_PLACES = {
    "sticker": ("laptop", "water bottle", "notebook", "guitar case", "phone case"),
    "pin": ("jacket", "lanyard", "hat", "tote bag", "backpack strap"),
    "patch": ("denim jacket", "backpack", "cap", "tote bag", "sleeve"),
}
_ADJECTIVES = ("cheerful", "bold", "playful", "charming", "crisp", "cute", "handsome", "lively", "quirky", "tidy")
_COLLECTION_WORDS = ("collection", "range", "series", "line", "set")
# A closing line naming the theme again, so the theme carries weight in a
# sentence embedding and is not drowned by the product-type wording.
_TAGLINES = (
    "Collect every {theme} design.",
    "More {theme} designs are waiting in the shop.",
    "A favourite with {theme} collectors.",
    "One for the {theme} fans.",
    "Pairs well with the rest of our {theme} pieces.",
    "Great news for {theme} lovers.",
    "",
)

# Each pattern uses {name} and {theme} once or more; the rest are fillers.
_PATTERNS = (
    "{Name} {noun}. {detail} Part of our {theme} {collection}.",
    "{A_adj} {noun} featuring {a_name}, from the {theme} {collection}. {detail}",
    "Inspired by {theme}: {a_name} as {a_noun}. {detail}",
    "{detail} This one shows {a_name} and belongs to our {theme} {collection}.",
    "Add {a_name} to your {place} with this {adj} {noun}. Theme: {theme}. {detail}",
    "Our {theme} {collection} welcomes {a_name} {noun}. {detail}",
    "Meet {a_name}, {a_adj_lower} {noun} for fans of {theme}. {detail}",
    "{Noun} with {a_name}. {detail} Filed under {theme}.",
    "For lovers of {theme}: {a_adj_lower} {name} {noun}, made for your {place}. {detail}",
    "{Name}, drawn as {a_noun} in our {theme} {collection}. {detail} Looks great on a {place}.",
)


def _article(word: str) -> str:
    return "an" if word[:1].lower() in "aeiou" else "a"


def _cap(text: str) -> str:
    return text[:1].upper() + text[1:]


# Readable wording for subgroups whose names read like file tags; the rest keep
# their own words with '-' and '&' spelled out.
_THEME_WORDS = {
    "alphanum": "letters and numbers",
    "animal-bird": "bird",
    "animal-bug": "bug and insect",
    "animal-mammal": "mammal",
    "animal-marine": "sea creature",
    "animal-reptile": "reptile",
    "av-symbol": "audio and video symbol",
    "award-medal": "award and medal",
    "body-parts": "body parts",
    "book-paper": "books and paper",
    "cat-face": "cat face",
    "face-affection": "affectionate face",
    "face-concerned": "worried face",
    "face-costume": "costume face",
    "face-hand": "face with hands",
    "face-negative": "grumpy face",
    "face-neutral-skeptical": "skeptical face",
    "face-sleepy": "sleepy face",
    "face-smiling": "smiley face",
    "face-tongue": "tongue-out face",
    "face-unwell": "under-the-weather face",
    "food-asian": "Asian food",
    "food-fruit": "fruit",
    "food-marine": "seafood",
    "food-prepared": "comfort food",
    "food-sweet": "sweets and desserts",
    "food-vegetable": "vegetable",
    "hand-fingers-closed": "fist and closed hand",
    "hand-fingers-open": "open hand",
    "hand-fingers-partial": "finger sign",
    "hand-single-finger": "pointing finger",
    "light & video": "lights and film",
    "musical-instrument": "musical instrument",
    "other-object": "odds and ends",
    "other-symbol": "sign and mark",
    "person-activity": "people doing things",
    "person-fantasy": "fantasy character",
    "person-gesture": "gesturing people",
    "person-resting": "resting people",
    "person-role": "jobs and roles",
    "person-sport": "athlete",
    "person-symbol": "silhouette",
    "place-building": "building",
    "place-geographic": "landscape",
    "place-map": "map and globe",
    "place-other": "city scene",
    "place-religious": "place of worship",
    "plant-flower": "flower",
    "plant-other": "plant and leaf",
    "transport-air": "aircraft",
    "transport-ground": "road and rail vehicle",
    "transport-sign": "traffic sign",
    "transport-water": "boat",
}


def theme_phrase(subgroup: str) -> str:
    """Readable words for an emoji subgroup: ``"animal-mammal"`` → ``"mammal"``."""
    if subgroup in _THEME_WORDS:
        return _THEME_WORDS[subgroup]
    return subgroup.replace("&", "and").replace("-", " ")


def clean_name(name: str) -> str:
    """Emoji name fit for a product title: drops ':' and ',' separators."""
    return re.sub(r"\s+", " ", name.replace(":", "").replace(",", "")).strip()


def write_description(
    name: str, theme: str, ptype: str, rng: np.random.Generator, tag_rng: np.random.Generator | None = None
) -> tuple[str, int]:
    """A description of one product and the index of the sentence pattern used.

    ``tag_rng`` picks the closing line (none when not given).
    """
    pattern = int(rng.integers(len(_PATTERNS)))
    noun = _TYPE_NOUNS[ptype][int(rng.integers(len(_TYPE_NOUNS[ptype])))]
    adj = _ADJECTIVES[int(rng.integers(len(_ADJECTIVES)))]
    fields = {
        "name": name,
        "Name": _cap(name),
        "a_name": f"{_article(name)} {name}",
        "theme": theme,
        "noun": noun,
        "Noun": _cap(noun),
        "a_noun": f"{_article(noun)} {noun}",
        "adj": adj,
        "A_adj": _cap(f"{_article(adj)} {adj}"),
        "a_adj_lower": f"{_article(adj)} {adj}",
        "detail": _TYPE_DETAILS[ptype][int(rng.integers(len(_TYPE_DETAILS[ptype])))],
        "place": _PLACES[ptype][int(rng.integers(len(_PLACES[ptype])))],
        "collection": _COLLECTION_WORDS[int(rng.integers(len(_COLLECTION_WORDS)))],
    }
    text = _PATTERNS[pattern].format(**fields)
    if tag_rng is not None:
        tagline = _TAGLINES[int(tag_rng.integers(len(_TAGLINES)))].format(theme=theme)
        text = f"{text} {tagline}".strip()
    return text, pattern


_TITLE_NOUN = {"sticker": "Sticker", "pin": "Enamel Pin", "patch": "Embroidered Patch"}


def product_name(name: str, ptype: str) -> str:
    words = re.sub(r"(^|[\s(“\"-])([a-z])", lambda m: m.group(1) + m.group(2).upper(), name)
    return f"{words} {_TITLE_NOUN[ptype]}"


# ---------------------------------------------------------------- emoji list


@dataclass(frozen=True)
class Emoji:
    chars: str
    codepoints: str
    name: str
    group: str
    subgroup: str


def read_emoji_test(path: Path = EMOJI_TEST_PATH) -> list[Emoji]:
    """Fully-qualified emoji from ``emoji-test.txt``, in file order, minus skipped kinds."""
    out: list[Emoji] = []
    group = subgroup = ""
    for line in path.read_text(encoding="utf-8").splitlines():
        if line.startswith("# group:"):
            group = line.split(":", 1)[1].strip()
            continue
        if line.startswith("# subgroup:"):
            subgroup = line.split(":", 1)[1].strip()
            continue
        if not line.strip() or line.startswith("#"):
            continue
        codes, rest = line.split(";", 1)
        status, comment = rest.split("#", 1)
        if status.strip() != "fully-qualified":
            continue
        # comment is "<emoji> E<version> <name>"
        name = comment.strip().split(" ", 2)[2]
        if group in SKIP_GROUPS or "skin tone" in name or _COLOUR_RE.search(name) or any(k in name for k in SKIP_NAMES):
            continue
        chars = "".join(chr(int(c, 16)) for c in codes.split())
        out.append(Emoji(chars, "-".join(codes.split()), name, group, subgroup))
    return out


def choose_emoji(emoji: list[Emoji], rng: np.random.Generator) -> list[Emoji]:
    """At most ``MAX_PER_THEME`` per subgroup, so no theme swamps the shop; tiny themes dropped."""
    by_theme: dict[str, list[Emoji]] = {}
    for e in emoji:
        by_theme.setdefault(e.subgroup, []).append(e)
    chosen: list[Emoji] = []
    for theme in sorted(by_theme):
        members = by_theme[theme]
        if len(members) < MIN_PER_THEME:
            continue
        take = rng.permutation(len(members))[:MAX_PER_THEME]
        chosen.extend(members[i] for i in sorted(take))
    return chosen


# ---------------------------------------------------------------- drawing


def _rgb(hue: float, sat: float, val: float) -> tuple[int, int, int]:
    r, g, b = colorsys.hsv_to_rgb((hue % 360.0) / 360.0, sat, val)
    return (round(r * 255), round(g * 255), round(b * 255))


class Artist:
    """Draws product images; keeps the font and a glyph cache."""

    def __init__(self, font_path: Path = FONT_PATH) -> None:
        self.font = ImageFont.truetype(str(font_path), FONT_SIZE)

    def glyph(self, chars: str) -> Image.Image:
        im = Image.new("RGBA", (FONT_SIZE * 2, FONT_SIZE * 2), (0, 0, 0, 0))
        ImageDraw.Draw(im).text((FONT_SIZE, FONT_SIZE), chars, font=self.font, embedded_color=True, anchor="mm")
        box = im.getbbox()
        if box is None:
            raise ValueError(f"the font draws nothing for {chars!r}")
        return im.crop(box)

    @staticmethod
    def _fit(glyph: Image.Image, side: int) -> Image.Image:
        scale = side / max(glyph.size)
        size = (max(1, round(glyph.width * scale)), max(1, round(glyph.height * scale)))
        return glyph.resize(size, Image.Resampling.LANCZOS)

    @staticmethod
    def _centre(base: Image.Image, top: Image.Image, dx: int = 0, dy: int = 0) -> None:
        x = (base.width - top.width) // 2 + dx
        y = (base.height - top.height) // 2 + dy
        base.alpha_composite(top, (x, y))

    def background(self, hue: float, sat: float, val: float, motif: str, rng: np.random.Generator) -> Image.Image:
        # The colourway fills the whole canvas; the product sits on top of it.
        im = Image.new("RGBA", (CANVAS, CANVAS), _rgb(hue, sat, val) + (255,))
        d = ImageDraw.Draw(im)
        # Second shade: same hue and saturation, darker, so every background pixel
        # keeps its tone's saturation (vivid >= 0.78, pastel <= 0.36).
        shade = _rgb(hue, sat, val * (0.72 if sat > 0.5 else 0.8))
        step = int(rng.integers(26, 34))
        ox, oy = (int(v) for v in rng.integers(0, step, size=2))
        if motif == "stripes":
            for k in range(-CANVAS, 2 * CANVAS, step):
                d.line((k + ox, -4, k + ox - CANVAS, CANVAS + 4), fill=shade, width=step // 2 - 2)
        elif motif == "dots":
            r = step // 4
            for row, y in enumerate(range(oy - step, CANVAS + step, step)):
                for x in range(ox - step + (row % 2) * step // 2, CANVAS + step, step):
                    d.ellipse((x - r, y - r, x + r, y + r), fill=shade)
        elif motif == "checks":
            half = step // 2
            for y in range(oy - step, CANVAS + step, half):
                for x in range(ox - step, CANVAS + step, half):
                    if ((x - ox) // half + (y - oy) // half) % 2 == 0:
                        d.rectangle((x, y, x + half - 1, y + half - 1), fill=shade)
        else:  # zigzag
            half = step // 2
            for y in range(oy - step, CANVAS + step, step):
                points = [(x, y + (half if (x // half) % 2 else 0)) for x in range(-half, CANVAS + step, half)]
                d.line(points, fill=shade, width=max(3, step // 5), joint="curve")
        return im

    def sticker(self, glyph: Image.Image, base: Image.Image, rng: np.random.Generator) -> Image.Image:
        art = self._fit(glyph, int(CANVAS * rng.uniform(0.44, 0.54)))
        pad = 16
        alpha = Image.new("L", (art.width + 2 * pad, art.height + 2 * pad), 0)
        alpha.paste(art.getchannel("A").point(lambda a: 255 if a > 40 else 0), (pad, pad))
        outline = alpha.filter(ImageFilter.MaxFilter(2 * int(rng.integers(5, 8)) + 1))
        shadow = Image.new("RGBA", outline.size, (20, 20, 30, 0))
        shadow.putalpha(outline.point(lambda a: a * 90 // 255).filter(ImageFilter.GaussianBlur(3)))
        white = Image.new("RGBA", outline.size, (252, 252, 250, 0))
        white.putalpha(outline)
        tilt = float(rng.uniform(-12, 12))
        layer = Image.new("RGBA", outline.size, (0, 0, 0, 0))
        layer.alpha_composite(white)
        layer.alpha_composite(art, (pad, pad))
        layer = layer.rotate(tilt, resample=Image.Resampling.BICUBIC, expand=True)
        shadow = shadow.rotate(tilt, resample=Image.Resampling.BICUBIC, expand=True)
        self._centre(base, shadow, 3, 4)
        self._centre(base, layer)
        return base

    def pin(self, glyph: Image.Image, base: Image.Image, hue: float, sat: float, val: float, rng: np.random.Generator) -> Image.Image:
        d = ImageDraw.Draw(base)
        c = CANVAS // 2
        r = int(CANVAS * rng.uniform(0.32, 0.37))
        rim = int(rng.integers(9, 14))
        shadow = Image.new("RGBA", base.size, (0, 0, 0, 0))
        ImageDraw.Draw(shadow).ellipse((c - r + 3, c - r + 5, c + r + 3, c + r + 5), fill=(15, 15, 25, 110))
        base.alpha_composite(shadow.filter(ImageFilter.GaussianBlur(4)))
        # Metallic rim: neutral greys from dark to light, brighter towards the top-left.
        for i, level in enumerate((110, 150, 190, 225, 200)):
            k = r - i * rim // 5
            d.ellipse((c - k, c - k, c + k, c + k), fill=(level, level, level + 6))
        d.arc((c - r + 2, c - r + 2, c + r - 2, c + r - 2), 200, 290, fill=(248, 248, 252), width=3)
        inner = r - rim
        d.ellipse((c - inner, c - inner, c + inner, c + inner), fill=_rgb(hue, sat, val * 0.8))
        art = self._fit(glyph, int(inner * 2 * 0.72))
        self._centre(base, art)
        return base

    def patch(self, glyph: Image.Image, base: Image.Image, hue: float, sat: float, val: float, rng: np.random.Generator) -> Image.Image:
        d = ImageDraw.Draw(base)
        inset = int(rng.integers(24, 34))
        box = (inset, inset, CANVAS - inset, CANVAS - inset)
        radius = int(rng.integers(10, 60))
        shadow = Image.new("RGBA", base.size, (0, 0, 0, 0))
        ImageDraw.Draw(shadow).rounded_rectangle(tuple(v + 4 for v in box), radius, fill=(15, 15, 25, 110))
        base.alpha_composite(shadow.filter(ImageFilter.GaussianBlur(4)))
        # Merrowed edge: a dark band of the same hue, then the twill face.
        d.rounded_rectangle(box, radius, fill=_rgb(hue, sat, val * 0.55))
        edge = 7
        face = (box[0] + edge, box[1] + edge, box[2] - edge, box[3] - edge)
        d.rounded_rectangle(face, max(1, radius - edge), fill=_rgb(hue, sat * 0.8, val * 0.9))
        # Stitches: short neutral dashes just inside the edge.
        s0, s1 = face[0] + 5, face[2] - 5
        step, dash = 9, 5
        thread = (236, 232, 220)
        for x in range(s0, s1 - dash, step):
            d.line((x, s0, x + dash, s0), fill=thread, width=2)
            d.line((x, s1, x + dash, s1), fill=thread, width=2)
        for y in range(s0, s1 - dash, step):
            d.line((s0, y, s0, y + dash), fill=thread, width=2)
            d.line((s1, y, s1, y + dash), fill=thread, width=2)
        art = self._fit(glyph, int((s1 - s0) * 0.72))
        self._centre(base, art)
        return base

    def draw(self, chars: str, ptype: str, colourway: str, rng: np.random.Generator) -> Image.Image:
        """Final palette image of ``IMAGE_SIZE`` pixels square."""
        hue, tone, motif = COLOURWAYS[colourway]
        (s_lo, s_hi), (v_lo, v_hi) = TONES[tone]
        hue = hue + float(rng.uniform(-5.0, 5.0))
        sat = float(rng.uniform(s_lo, s_hi))
        val = float(rng.uniform(v_lo, v_hi))
        base = self.background(hue, sat, val, motif, rng)
        glyph = self.glyph(chars)
        if ptype == "sticker":
            im = self.sticker(glyph, base, rng)
        elif ptype == "pin":
            im = self.pin(glyph, base, hue, sat, val, rng)
        else:
            im = self.patch(glyph, base, hue, sat, val, rng)
        small = im.convert("RGB").resize((IMAGE_SIZE, IMAGE_SIZE), Image.Resampling.LANCZOS)
        # A palette PNG is a third of the size; no dithering keeps it deterministic and clean.
        return small.quantize(PALETTE_COLOURS, method=Image.Quantize.MEDIANCUT, dither=Image.Dither.NONE)


# ---------------------------------------------------------------- main


def _price(ptype: str, band: str, rng: np.random.Generator) -> float:
    lo, hi = _BAND_RANGES[band]
    raw = rng.uniform(lo, hi) * _TYPE_PRICE_FACTOR[ptype]
    return round(max(1.0, round(raw)) - 0.01, 2)


def generate(out: Path = HERE, seed: int = SEED, limit: int | None = None, progress: bool = True) -> dict:
    """Write ``catalog.csv``, ``images/`` and ``truth/items_latent.csv`` under ``out``.

    Returns a summary (counts) that is also written to ``truth/catalog_params.json``.
    """
    if not FONT_PATH.is_file() or not EMOJI_TEST_PATH.is_file():
        raise SystemExit(
            "missing inputs; install them with:\n"
            "  apt-get update && apt-get install -y fonts-noto-color-emoji unicode-data"
        )
    rng = np.random.default_rng(seed)
    emoji = choose_emoji(read_emoji_test(), rng)
    if limit is not None:
        emoji = emoji[:limit]
    # Product facts are drawn independently of each other and of the emoji:
    # any link between them would let one modality stand in for another.
    n = len(emoji)
    order = rng.permutation(n)
    ptypes = [PRODUCT_TYPES[i] for i in rng.integers(len(PRODUCT_TYPES), size=n)]
    bands = [PRICE_BANDS[i] for i in rng.integers(len(PRICE_BANDS), size=n)]
    sizes = [SIZES[i] for i in rng.integers(len(SIZES), size=n)]
    colourways = [list(COLOURWAYS)[i] for i in rng.integers(len(COLOURWAYS), size=n)]

    images = out / "images"
    truth = out / "truth"
    images.mkdir(parents=True, exist_ok=True)
    truth.mkdir(parents=True, exist_ok=True)
    for old in images.glob("*.png"):
        old.unlink()

    artist = Artist()
    catalog_rows, latent_rows = [], []
    iterator = range(n)
    if progress:
        from tqdm import tqdm

        iterator = tqdm(iterator, desc="drawing products", unit="item")
    for k in iterator:
        i = int(order[k])
        e = emoji[i]
        item_rng = np.random.default_rng([seed, i])
        item = f"p{k + 1:04d}"
        name = clean_name(e.name)
        theme = theme_phrase(e.subgroup)
        ptype, band, colourway = ptypes[i], bands[i], colourways[i]
        # The closing line has its own stream so adding it left the images unchanged.
        description, pattern = write_description(name, theme, ptype, item_rng, np.random.default_rng([seed, i, 1]))
        image_rel = f"images/{item}.png"
        im = artist.draw(e.chars, ptype, colourway, item_rng)
        im.save(images / f"{item}.png", format="PNG", optimize=True)
        catalog_rows.append(
            {
                "item_id": item,
                "name": product_name(name, ptype),
                "description": description,
                "product_type": ptype,
                "theme_group": e.group,
                "price": f"{_price(ptype, band, item_rng):.2f}",
                "size": sizes[i],
                "image": image_rel,
            }
        )
        latent_rows.append(
            {
                "item_id": item,
                "colourway": colourway,
                "hue": COLOURWAYS[colourway][0],
                "tone": COLOURWAYS[colourway][1],
                "motif": COLOURWAYS[colourway][2],
                "theme": e.subgroup,
                "price_band": band,
                "product_type": ptype,
                "size": sizes[i],
                "emoji_codepoints": e.codepoints,
                "emoji_name": e.name,
                "pattern": pattern,
            }
        )
    _write_csv(out / "catalog.csv", catalog_rows)
    _write_csv(truth / "items_latent.csv", latent_rows)
    summary = {
        "seed": seed,
        "n_items": n,
        "image_size": IMAGE_SIZE,
        "colourways": {k: {"hue": h, "tone": t, "motif": m} for k, (h, t, m) in COLOURWAYS.items()},
        "tones": {t: {"saturation": list(sv[0]), "brightness": list(sv[1])} for t, sv in TONES.items()},
        "product_types": list(PRODUCT_TYPES),
        "price_bands": {b: [round(lo, 2), round(hi, 2)] for b, (lo, hi) in _BAND_RANGES.items()},
        "type_price_factor": _TYPE_PRICE_FACTOR,
        "max_per_theme": MAX_PER_THEME,
        "min_per_theme": MIN_PER_THEME,
        "n_themes": len({r["theme"] for r in latent_rows}),
        "n_patterns": len(_PATTERNS),
        "sources": {
            "font": "Noto Color Emoji (Debian fonts-noto-color-emoji), SIL Open Font License 1.1",
            "names": "Unicode emoji-test.txt (Debian unicode-data), Unicode License",
        },
    }
    (truth / "catalog_params.json").write_text(json.dumps(summary, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    return summary


def _write_csv(path: Path, rows: list[dict]) -> None:
    with path.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE, help="folder to write into (default: this folder)")
    parser.add_argument("--seed", type=int, default=SEED)
    parser.add_argument("--limit", type=int, default=None, help="draw only the first N products (for quick tries)")
    parser.add_argument("--no-progress", action="store_true")
    args = parser.parse_args(argv)
    summary = generate(args.out, args.seed, args.limit, progress=not args.no_progress)
    print(f"{summary['n_items']} products, {summary['n_themes']} themes, written to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
