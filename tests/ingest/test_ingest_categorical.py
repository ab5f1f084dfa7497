"""Categorical factors at upload: roles, validation, canonical round trip, role suggestion."""

import pytest

from app.ingest import ColumnRole, IngestError, load_canonical, read_upload, suggest_roles, validate

CAT = ColumnRole("factor", kind="categorical")
TEMP = ColumnRole("factor", low=150.0, high=170.0)

TEXT = ("Supplier,Temp,Yield\n"
        "Birch,150,61.5\n"
        "Alder,170,64.0\n"
        "Birch,170,66.2\n"
        "Cedar,150,70.9\n"
        "Alder,150,60.1\n"
        "Cedar,170,72.3\n")


def raw_of(text):
    return read_upload(text.encode(), "runs.csv")


def test_categorical_factor_is_kept_as_text_without_number_errors():
    roles = {"Supplier": CAT, "Temp": TEMP, "Yield": ColumnRole("response")}
    table = validate(raw_of(TEXT), roles)
    assert str(table.frame["Supplier"].dtype) == "object"
    assert list(table.frame["Supplier"]) == ["Birch", "Alder", "Birch", "Cedar", "Alder", "Cedar"]
    assert table.factors == ("Supplier", "Temp")
    assert table.roles["Supplier"].categorical_factor


def test_categorical_factor_round_trips_through_the_canonical_form():
    roles = {"Supplier": CAT, "Temp": TEMP, "Yield": ColumnRole("response")}
    table = validate(raw_of(TEXT), roles)
    again = load_canonical(table.to_canonical_csv(), table.roles_json())
    assert again == table
    assert '"kind":"categorical"' in table.roles_json()


def test_the_same_column_as_a_plain_factor_still_says_not_a_number():
    roles = {"Supplier": ColumnRole("factor"), "Temp": TEMP, "Yield": ColumnRole("response")}
    with pytest.raises(IngestError, match="'Birch' is not a number"):
        validate(raw_of(TEXT), roles)


def test_categorical_factor_needs_two_levels_and_no_gaps():
    one_level = TEXT.replace("Alder", "Birch").replace("Cedar", "Birch")
    roles = {"Supplier": CAT, "Temp": TEMP, "Yield": ColumnRole("response")}
    with pytest.raises(IngestError, match="one level only .'Birch'.; a categorical factor needs "
                                          "at least two levels"):
        validate(raw_of(one_level), roles)
    gap = TEXT.replace("Cedar,150", ",150")
    with pytest.raises(IngestError, match=r"Column 'Supplier' \(factor\) has no value in row 4"):
        validate(raw_of(gap), roles)


def test_categorical_factor_takes_no_low_and_high():
    with pytest.raises(IngestError, match="categorical factor has named levels"):
        ColumnRole("factor", kind="categorical", low=1.0, high=2.0)
    with pytest.raises(IngestError, match="Factor kind 'ordinal'"):
        ColumnRole("factor", kind="ordinal")


def test_run_count_counts_levels_minus_one():
    text = "M,T,Y\na,1,1\nb,2,2\nc,1,3\n"
    roles = {"M": CAT, "T": ColumnRole("factor", low=1.0, high=2.0), "Y": ColumnRole("response")}
    with pytest.raises(IngestError, match="3 runs are fewer than the 4 a main-effects model needs "
                                          r"\(1 for the mean, 3 for the factors\)"):
        validate(raw_of(text), roles)


def test_suggester_proposes_categorical_factor_for_few_repeated_names():
    roles = suggest_roles(raw_of(TEXT.replace("Supplier", "Resin")))
    assert roles["Resin"] == ColumnRole("factor", kind="categorical")
    # a header naming a recorded condition stays a covariate
    recorded = suggest_roles(raw_of(TEXT.replace("Supplier", "Operator")))
    assert recorded["Operator"] == ColumnRole("covariate", kind="categorical")
