"""Blend files: a TOML record of a chosen blend that a service can load and reproduce exactly.

A blend file holds no fitted model state (no factors, vectors or similarities): it
names the data (by fingerprint), the split that produced the training rows, each
source's kind and settings, and how the sources are combined (normalizers and weights,
which may have been learned, or a fusion rule). :func:`xrec.runtime.load_blend`
recreates the training fold, refits the sources and serves rankings identical to the
in-memory blend.

Schema (format version 2)
-------------------------
::

    format = "xrec-blend"            # required, exactly this string
    format_version = 2               # required; files of other versions are refused
    written_by = "xrec 0.1.0"        # optional, informational

    [dataset]                        # required
    name = "movielens"               # required, str: Dataset.name when written
    fingerprint = "0a1b…-2c3d…"      # required, str: Dataset.fingerprint() (interactions-catalog)
    [dataset.load]                   # optional, free-form: how a tool may find the data again
    dataset = "movielens"            # (not read by xrec.blendfile itself)

    [split]                          # required: keyword arguments of xrec.split.split_dataset
    fold = "test"                    # required: "test" or "validation", the fold whose
                                     #   training rows the sources are fitted on
    rule = "leave_last"              # required, str
    seed = 0                         # optional, int >= 0
    validation = true                # optional, bool
    min_train = 1                    # optional, int >= 1
    test_fraction = 0.2              # optional, float (rules "random", "time_cutoff")
    cold_fraction = 0.1              # optional, float (rule "cold_items")
    cutoff = "q0.8"                  # optional, str or number (rules "time_cutoff", "mixed_cutoff")
    new_share = 0.2                  # optional, float (rule "mixed_last")
    cold_users = "keep"              # optional, "keep" | "drop" (rules "mixed_last", "mixed_cutoff")
    [split.record]                   # optional: the split's settings as produced (row counts,
    n_interactions = 100004          #   resolved cutoffs, ...); on load every recorded value
                                     #   must equal the recreated split's, else FingerprintMismatch

    [combine]                        # required
    method = "weighted"              # "weighted" | "gated" | "rrf" | "combsum" | "combmnz"
    # gated:   head_min = 12 (int >= 1): fewest training interactions of a "head" item
    # rrf:     k = 60.0 (number > 0), depth = 100 (optional int >= 1; absent = all candidates)
    # combsum: normalizer = "minmax" (any of "none"|"minmax"|"zscore"|"rank")
    # combmnz: normalizer = "minmax" | "rank", depth = 100

    [sources.als]                    # one table per source, at least one; order is kept
    kind = "als"                     # required: a registered source kind
    weight = 1.0                     # method "weighted": required, finite number >= 0
    normalizer = "zscore"            # "weighted", "gated": required, "none"|"minmax"|"zscore"|"rank"
    [sources.als.band_weights]       # method "gated" only, required: a weight >= 0 per band
    new = 0.0                        #   (items without training interactions)
    tail = 0.6
    head = 1.0                       #   (items with >= head_min training interactions)
    [sources.als.params]             # optional: Source.get_params(); settings left out take
    factors = 64                     #   the source's defaults (a None setting is left out)

    [evidence]                       # optional, free-form: what the blend was chosen on
    # e.g. a Scorecard.to_dict() or a comparison dict (None values are dropped)

    [check]                          # required: a fingerprint of the blend's rankings.
    users = 64                       #   digest = first 16 hex digits of SHA-256 over the int64
    k = 10                           #   top-k item indices of user indices 0 .. users-1 (ties:
    digest = "5be0…"                 #   lower index first); load_blend recomputes it after
                                     #   refitting. users <= split.record.n_users and
                                     #   k <= split.record.n_items when those are recorded.

    # xrec blend file ends here; sha256 of the lines above: 3f1c…   (required last line)

Every other key is an error. ``weight``, ``band_weights`` and ``normalizer`` are
forbidden where their method does not use them; at least one weight must be positive.
Errors name the field, e.g. ``sources.als.weight: must be >= 0, got -1``. The
``split.record`` check skips ``dataset`` (a label) and ``dataset_fingerprint`` (checked
as ``dataset.fingerprint``), and keys the running xrec's split no longer reports.

The last line is an end marker carrying the SHA-256 (64 hex digits) of every byte above it
(see :mod:`xrec.blendfile._seal`). A file without it (cut short, for instance exactly before
a ``[sources.NAME]`` table, or written by an xrec older than format version 2) or whose
content no longer matches it (edited or damaged) is refused, and the message says how to
write it again. After a deliberate hand edit, :func:`reseal_blend` checks the content and
writes a new end line. Files must be UTF-8.

The file is written through xrec's one atomic writer (a temporary file in the same folder,
``fsync``, ``os.replace``), so a reader never sees half a file.
"""

from __future__ import annotations
import os
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import tomli_w

from xrec._files import read_text_file, write_text_atomic
from xrec.blend.blend import Blend
from xrec.blend.fusion import Fusion
from xrec.blendfile._blend_spec import BlendSpec
from xrec.blendfile._describe import ranking_digest, spec_from_scorer
from xrec.blendfile._schema import CHECK_K, CHECK_USERS, FOLDS, FORMAT, FORMAT_VERSION, METHODS, SourceSpec
from xrec.blendfile._seal import END_PREFIX, seal, split_last_line, unseal
from xrec.data.dataset import Dataset
from xrec.errors import ConfigError, FingerprintMismatch

__all__ = [
    "CHECK_K",
    "CHECK_USERS",
    "FOLDS",
    "FORMAT",
    "FORMAT_VERSION",
    "METHODS",
    "BlendSpec",
    "SourceSpec",
    "ranking_digest",
    "read_blend",
    "reseal_blend",
    "save_blend",
    "spec_from_scorer",
]


def read_blend(path: str | os.PathLike) -> BlendSpec:
    """Read and validate a blend file (no data needed).

    Parameters
    ----------
    path
        The TOML blend file.

    Returns
    -------
    BlendSpec
        The validated contents; :func:`xrec.runtime.load_blend` turns them into a fitted blend.

    Raises
    ------
    ConfigError
        When the file is missing, is not UTF-8, has no valid end line (cut short, older
        format, or changed after it was written), is not TOML, or breaks the schema (the
        message names the field).
    """
    path = Path(path)
    body = unseal(read_text_file(path, "blend file"), f"blend file {path}")
    return _parse_body(body, path)


def _parse_body(body: str, path: Path) -> BlendSpec:
    try:
        raw = tomllib.loads(body)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"blend file {path} is not valid TOML: {exc}") from exc
    try:
        return BlendSpec.from_dict(raw)
    except FingerprintMismatch:
        raise
    except ConfigError as exc:
        raise type(exc)(f"{path.name}: {exc}") from exc


def reseal_blend(path: str | os.PathLike) -> Path:
    """Write a new end line (digest) for a blend file edited by hand on purpose, after checking its content.

    The content above the old end line (or the whole file, when it has none) must read as
    a valid blend file: schema, source settings and the ``[check]`` table. Whether the
    edited blend still ranks as its ``[check]`` says is verified when it is loaded
    (:func:`xrec.runtime.load_blend`). Use it only on a file you changed deliberately: a
    file cut short that still reads as valid TOML would be accepted as it is.

    Raises
    ------
    ConfigError
        When the content is not a valid blend file.
    """
    path = Path(path)
    text = read_text_file(path, "blend file")
    body, last = split_last_line(text)
    if not last.startswith(END_PREFIX):
        body = text
    _parse_body(body, path)
    return write_text_atomic(path, seal(body))

def save_blend(
    path: str | os.PathLike,
    blend_or_fusion: Blend | Fusion,
    *,
    dataset: Dataset,
    split_settings: Mapping[str, Any] | None = None,
    evidence: Mapping[str, Any] | None = None,
    fold: str | None = None,
    dataset_load: Mapping[str, Any] | None = None,
) -> Path:
    """Write a blend file atomically and return its path.

    Parameters
    ----------
    path
        Where to write (``.toml``); the folder must exist.
    blend_or_fusion
        A :class:`~xrec.blend.Blend` or a fusion rule whose sources are registered kinds.
    dataset
        The data the blend was chosen on; its name and fingerprint are recorded.
    split_settings
        ``SplitResult.settings`` (or a fold's ``settings``) of the split the sources are
        fitted on. Default: the settings of the fold the blend was fitted on.
    evidence
        Optional record of what the blend was chosen on (``Scorecard.to_dict()``, a
        comparison dict, ...). numpy values become plain numbers / lists; ``None`` values are dropped.
    fold
        ``"test"`` (sources fitted on every non-test row) or ``"validation"``. Default: the
        ``part`` named in ``split_settings``, else ``"test"``.
    dataset_load
        Optional free-form hints (e.g. an experiment spec's ``[data]`` table) for tools that
        must find the data again.

    Raises
    ------
    ConfigError
        When the blend cannot be described (not fitted, an unregistered source, a setting
        TOML cannot hold) or the file would not read back.
    """
    spec = spec_from_scorer(
        blend_or_fusion, dataset=dataset, split_settings=split_settings, fold=fold, evidence=evidence, dataset_load=dataset_load
    )
    content = spec.to_dict()
    BlendSpec.from_dict(content)  # never write a file that would not read back
    text = "# xrec blend file: load with xrec.runtime.load_blend(path, dataset)\n" + tomli_w.dumps(content)
    return write_text_atomic(path, seal(text))


