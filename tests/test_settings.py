"""Source and bridge settings are checked by the types their ``__init__`` declares."""

from __future__ import annotations

import tomllib

import numpy as np
import pytest

from xrec.errors import ConfigError
from xrec.sources import make_source
from xrec.spec import parse_spec


def _spec(source_table: str) -> dict:
    # Values as a TOML reader gives them (the standard library's tomllib): "7" is a string, false a bool.
    return tomllib.loads('[data]\ndataset = "demo_shop"\n[sources.pop]\n' + source_table)


@pytest.mark.parametrize(
    ("table", "field", "words"),
    [
        ('kind = "popularity"\nrecent_days = "7"', "recent_days", "a number or absent"),
        ('kind = "popularity"\nweighted = "false"', "weighted", "true or false"),
        ('kind = "popularity"\nweighted = 0', "weighted", "true or false"),
        ('kind = "als"\nfactors = true', "factors", "an integer"),
        ('kind = "als"\nfactors = 64.5', "factors", "an integer"),
        ('kind = "als"\nalpha = false', "alpha", "a number"),
        ('kind = "text"\ncolumns = "title"', "columns", "a list of strings"),
        ('kind = "early_fusion"\nweights = { text = "1" }', "weights", "a table of strings to numbers"),
    ],
)
def test_spec_refuses_a_setting_of_the_wrong_type_naming_it(table, field, words):
    with pytest.raises(ConfigError, match=rf"sources\.pop: .*setting {field} must be {words}"):
        parse_spec(_spec(table))


def test_unknown_kind_named_at_parse_time():
    with pytest.raises(ConfigError, match=r"sources\.pop\.kind: unknown source kind 'popularty'"):
        parse_spec(_spec('kind = "popularty"\n'))


@pytest.mark.parametrize(
    ("kind", "settings"),
    [
        ("popularity", {"weighted": True, "recent_days": 7}),  # an int is a number
        ("popularity", {"weighted": np.bool_(False), "recent_days": None}),
        ("als", {"factors": np.int64(8), "alpha": np.float32(2.0), "use_weights": False}),
        ("text", {"columns": ("title", "description")}),
        ("early_fusion", {"weights": {"text": 1, "image": 0.5}}),
    ],
)
def test_well_typed_settings_pass(kind, settings):
    assert make_source(kind, **settings).get_params().items() >= settings.items()


def test_make_source_refuses_text_for_a_bool():
    with pytest.raises(ConfigError, match=r"source 'item_knn': setting binarize must be true or false, got 'no' \(str\)"):
        make_source("item_knn", binarize="no")


def test_bridges_are_checked_too():
    from xrec.encoders.bridge import make_bridge

    with pytest.raises(ConfigError, match=r"bridge 'ridge': setting alpha must be a number, got '1' \(str\)"):
        make_bridge("ridge", alpha="1")
    # an annotation this check does not know (an array) is left to the bridge
    assert make_bridge("conse", class_vectors=None).top_t == 10


def test_generated_setting_values_give_a_source_or_a_config_error():
    from hypothesis import given, settings
    from hypothesis import strategies as st

    from xrec._settings import setting_names
    from xrec.sources.base import source_class, source_kinds

    scalars = st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=5))
    values = st.recursive(scalars, lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=3), inner, max_size=3), max_leaves=5)
    pairs = st.sampled_from(source_kinds()).flatmap(
        lambda kind: st.tuples(st.just(kind), st.sampled_from(sorted(setting_names(source_class(kind)))), values)
    )

    @settings(max_examples=300, deadline=None)
    @given(pairs)
    def check(pair):
        kind, name, value = pair
        try:
            make_source(kind, **{name: value})
        except ConfigError:
            pass

    check()


def test_a_missing_required_setting_is_a_config_error():
    # The ranking source needs the path of its file; a TypeError from __init__ used to escape.
    with pytest.raises(ConfigError, match=r"source 'ranking' needs setting\(s\) \['path'\]"):
        make_source("ranking")
