"""A validated blend file as a value: :class:`BlendSpec` builds the blend it describes and writes itself back."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from xrec._toml_tables import plain
from xrec.blend.blend import Blend
from xrec.blend.fusion import Fusion, make_fusion
from xrec.blend.gating import BANDS
from xrec.blendfile._parse import parse_fields
from xrec.blendfile._schema import FORMAT, FORMAT_VERSION, SourceSpec
from xrec.data.dataset import Dataset
from xrec.errors import ConfigError, FingerprintMismatch

__all__ = ["BlendSpec"]


@dataclass(frozen=True)
class BlendSpec:
    """A validated blend file, free of data. Build the (unfitted) scorer with :meth:`build`.

    Attributes
    ----------
    dataset_name, fingerprint
        The data the blend was chosen on.
    split
        Keyword arguments for :func:`xrec.split.split_dataset`.
    fold
        ``"test"`` or ``"validation"``: whose training rows the sources are fitted on.
    split_record
        The split's settings as produced when the file was written (checked on load).
    method, method_params
        ``"weighted"`` (weights and normalizers in ``sources``), ``"gated"`` (band weights and
        normalizers in ``sources``, ``head_min`` in ``method_params``) or a fusion rule and its settings.
    sources
        Name -> :class:`SourceSpec`, in file order.
    evidence
        Free-form record of what the blend was chosen on, or ``None``.
    dataset_load
        Free-form hints for finding the data again, or ``None``.
    check
        ``{"users", "k", "digest"}``: a fingerprint of the rankings when written, or ``None``.
    """

    dataset_name: str
    fingerprint: str
    split: dict[str, Any]
    fold: str
    method: str
    sources: dict[str, SourceSpec]
    method_params: dict[str, Any] = field(default_factory=dict)
    split_record: dict[str, Any] = field(default_factory=dict)
    evidence: dict[str, Any] | None = None
    dataset_load: dict[str, Any] | None = None
    check: dict[str, Any] | None = None
    format_version: int = FORMAT_VERSION

    # -- building ------------------------------------------------------------------------------

    def build_sources(self) -> dict[str, Any]:
        """Fresh, unfitted sources named as in the file."""
        from xrec.sources.base import make_source

        out = {}
        for name, src in self.sources.items():
            try:
                out[name] = make_source(src.kind, **src.params)
            except ConfigError as exc:
                raise ConfigError(f"sources.{name}.params: {exc}") from exc
        return out

    def build(self) -> Blend | Fusion:
        """The unfitted blend or fusion rule this file describes."""
        sources = self.build_sources()
        normalizers = {name: s.normalizer for name, s in self.sources.items()}
        if self.method == "weighted":
            return Blend(sources, {name: s.weight for name, s in self.sources.items()}, normalizers)
        if self.method == "gated":
            from xrec.blend.gating import GatedBlend

            band_weights = {b: {name: s.band_weights[b] for name, s in self.sources.items()} for b in BANDS}
            return GatedBlend(sources, band_weights, normalizers, head_min=self.method_params["head_min"])
        return make_fusion(self.method, sources, **self.method_params)

    def check_dataset(self, dataset: Dataset) -> None:
        """Raise :class:`FingerprintMismatch` unless ``dataset`` is the data this file was made on."""
        actual = dataset.fingerprint()
        if actual == self.fingerprint:
            return
        parts = []
        written, now = self.fingerprint.split("-"), actual.split("-")
        if len(written) == 2 and len(now) == 2:
            if written[0] != now[0]:
                parts.append("the interactions differ")
            if written[1] != now[1]:
                parts.append("the catalog differs")
        detail = f" ({' and '.join(parts)})" if parts else ""
        raise FingerprintMismatch(
            f"dataset.fingerprint: the blend file was made on data {self.fingerprint!r} "
            f"({self.dataset_name!r}) but the given dataset {dataset.name!r} has {actual!r}{detail}"
        )

    # -- (de)serializing -----------------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        """The file's content as plain TOML-ready values."""
        from xrec import __version__

        out: dict[str, Any] = {"format": FORMAT, "format_version": self.format_version, "written_by": f"xrec {__version__}"}
        dataset: dict[str, Any] = {"name": self.dataset_name, "fingerprint": self.fingerprint}
        if self.dataset_load:
            dataset["load"] = plain(self.dataset_load, "dataset.load")
        out["dataset"] = dataset
        split: dict[str, Any] = {"fold": self.fold, **self.split}
        if self.split_record:
            split["record"] = plain(self.split_record, "split.record")
        out["split"] = split
        out["combine"] = {"method": self.method, **{k: v for k, v in self.method_params.items() if v is not None}}
        sources: dict[str, Any] = {}
        for name, src in self.sources.items():
            table: dict[str, Any] = {"kind": src.kind}
            if self.method == "weighted":
                table["weight"] = src.weight
            if self.method in ("weighted", "gated"):
                table["normalizer"] = src.normalizer
            if self.method == "gated":
                table["band_weights"] = dict(src.band_weights or {})
            if src.params:
                table["params"] = src.params
            sources[name] = table
        out["sources"] = sources
        if self.evidence:
            out["evidence"] = plain(self.evidence, "evidence")
        if self.check:
            out["check"] = dict(self.check)
        return out

    @classmethod
    def from_dict(cls, raw: Mapping[str, Any]) -> BlendSpec:
        """Validate parsed TOML content; raises :class:`ConfigError` naming the bad field."""
        spec = cls(**parse_fields(raw))
        # Settings a source does not take, or a fusion rule rejects, surface here rather than at load.
        spec.build()
        return spec
