"""moerun.units: sizes and rates as people type them.

Prefixes follow IEC 80000-13:2008 (item 13-9.c: kilo = 10^3 ... for SI prefixes
applied to bytes; binary prefixes kibi = 2^10, mebi = 2^20, gibi = 2^30, tebi = 2^40).
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from moerun.errors import BadOption
from moerun.units import fmt_bytes, parse_rate, parse_size

KiB, MiB, GiB, TiB = 2**10, 2**20, 2**30, 2**40  # IEC 80000-13 binary prefixes
kB, MB, GB, TB = 10**3, 10**6, 10**9, 10**12  # IEC 80000-13 / SI decimal prefixes


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("48MiB", 48 * MiB),
        ("1.5GB", 3 * GB // 2),
        ("4096", 4096),
        ("0", 0),
        ("512B", 512),
        ("3KiB", 3 * KiB),
        ("2kB", 2 * kB),
        ("7MB", 7 * MB),
        ("1GiB", GiB),
        ("2TB", 2 * TB),
        ("1TiB", TiB),
        (" 16 MiB ", 16 * MiB),
        ("0.5MiB", MiB // 2),
        ("1e3", 1000),
    ],
)
def test_parse_size_reads_iec_and_si_prefixes(text, expected):
    assert parse_size(text) == expected


def test_parse_size_passes_integer_bytes_through():
    assert parse_size(123456) == 123456


@pytest.mark.parametrize("text", ["abc", "", "MiB", "12XB", "-5MB", "1..5GB", "5 M B", "1.5GBs", "nan", "inf", "1e400"])
def test_parse_size_rejects_garbage_with_bad_option(text):
    with pytest.raises(BadOption):
        parse_size(text)


def test_parse_size_rejects_negative_integer():
    with pytest.raises(BadOption):
        parse_size(-1)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("2GB/s", 2 * GB),
        ("500MiB/s", 500 * MiB),
        ("1.5GB/s", 1.5 * GB),
        ("1000000", 1e6),
        ("64KiB/s", 64 * KiB),
        (3e9, 3e9),
    ],
)
def test_parse_rate_reads_bytes_per_second(text, expected):
    assert parse_rate(text) == expected


@pytest.mark.parametrize("value", ["0", "0GB/s", "-1GB/s", "fast", "GB/s", "", 0, -3.0, 0.0, float("nan")])
def test_parse_rate_rejects_garbage_zero_and_negative(value):
    with pytest.raises(BadOption):
        parse_rate(value)


_FACTORS = {"": 1, "B": 1, "KiB": KiB, "MiB": MiB, "GiB": GiB, "kB": kB, "MB": MB, "GB": GB}


@settings(max_examples=60, deadline=None)
@given(data=st.data(), unit=st.sampled_from(sorted(_FACTORS)))
def test_parse_size_of_integer_with_unit_is_exact_up_to_a_pebibyte(data, unit):
    factor = _FACTORS[unit]
    n = data.draw(st.integers(min_value=0, max_value=2**50 // factor))
    assert parse_size(f"{n}{unit}") == n * factor


def test_parse_size_rejects_sizes_beyond_the_range_limit():
    with pytest.raises(BadOption):
        parse_size("5000000TB")  # 5e18 B > 2**62


@settings(max_examples=40, deadline=None)
@given(n=st.integers(min_value=1, max_value=10**12))
def test_parse_rate_of_plain_number_equals_that_number(n):
    assert parse_rate(f"{n}/s") == n
    assert math.isclose(parse_rate(str(n)), n)


@pytest.mark.parametrize(
    ("n", "text"),
    [(0, "0 B"), (1023, "1023 B"), (KiB, "1.0 KiB"), (48 * MiB, "48.0 MiB"), (3 * GiB // 2, "1.5 GiB")],
)
def test_fmt_bytes_uses_binary_units(n, text):
    assert fmt_bytes(n) == text


@pytest.mark.parametrize("text", ["48M", "2k", "1.5G"])
def test_bare_prefix_letters_are_refused_as_ambiguous(text):
    # IEC 80000-13: k, M, G mean powers of 1000 and Ki, Mi, Gi powers of 1024; a bare letter
    # invites the wrong one, so the message names both spellings.
    with pytest.raises(BadOption, match="ambiguous"):
        parse_size(text)


@pytest.mark.parametrize("text", ["2GB", "500MiB", "1.5 GB"])
def test_a_size_given_as_a_rate_is_refused_with_the_fix(text):
    # issue 23, item 22: "2GB" is a size; a rate with a unit says per second
    with pytest.raises(BadOption, match=r"is a size, not a rate: write .*/s"):
        parse_rate(text, "--link-speed")


def test_an_unreadable_rate_gets_a_hint_about_rates():
    with pytest.raises(BadOption, match="2GB/s"):
        parse_rate("fast", "link speed")


def test_exact_sizes_tell_apart_two_caps_that_round_alike():
    from moerun.units import fmt_exact

    a, b = fmt_exact(12374527), fmt_exact(12374528)
    assert fmt_bytes(12374527) == fmt_bytes(12374528)  # "11.8 MiB" both: not enough for a refusal message
    assert a != b and "12374528 bytes" in b


@pytest.mark.parametrize("value", [1.5e6, True, None, [1], 2**70])
def test_sizes_of_the_wrong_type_or_out_of_range_are_bad_options(value):
    with pytest.raises(BadOption):
        parse_size(value, "memory cap")
