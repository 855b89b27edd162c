"""The shared checks of xrec._validation and the NotFittedError they raise."""

from __future__ import annotations

import math

import numpy as np
import pytest

from xrec._validation import check_choice, check_fitted, check_int, check_number, is_int, parse_metric_column
from xrec.errors import ConfigError, NotFittedError, XrecError


def test_bool_is_an_int_to_python_but_not_to_check_int():
    # Python's data model: bool is a subclass of int (Python Language Reference, 3.2
    # "The standard type hierarchy", numbers.Integral -> Booleans), so isinstance alone lets it in.
    assert isinstance(True, int)
    assert not is_int(True) and not is_int(np.bool_(True))
    assert is_int(3) and is_int(np.int64(3)) and is_int(np.uint8(3))
    with pytest.raises(ConfigError, match=r"^n must be a positive integer, got True$"):
        check_int(True, "n", low=1)
    assert check_int(np.int32(7), "n", low=1) == 7 and type(check_int(np.int32(7), "n", low=1)) is int


@pytest.mark.parametrize(
    ("kwargs", "value", "message"),
    [
        ({"low": 1}, 0, "k must be a positive integer, got 0"),
        ({"low": 0}, -1, "k must be an integer >= 0, got -1"),
        ({"low": 1, "high": 5}, 6, "k must be an integer >= 1 and <= 5, got 6"),
        ({"low": 1, "allow_none": True}, 2.0, "k must be a positive integer or None, got 2.0"),
        ({"low": 2, "expected": "an int of 2 or more"}, "3", "k must be an int of 2 or more, got '3'"),
    ],
)
def test_check_int_messages(kwargs, value, message):
    with pytest.raises(ConfigError) as info:
        check_int(value, "k", **kwargs)
    assert str(info.value) == message


def test_check_int_lets_none_through_only_when_asked():
    assert check_int(None, "x", allow_none=True) is None
    with pytest.raises(ConfigError):
        check_int(None, "x")


def test_check_number_bounds_and_finiteness():
    assert check_number(0.5, "w", low=0, high=1) == 0.5
    assert check_number(np.float32(2), "w", low=0) == 2.0
    assert check_number(1, "w", low=0, high=1) == 1.0  # closed bound
    with pytest.raises(ConfigError, match=r"w must be a finite number > 0 and <= 1, got 0"):
        check_number(0, "w", low=0, low_open=True, high=1)
    # IEEE 754: NaN compares false with everything, so a plain "0 <= x <= 1" test would not
    # catch it when written as "not (x < 0 or x > 1)"; the check refuses NaN and infinities
    # (common practice, no source).
    assert not (math.nan < 0 or math.nan > 1)
    for bad in (math.nan, math.inf, -math.inf, True, "1", None):
        with pytest.raises(ConfigError):
            check_number(bad, "w", low=0, high=1)


def test_check_choice():
    assert check_choice("float16", "dtype", {"float32": 1, "float16": 2}) == "float16"
    with pytest.raises(ConfigError, match=r"^dtype must be one of \['float32', 'float16'\], got 'float64'$"):
        check_choice("float64", "dtype", {"float32": 1, "float16": 2})
    with pytest.raises(ConfigError):
        check_choice(["unhashable"], "dtype", ("a",))
    with pytest.raises(ConfigError):  # True == 1 in Python, but a bool is no numeric choice
        check_choice(True, "level", (1, 2))


def test_parse_metric_column():
    assert parse_metric_column("ndcg@10") == ("ndcg", 10)
    assert parse_metric_column("hit_rate@1", names=("hit_rate",), ks=(1, 5)) == ("hit_rate", 1)
    for bad in ("ndcg", "ndcg@", "@10", "ndcg@ten", "ndcg@-1", 10):
        with pytest.raises(ConfigError, match="expected '<name>@<k>'"):
            parse_metric_column(bad)
    with pytest.raises(ConfigError, match=r"^metric: expected '<name>@<k>' with name in \['ndcg'\], got 'mrr@10'$"):
        parse_metric_column("mrr@10", names=("ndcg",))
    with pytest.raises(ConfigError, match=r"^objective: cut-off 20 of 'ndcg@20' is not among ks=\[10\]$"):
        parse_metric_column("ndcg@20", ks=(10,), field="objective")


def test_not_fitted_error_is_in_xrecs_family_and_still_a_runtime_error():
    class Thing:
        pass

    thing = Thing()
    with pytest.raises(NotFittedError, match=r"^Thing is not fitted: call fit\(fold\) first$") as info:
        check_fitted(thing, how="call fit(fold) first")
    assert isinstance(info.value, XrecError) and isinstance(info.value, RuntimeError)
    thing.fitted_ = True
    check_fitted(thing)
    with pytest.raises(NotFittedError, match="not prepared"):
        check_fitted(thing, attribute="prepared_", message="Thing is not prepared")


def test_settings_that_take_integers_refuse_bools():
    # The shared check reaches the settings that used to accept True as 1.
    from xrec.encoders.cache import EmbeddingCache
    from xrec.evaluate import SampledNegatives
    from xrec.sources import make_source

    with pytest.raises(ConfigError, match=r"SampledNegatives\.n_negatives must be a positive int, got True"):
        SampledNegatives(n_negatives=True)
    with pytest.raises(ConfigError, match="batch_size must be a positive int"):
        EmbeddingCache(batch_size=True)
    assert EmbeddingCache(batch_size=np.int64(8)).batch_size == 8
    with pytest.raises(ConfigError, match=r"source 'als': setting alpha must be a number, got True \(bool\)"):
        make_source("als", alpha=True)  # refused when made, by its declared type (float; xrec/_settings.py)
