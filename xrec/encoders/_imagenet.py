"""The 1,000 ImageNet-1k class names, in class-index order, read from installed packages.

Two spellings are offered, both offline:

- ``"clip"`` (default): the short, hand-edited names that ship with ``open_clip``
  (``open_clip.zero_shot_metadata.IMAGENET_CLASSNAMES``), written to be read as
  plain English in a text prompt ("tabby cat", "construction crane"). These suit a
  text encoder best. Two names occur twice ("missile", "sunglasses"), as in the source.
- ``"wordnet"``: the first WordNet lemma of each class's synset, from the ImageNet
  info files that ship with ``timm`` ("tabby", "crane" twice).
"""

from __future__ import annotations

from functools import lru_cache
from typing import Literal

from xrec.errors import ConfigError

NameStyle = Literal["clip", "wordnet"]
N_CLASSES = 1000


@lru_cache(maxsize=None)
def _names(style: str) -> tuple[str, ...]:
    from xrec import _torch_guard  # noqa: F401  (both packages import torchvision)

    if style == "clip":
        from open_clip.zero_shot_metadata import IMAGENET_CLASSNAMES

        names = tuple(str(n) for n in IMAGENET_CLASSNAMES)
    elif style == "wordnet":
        from timm.data import ImageNetInfo

        info = ImageNetInfo("imagenet-1k")
        names = tuple(info.index_to_description(i).split(",")[0].strip() for i in range(info.num_classes()))
    else:
        raise ConfigError(f"imagenet_class_names: style must be 'clip' or 'wordnet', got {style!r}")
    if len(names) != N_CLASSES:
        raise ConfigError(f"imagenet_class_names: the installed package gives {len(names)} names, expected {N_CLASSES}")
    return names


def imagenet_class_names(style: NameStyle = "clip") -> list[str]:
    """Human-readable names of the ImageNet-1k classes, index ``i`` for class ``i``.

    Parameters
    ----------
    style
        ``"clip"`` for the short prompt-friendly names shipped with open_clip,
        ``"wordnet"`` for the first WordNet lemma of each synset (shipped with timm).

    Returns
    -------
    list of str
        1,000 names, in the standard ImageNet-1k class-index order (the order of
        the sorted WordNet ids, which is the order classifier outputs use).

    Raises
    ------
    ConfigError
        For an unknown ``style``.
    """
    return list(_names(style))


def imagenet_synsets() -> list[str]:
    """WordNet ids (``"n01440764"``...) of the ImageNet-1k classes, in class-index order."""
    from xrec import _torch_guard  # noqa: F401

    from timm.data import ImageNetInfo

    info = ImageNetInfo("imagenet-1k")
    return [info.index_to_label_name(i) for i in range(info.num_classes())]
