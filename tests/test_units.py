"""Human sizes: parsing counts and byte sizes, and formatting them back."""

from __future__ import annotations

import re

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from searcher.errors import SearcherError
from searcher.core.units import format_bytes, format_count, parse_bytes, parse_count


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("250k", 250_000), ("250K", 250_000), ("5M", 5_000_000), ("2G", 2_000_000_000),
        ("2.5k", 2_500), ("20000", 20_000), ("1_000", 1_000), (" 7 ", 7), (42, 42),
    ],
)
def test_count_units_are_si(text, expected):
    # SI prefixes: k = 10^3, M = 10^6, G = 10^9 (the SI brochure, BIPM)
    assert parse_count(text) == expected


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("64KiB", 64 * 1024), ("1MiB", 1024**2), ("2GiB", 2 * 1024**3),  # IEC binary prefixes, powers of 2^10
        ("64kB", 64_000), ("64KB", 64_000), ("1MB", 10**6), ("1GB", 10**9),  # SI prefixes, powers of 10^3
        ("2048", 2048), ("512B", 512), ("16 KiB", 16 * 1024), ("0.5KiB", 512),
    ],
)
def test_byte_units_take_si_and_binary(text, expected):
    assert parse_bytes(text) == expected


@pytest.mark.parametrize("bad", ["abc", "12 apples", "", "k", "-5k", "1e6", "5Mi", "0", "0.0001k", True, "1.2.3"])
def test_bad_count_raises_naming_the_key(bad):
    with pytest.raises(SearcherError, match="max_params") as info:
        parse_count(bad, key="budget.max_params")
    assert info.value.key == "budget.max_params"
    assert repr(bad) in str(info.value)


@pytest.mark.parametrize("bad", ["64XB", "64 kiB", "MiB", "-1KiB", "0B", False])
def test_bad_byte_size_raises_naming_the_key(bad):
    with pytest.raises(SearcherError, match="max_activation") as info:
        parse_bytes(bad, key="budget.max_activation")
    assert info.value.key == "budget.max_activation"


def test_count_units_are_not_byte_units():
    with pytest.raises(SearcherError, match="units: "):
        parse_count("64KiB", key="max_params")


@settings(deadline=None)
@given(st.integers(min_value=1, max_value=10**13))
def test_format_count_parses_back_within_rounding(n):
    text = format_count(n)
    assert "e" not in text.lower(), text
    back = parse_count(text)
    # three significant digits: relative error at most half a unit in the third digit
    assert abs(back - n) <= max(0.5, 0.005 * n), (n, text, back)


@settings(deadline=None)
@given(st.integers(min_value=1, max_value=2**42))
def test_format_bytes_parses_back_within_rounding(n):
    text = format_bytes(n)
    assert "e" not in text.lower().replace("kib", "").replace("mib", "").replace("gib", ""), text
    back = parse_bytes(text)
    assert abs(back - n) <= max(0.5, 0.005 * n), (n, text, back)


def test_format_picks_the_natural_unit():
    assert format_count(61_706) == "61.7k"
    assert format_count(999) == "999"
    assert format_bytes(65_536) == "64 KiB"
    assert format_bytes(3 * 2**20) == "3 MiB"
    assert format_bytes(100) == "100 B"


@pytest.mark.parametrize(("bad", "says"), [
    ("0.4", "'0.4' rounds to 0"),  # issue 8: was called "not positive"
    (0.4, "0.4 rounds to 0"),
    ("0.0001k", "rounds to 0"),
    ("0", "is not positive"),
    (-3, "is not positive"),
    (2**64 + 1, "beyond the largest cap"),  # beyond 64 bits: refused, never an OverflowError downstream
    ("9" * 400, "must be a count such as"),  # float() of 400 digits is inf; round(inf) raised OverflowError
    ("9" * 39, "beyond the largest cap"),
    (float("inf"), "must be a count from 1 to 10^15 such as 250k or 5M, got inf (infinite)"),
    (float("nan"), "got nan (not a number)"),  # issue 17: was "not infinite, got nan"
    ("1000001G", "beyond the largest cap there is, 10^15"),
    (["20k"], "must be a count such as"),
    ({"max": 1}, "must be a count such as"),
], ids=lambda v: repr(v)[:30])
def test_counts_out_of_reach_are_refused_with_the_reason(bad, says):
    with pytest.raises(SearcherError, match=re.escape(says)) as info:
        parse_count(bad, key="--max-params")
    assert str(info.value).startswith("`--max-params`")


def test_a_long_value_is_cut_in_the_message():
    with pytest.raises(SearcherError) as info:
        parse_bytes("x" * 100_000, key="--max-weight")
    assert len(str(info.value)) < 200 and "(100,000 characters)" in str(info.value)
