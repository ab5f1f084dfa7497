"""The column-wise readers agree with the cell-by-cell rules they replace.

pandas' C parser splits a file exactly as the ``csv`` module does whenever it accepts it, and
``number_values`` refuses exactly the texts ``parse_number`` refuses.
"""

import math
from unittest.mock import patch

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from app.ingest import raw
from app.ingest.csv_reader import _exact_grid, _fast_grid
from app.ingest.raw import clean_cell, clean_grid, number_values, parse_number

TRICKY = ["1", "-0", "+3", ".5", "5.", "1e5", "1E-5", "1e999", "-1e999", "1e-400", "nan", "NaN",
          "inf", "-Infinity", "1_000", "0x1A", "1,5", "1.5", ",5", "5,", "1,5e3", "١٢", "1 2",
          "", "e5", "1e", "--1", "1.2.3", "12345678901234567890123", "2.2250738585072014e-308"]


@pytest.mark.parametrize("decimal", [".", ","])
def test_number_values_refuses_what_parse_number_refuses(decimal):
    cells = np.array([*TRICKY, None], dtype=object)
    values = number_values(cells, decimal)
    for cell, value in zip(cells, values.tolist(), strict=True):
        expected = None if cell is None else parse_number(cell, decimal)
        if expected is None:
            assert math.isnan(value), cell
        else:
            assert value.hex() == expected.hex() and math.copysign(1, value) == math.copysign(
                1, expected), cell


# A column is read text by distinct text, or (long and mostly distinct) cell by cell.
BOTH_WAYS = pytest.mark.parametrize("cell_by_cell", [False, True], ids=["distinct", "cells"])


@BOTH_WAYS
@settings(max_examples=200, deadline=None)
@given(st.lists(st.one_of(st.sampled_from(TRICKY), st.text(max_size=6)), max_size=30),
       st.sampled_from([".", ","]))
def test_number_values_matches_parse_number_on_any_text(cell_by_cell, cells, decimal):
    with patch.object(raw, "_mostly_distinct", lambda filled: cell_by_cell):
        values = number_values(np.array(cells, dtype=object), decimal)
    for cell, value in zip(cells, values.tolist(), strict=True):
        expected = parse_number(cell, decimal)
        assert (math.isnan(value) if expected is None else value == expected), cell


@BOTH_WAYS
@settings(max_examples=300, deadline=None)
@given(st.lists(st.text(alphabet="0123456789+-eE.,", min_size=1, max_size=8), min_size=1,
                max_size=20),
       st.sampled_from([".", ","]))
def test_number_values_column_of_number_characters(cell_by_cell, cells, decimal):
    """Texts of digits, signs, "e" and decimal marks alone: a whole column of them is read in
    one pass when every one is a number, and text by text when any is not; both agree with
    parse_number."""
    for column in (cells, [c for c in cells if parse_number(c, decimal) is not None]):
        with patch.object(raw, "_mostly_distinct", lambda filled: cell_by_cell):
            values = number_values(np.array(column, dtype=object), decimal)
        for cell, value in zip(column, values.tolist(), strict=True):
            expected = parse_number(cell, decimal)
            assert (math.isnan(value) if expected is None
                    else value.hex() == expected.hex()), cell


# Numbers float() reads from digits, signs, "e" and a decimal mark alone, overflow included.
PLAIN_EDGES = ["1e999", "-1e999", "1e-400", "-0", "+3", ".5", "5.", "1E-5",
               "12345678901234567890123", "2.2250738585072014e-308"]


@pytest.mark.parametrize("decimal", [".", ","])
@pytest.mark.parametrize("among", [PLAIN_EDGES, TRICKY], ids=["plain", "tricky"])
def test_long_column_of_distinct_numbers(decimal, among):
    """A long column of mostly distinct numbers, read cell by cell (or, with texts that are not
    plain numbers among them, text by distinct text): the same values as parse_number."""
    rng = np.random.default_rng(3)
    cells = [repr(float(v)).replace(".", decimal) for v in rng.normal(50, 10, 6000)]
    cells[10:10 + len(among)] = [c.replace(".", decimal) for c in among]
    cells[-1] = None
    column = np.array(cells, dtype=object)
    assert raw._mostly_distinct(column[:-1])
    values = number_values(column, decimal)
    for cell, value in zip(cells, values.tolist(), strict=True):
        expected = None if cell is None else parse_number(cell, decimal)
        assert (math.isnan(value) if expected is None else value.hex() == expected.hex()), cell


CELL = st.one_of(st.none(), st.sampled_from(["1", "2.5", "-3e4", "A", "", " ", " 1", "1 ", "a b",
                                             "\t", "\x1c7", "é", "\xa01", "1\u2003", "x\ny"]),
                 st.text(alphabet="0123456789.-eAb \t", max_size=4))


@settings(max_examples=300, deadline=None)
@given(st.lists(st.lists(CELL, min_size=1, max_size=12), min_size=1, max_size=3))
def test_clean_grid_cleans_as_clean_cell(columns):
    """Column by column, whether every cell is already clean (one pass) or not (distinct texts
    stripped), each cell comes out as clean_cell gives it."""
    height = max(map(len, columns))
    grid = pd.DataFrame({i: pd.Series(c + ["1"] * (height - len(c)), dtype=object)
                         for i, c in enumerate(columns)})
    cleaned = clean_grid(grid)
    for i, column in enumerate(columns):
        for cell, value in zip(column, cleaned[i].tolist(), strict=False):
            assert value == clean_cell(cell), (cell, value)


FIELD = st.sampled_from(["1", "2.5", "", " ", "a b", "x,y", "p;q", 'say "hi"', '"', "tab\there",
                         "two\nlines", "crlf\r\nx", "é", "=1"])


@settings(max_examples=200, deadline=None)
@given(st.lists(st.lists(FIELD, min_size=0, max_size=4), min_size=1, max_size=8),
       st.sampled_from([",", ";", "\t"]), st.sampled_from(["\n", "\r\n"]),
       st.booleans(), st.booleans())
def test_c_parser_splits_as_the_csv_module(rows, delimiter, newline, quote_all, raw_quotes):
    def field(text):
        needs = any(c in text for c in (delimiter, '"', "\n", "\r"))
        if raw_quotes or not (quote_all or needs):
            return text
        return '"' + text.replace('"', '""') + '"'

    rows = sorted(rows, key=len, reverse=True)  # the C parser refuses rows wider than the first
    text = newline.join(delimiter.join(field(f) for f in row) for row in rows) + newline
    fast = _fast_grid(text, delimiter, max_cells=10_000)
    if fast is None:
        assert raw_quotes or not "".join(rows[0])  # a stray quote, or an empty first row
        return  # refused by the C parser: the csv module decides alone
    exact = _exact_grid(text, "f.csv", delimiter, max_cells=10_000)
    a, b = clean_grid(fast), clean_grid(exact)
    width = max(a.shape[1], b.shape[1])
    a, b = a.reindex(columns=range(width)), b.reindex(columns=range(width))
    assert a.shape == b.shape
    as_lists = [[None if v is None or v != v else v for v in row] for row in a.to_numpy().tolist()]
    bs_lists = [[None if v is None or v != v else v for v in row] for row in b.to_numpy().tolist()]
    assert as_lists == bs_lists
