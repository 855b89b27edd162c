"""Property-based checks of the blend-file reader: whatever the bytes or TOML, only xrec's errors.

Generated inputs (``hypothesis``): raw bytes, TOML documents built from generated tables,
and real blend files cut short at any byte or with any byte changed. ``read_blend`` must
return a spec or raise an :class:`~xrec.errors.XrecError`; a cut or changed file is refused.
"""

from __future__ import annotations

import string
from pathlib import Path

import pytest
import tomli_w
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from xrec.blendfile._seal import seal, unseal
from xrec.blendfile import read_blend
from xrec.errors import ConfigError, XrecError

_SETTINGS = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])

_keys = st.text(string.ascii_letters + "_", min_size=1, max_size=8)
_scalars = st.one_of(
    st.booleans(), st.integers(-(2**63), 2**63 - 1), st.floats(allow_nan=True), st.text(max_size=12),
    st.sampled_from(["xrec-blend", "weighted", "gated", "rrf", "test", "leave_last", "als", "zscore"]),
)  # fmt: skip
_values = st.recursive(_scalars, lambda inner: st.lists(inner, max_size=3) | st.dictionaries(_keys, inner, max_size=3), max_leaves=8)
_top_keys = st.sampled_from(["format", "format_version", "dataset", "split", "combine", "sources", "check", "evidence"]) | _keys


def _read(path: Path, data: bytes):
    path.write_bytes(data)
    try:
        return read_blend(path)
    except XrecError as exc:
        return exc


@_SETTINGS
@given(data=st.binary(max_size=400))
def test_any_bytes_give_a_spec_or_an_xrec_error(tmp_path_factory, data):
    path = tmp_path_factory.mktemp("b") / "blend.toml"
    assert isinstance(_read(path, data), XrecError)  # random bytes are never a valid sealed file


@_SETTINGS
@given(doc=st.dictionaries(_top_keys, _values, max_size=6), sealed=st.booleans())
def test_generated_toml_gives_only_xrec_errors(tmp_path_factory, doc, sealed):
    try:
        text = tomli_w.dumps(doc)
    except (TypeError, ValueError):  # tomli_w refuses some generated values (e.g. mixed arrays in old versions)
        return
    path = tmp_path_factory.mktemp("b") / "blend.toml"
    result = _read(path, (seal(text) if sealed else text).encode("utf-8"))
    assert isinstance(result, XrecError)  # a generated document lacks the required tables


@_SETTINGS
@given(body=st.text(max_size=200))
def test_seal_round_trips_and_any_cut_is_refused(body):
    sealed = seal(body)
    assert unseal(sealed, "f") == (body if body.endswith("\n") else body + "\n")
    for cut in range(len(sealed) - 1):  # every proper prefix (a final newline may go)
        with pytest.raises(ConfigError):
            unseal(sealed[:cut], "f")


@_SETTINGS
@given(body=st.text(min_size=1, max_size=200), data=st.data())
def test_any_change_above_the_end_line_is_refused(body, data):
    sealed = seal(body)
    at = data.draw(st.integers(0, len(body) - 1))
    new = data.draw(st.characters().filter(lambda c: c != body[at]))
    with pytest.raises(ConfigError):
        unseal(sealed[:at] + new + sealed[at + 1 :], "f")


@pytest.fixture(scope="module")
def blend_bytes(tmp_path_factory) -> bytes:
    from test_blendfile import fitted_blend, tiny_dataset  # the blend-file tests' toy blend
    from xrec.blendfile import save_blend
    from xrec.split import split_dataset

    ds = tiny_dataset()
    split = split_dataset(ds, "leave_last", seed=0)
    return save_blend(tmp_path_factory.mktemp("b") / "blend.toml", fitted_blend(split.test), dataset=ds).read_bytes()


@_SETTINGS
@given(data=st.data())
def test_a_real_blend_file_cut_anywhere_is_refused(tmp_path_factory, blend_bytes, data):
    at = data.draw(st.integers(0, len(blend_bytes) - 2))  # dropping only the final newline is harmless
    path = tmp_path_factory.mktemp("b") / "blend.toml"
    assert isinstance(_read(path, blend_bytes[:at]), ConfigError)


@_SETTINGS
@given(data=st.data())
def test_a_real_blend_file_with_any_byte_changed_is_refused(tmp_path_factory, blend_bytes, data):
    body_end = blend_bytes.rindex(b"\n# xrec blend file ends here") + 1
    at = data.draw(st.integers(0, body_end - 1))
    new = data.draw(st.integers(0, 255).filter(lambda b: b != blend_bytes[at]))
    changed = blend_bytes[:at] + bytes([new]) + blend_bytes[at + 1 :]
    path = tmp_path_factory.mktemp("b") / "blend.toml"
    assert isinstance(_read(path, changed), ConfigError)
