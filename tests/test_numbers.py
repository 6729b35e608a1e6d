"""The one number formatter: decimals per column, rounding, missing values, aligned tables."""

from __future__ import annotations

import doctest
import math
from decimal import ROUND_HALF_EVEN, Decimal

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import runner.output.numbers as numbers
from runner.output.numbers import (
    column_decimals,
    format_number,
    format_p,
    format_percent,
    format_table,
)


def test_docstring_examples_hold() -> None:
    failed, tried = doctest.testmod(numbers, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert tried > 5 and failed == 0


def _significant(text: str) -> int:
    """Significant digits of a fixed-point number as written (the textbook rule: leading
    zeros do not count, trailing zeros after the point do; common practice)."""
    digits = text.lstrip("-+").replace(".", "").lstrip("0")
    return len(digits)


@pytest.mark.parametrize("typical", [0.0123456, 0.57749, 1.03966, 9.87654, 61.0046,
                                     173.474, 999.123])
def test_a_column_shows_four_significant_digits_at_its_typical_value(typical: float) -> None:
    column = [typical * f for f in (0.5, 0.9, 1.0, 1.1, 3.0)]  # the median is ``typical``
    d = column_decimals(column)
    assert _significant(format_number(typical, d)) == 4


def test_decimals_are_clipped_and_integers_get_none() -> None:
    assert column_decimals([1.86e-09, 3.2e-08]) == 6  # would need 12: clipped
    assert column_decimals([123456.7, 234567.8]) == 0  # would be negative: clipped
    assert column_decimals([1, 2, 13, float("nan")]) == 0
    assert column_decimals([0.0, 0.0, 0.0, 0.0125]) == 5  # zeros do not set the scale
    assert column_decimals([None, "text", True, float("inf")]) == 0


def test_missing_values_read_as_a_dash() -> None:
    pd = pytest.importorskip("pandas")
    for v in (None, float("nan"), np.nan, pd.NA, pd.NaT):
        assert format_number(v, 3) == "-"
        assert format_percent(v) == "-"
        assert format_p(v) == "-"
    assert format_number(float("inf"), 2) == "inf" and format_number(-math.inf, 2) == "-inf"


@given(st.floats(min_value=-1e9, max_value=1e9, allow_nan=False), st.integers(0, 6))
def test_rounding_is_half_even_of_the_exact_value_like_decimal(value: float, d: int) -> None:
    # The reference is the standard library's decimal module: the exact binary value,
    # rounded half-even to d places.
    exact = Decimal(value).quantize(Decimal(1).scaleb(-d), rounding=ROUND_HALF_EVEN)
    expected = f"{exact:.{d}f}"
    if Decimal(expected) == 0:
        expected = expected.lstrip("-")
    assert format_number(value, d) == expected


def test_percent_and_p_values() -> None:
    assert format_percent(-211.04) == "-211.0%"
    assert format_percent(44.55, decimals=2) == "+44.55%"
    assert format_percent(-0.04) == "0.0%"  # rounds to zero: no sign
    assert format_percent(12.0, signed=False) == "12.0%"
    assert format_percent(math.inf) == "+inf%"
    # p-values: three decimals, and "<0.001" below (common practice in reporting tests)
    assert format_p(0.04999) == "0.050" and format_p(0.0009) == "<0.001"


def test_format_table_aligns_numbers_right_and_text_left() -> None:
    header = ["forecaster", "mase", "failed", "note"]
    rows = [["arima", 0.57749, 0, "ok"], ["a-much-longer-name", 2.6203, 12, None],
            ["mean", float("nan"), 3, "slow"]]
    text = format_table(header, rows)
    lines = text.splitlines()
    assert lines[1] == "------------------  -----  ------  ----"
    body = lines[2:]
    # numbers share the column's decimals and end at the same place; text starts together
    assert [line[20:25] for line in body] == ["0.577", "2.620", "    -"]
    assert [line[27:33] for line in body] == ["     0", "    12", "     3"]
    assert [line[:5] for line in body] == ["arima", "a-muc", "mean "]
    assert body[1].endswith("12  -")  # a missing text cell is a dash, left-aligned


def test_format_table_markdown_marks_numeric_columns_and_escapes_pipes() -> None:
    text = format_table(["name", "value"], [["a|b", 1.5], ["c", 2.25]], markdown=True)
    assert text.splitlines() == ["| name | value |", "|---|---:|", "| a\\|b | 1.500 |",
                                 "| c | 2.250 |"]


def test_format_table_matches_the_diff_table_on_preformatted_cells() -> None:
    # diff and history format their cells first and then align them with render_table; on
    # such cells the shared formatter must give the same text, so switching changes nothing.
    from runner.compare.diff import render_table

    header = ["forecaster", "old", "new", "change"]
    rows = [["theta", "0.7659", "0.7512", "-1.92%"], ["naive", "2.514", "-", "+3.10%"],
            ["x", "1 -> 2", "3", ""]]
    for markdown in (False, True):
        assert format_table(header, rows, markdown=markdown, indent="  ") == \
            render_table(header, rows, markdown=markdown, indent="  ")


def test_format_table_rejects_ragged_rows() -> None:
    with pytest.raises(ValueError, match="row 1 has 1 cells, the header 2"):
        format_table(["a", "b"], [[1, 2], [3]])
