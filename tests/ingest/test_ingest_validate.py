"""validate(): every bad-input case names its row and column; good input comes out typed."""

import numpy as np
import pytest

from app.ingest import ColumnRole, IngestError, load_canonical, read_upload, validate

F = ColumnRole("factor", low=150.0, high=170.0)
R = ColumnRole("response")


def raw_of(text, name="runs.csv"):
    return read_upload(text.encode(), name)


def problems(text, roles):
    with pytest.raises(IngestError) as excinfo:
        validate(raw_of(text), roles)
    err = excinfo.value
    assert str(err) == " ".join(p.message for p in err.problems)
    return err.problems


GOOD = ("Run,Temp,Time,Yield,Lot,Note\n"
        "3,150,20,61.5,L1,first\n"
        "1,170,20,64.0,L2,\n"
        "4,150,30,66.2,L1,odd smell\n"
        "2,170,30,70.9,L2,\n")


def test_good_table_is_typed_with_row_index():
    roles = {"Run": ColumnRole("run_order"), "Temp": F,
             "Time": ColumnRole("factor", units="min", low=20.0, high=30.0),
             "Yield": ColumnRole("response", units="%"),
             "Lot": ColumnRole("covariate", kind="categorical"), "Note": ColumnRole("label")}
    table = validate(raw_of(GOOD), roles)
    frame = table.frame
    assert list(frame.index) == [1, 2, 3, 4] and frame.index.name == "row"
    assert {c: str(t) for c, t in frame.dtypes.items()} == {
        "Run": "int64", "Temp": "float64", "Time": "float64", "Yield": "float64",
        "Lot": "object", "Note": "object"}
    assert frame["Run"].tolist() == [3, 1, 4, 2]
    assert frame["Note"].tolist() == ["first", None, "odd smell", None]
    assert table.factors == ("Temp", "Time") and table.responses == ("Yield",)
    assert (table.run_order, table.label, table.block) == ("Run", "Note", None)
    assert table.covariates == ("Lot",)
    assert table.roles == roles


def test_ignored_and_unassigned_columns_are_dropped_but_kept_in_roles():
    roles = {"Temp": F, "Yield": R, "Lot": ColumnRole("ignore")}
    table = validate(raw_of(GOOD), roles)
    assert list(table.frame.columns) == ["Temp", "Yield"]
    assert set(table.roles) == {"Run", "Temp", "Time", "Yield", "Lot", "Note"}
    assert table.roles["Run"].role == "ignore"


def test_covariate_kind_is_inferred_when_not_given():
    roles = {"Temp": F, "Yield": R, "Time": ColumnRole("covariate"),
             "Lot": ColumnRole("covariate")}
    table = validate(raw_of(GOOD), roles)
    assert table.roles["Time"].kind == "numeric" and table.roles["Lot"].kind == "categorical"
    assert str(table.frame["Time"].dtype) == "float64"


def test_factor_without_levels_means_already_coded():
    text = "A,Y\n-1,1\n1,2\n-1,3\n1,4\n"
    table = validate(raw_of(text), {"A": ColumnRole("factor"), "Y": R})
    assert table.roles["A"].low is None and table.roles["A"].high is None


def test_non_numeric_factor_and_response_cells_list_the_first_ones():
    rows = "\n".join(f"{t},{y}" for t, y in
                     [("150", "1"), ("abc", "2"), ("170", "x1"), ("1,5", "3"), ("150", "4"),
                      ("n/a", "5"), ("-", "6"), ("?", "7"), ("low", "8"), ("hi", "9"),
                      ("150", "10")])
    text = 'Temp,Yield\n' + rows.replace("1,5", '"1,5"') + "\n"
    found = problems(text, {"Temp": F, "Yield": R})
    messages = [p.message for p in found]
    assert messages[:5] == [
        "Column 'Temp' (factor) row 2: 'abc' is not a number.",
        "Column 'Temp' (factor) row 4: '1,5' is not a number.",
        "Column 'Temp' (factor) row 6: 'n/a' is not a number.",
        "Column 'Temp' (factor) row 7: '-' is not a number.",
        "Column 'Temp' (factor) row 8: '?' is not a number.",
    ]
    assert messages[5] == "Column 'Temp' (factor) has 2 more cells that are not numbers."
    assert messages[6] == "Column 'Yield' (response) row 3: 'x1' is not a number."
    assert [(p.row, p.column) for p in found[:2]] == [(2, "Temp"), (4, "Temp")]
    assert found[6].row == 3 and found[6].column == "Yield"


def test_words_such_as_nan_and_inf_are_not_numbers():
    found = problems("Temp,Yield\n150,nan\n170,inf\n150,1e999\n170,2\n", {"Temp": F, "Yield": R})
    assert [p.row for p in found] == [1, 2, 3]


def test_decimal_comma_file_says_so_when_a_cell_is_not_a_number():
    found = problems("Temp;Yield\n150;1,5\n170;2.5\n150;3,5\n170;4,5\n", {"Temp": F, "Yield": R})
    assert [p.message for p in found] == [
        "Column 'Yield' (response) row 2: '2.5' is not a number (this file uses a decimal comma)."]


def test_a_run_without_a_response_value_is_kept():
    """The run stays in the data version; a fit of that response must leave it out with a
    reason (tests/analysis/test_engine.py)."""
    table = validate(raw_of("Temp,Yield\n150,1\n170,2\n150,\n170,4\n150,5\n170,6\n150,\n"
                            "170,8\n"), {"Temp": F, "Yield": R})
    assert np.isnan(table.frame["Yield"]).tolist() == [False, False, True, False, False, False,
                                                       True, False]
    again = load_canonical(table.to_canonical_csv(), table.roles_json())
    assert again == table


def test_a_response_with_no_value_at_all_is_refused():
    body = "".join(f"{150 + 20 * (i % 2)},\n" for i in range(9))
    (problem,) = problems("Temp,Yield\n" + body, {"Temp": F, "Yield": R})
    assert problem.message == ("Column 'Yield' (response) has no value in rows 1, 2, 3, 4, 5 "
                               "and 4 more. A response needs a value in at least one row.")


def test_missing_factor_value():
    (problem,) = problems("Temp,Yield\n150,1\n,2\n150,3\n170,4\n", {"Temp": F, "Yield": R})
    assert problem.message == "Column 'Temp' (factor) has no value in row 2."


def test_constant_factor():
    found = problems("Temp,Speed,Yield\n150,40,1\n170,40,2\n150,40,3\n170,40,4\n",
                     {"Temp": F, "Speed": ColumnRole("factor", low=30.0, high=50.0), "Yield": R})
    assert [p.message for p in found] == [
        "Factor 'Speed' is constant (every row is 40); a factor must vary to be estimated. "
        "Mark it 'ignore'."]
    assert found[0].column == "Speed"


def test_fewer_runs_than_a_main_effects_model_needs():
    header = "A,B,C,D,Y\n"
    rows = "".join(f"{i % 2},{i // 2 % 2},{i % 3},{i},{i}\n" for i in range(4))
    roles = {c: ColumnRole("factor") for c in "ABCD"} | {"Y": R}
    (problem,) = problems(header + rows, roles)
    assert problem.message == ("4 runs are fewer than the 5 a main-effects model needs "
                               "(1 for the mean, 4 for the factors).")


def test_fewer_runs_counts_blocks():
    text = "A,B,Blk,Y\n-1,-1,1,1\n1,-1,1,2\n-1,1,2,3\n1,1,3,4\n"
    roles = {"A": ColumnRole("factor"), "B": ColumnRole("factor"),
             "Blk": ColumnRole("block"), "Y": R}
    (problem,) = problems(text, roles)
    assert problem.message == ("4 runs are fewer than the 5 a main-effects model needs "
                               "(1 for the mean, 2 for the factors and 2 for blocks).")


def test_exactly_enough_runs_passes():
    text = "A,B,Y\n-1,-1,1\n1,-1,2\n-1,1,3\n"
    table = validate(raw_of(text), {"A": ColumnRole("factor"), "B": ColumnRole("factor"), "Y": R})
    assert table.n_runs == 3


def test_block_is_text_and_required():
    text = "Temp,Blk,Yield\n150,1,1\n170,1,2\n150,Day 2,3\n170,,4\n"
    (problem,) = problems(text, {"Temp": F, "Blk": ColumnRole("block"), "Yield": R})
    assert problem.message == "Column 'Blk' (block) has no value in row 4."
    text = text.replace(",,4", ",Day 2,4")
    table = validate(raw_of(text), {"Temp": F, "Blk": ColumnRole("block"), "Yield": R})
    assert table.frame["Blk"].tolist() == ["1", "1", "Day 2", "Day 2"]


def test_run_order_must_be_whole_numbers():
    found = problems("Run,Temp,Yield\n1,150,1\n2,170,2\n3,150,3\n4,170,4\n2.5,150,5\n",
                     {"Run": ColumnRole("run_order"), "Temp": F, "Yield": R})
    assert [p.message for p in found] == ["Run order 'Run' must be whole numbers: row 5 has 2.5."]
    assert (found[0].row, found[0].column) == (5, "Run")


def test_run_order_written_as_float_whole_numbers_is_accepted():
    table = validate(raw_of("Run,Temp,Yield\n2.0,150,1\n1,170,2\n3e0,150,3\n"),
                     {"Run": ColumnRole("run_order"), "Temp": F, "Yield": R})
    assert table.frame["Run"].tolist() == [2, 1, 3]


def test_duplicate_run_order():
    text = "Run,Temp,Yield\n" + "".join(
        f"{r},{150 + 20 * (i % 2)},{i}\n" for i, r in enumerate([1, 7, 3, 4, 5, 6, 2, 8, 7]))
    found = problems(text, {"Run": ColumnRole("run_order"), "Temp": F, "Yield": R})
    assert [p.message for p in found] == [
        "Run order 7 appears in rows 2 and 9 of 'Run'; each run needs its own place in the order."]
    assert (found[0].row, found[0].column) == (9, "Run")


def test_run_order_must_be_positive_and_present_and_numeric():
    text = "Run,Temp,Yield\n0,150,1\n-2,170,2\nfirst,150,3\n,170,4\n5,150,5\n"
    found = problems(text, {"Run": ColumnRole("run_order"), "Temp": F, "Yield": R})
    assert [p.message for p in found] == [
        "Column 'Run' (run order) row 3: 'first' is not a number.",
        "Column 'Run' (run order) has no value in row 4.",
        "Run order 'Run' must be 1 or more: row 1 has 0, row 2 has -2.",
    ]


def test_numeric_covariate_must_be_numbers():
    text = "Temp,Humidity,Yield\n150,40,1\n170,dry,2\n150,,3\n170,44,4\n"
    found = problems(text, {"Temp": F, "Humidity": ColumnRole("covariate", kind="numeric"),
                            "Yield": R})
    assert [p.message for p in found] == [
        "Column 'Humidity' (covariate) row 2: 'dry' is not a number.",
        "Column 'Humidity' (covariate) has no value in row 3."]


def test_roles_naming_a_column_not_in_the_file():
    found = problems(GOOD, {"Temp": F, "Yield": R, "Pressure": F})
    assert [p.message for p in found] == ["Roles name column 'Pressure' which is not in the file."]
    assert found[0].column == "Pressure"


def test_at_least_one_factor_and_one_response():
    found = problems(GOOD, {"Temp": F})
    assert [p.message for p in found] == ["At least one factor and one response are needed."]


def test_only_one_run_order_column():
    found = problems(GOOD, {"Run": ColumnRole("run_order"), "Time": ColumnRole("run_order"),
                            "Temp": F, "Yield": R})
    assert found[0].message == "Only one column can be the run order; 'Run' and 'Time' both are."


def test_factor_needs_low_below_high_and_both_or_neither():
    found = problems(GOOD, {"Temp": ColumnRole("factor", low=170.0, high=150.0),
                            "Time": ColumnRole("factor", low=20.0), "Yield": R})
    assert [p.message for p in found] == [
        "Factor 'Temp': a factor needs low < high (low 170, high 150).",
        "Factor 'Time': give both low and high levels, or neither when the column already "
        "holds coded values."]
    assert [p.column for p in found] == ["Temp", "Time"]


def test_equal_low_and_high_is_refused():
    (problem,) = problems(GOOD, {"Temp": ColumnRole("factor", low=160.0, high=160.0),
                                 "Yield": R})
    assert problem.message == "Factor 'Temp': a factor needs low < high (low 160, high 160)."


def test_all_problems_are_collected_together():
    text = "Run,Temp,Speed,Yield\n1,150,40,x\n1,abc,40,2\n3,170,40,3\n"
    found = problems(text, {"Run": ColumnRole("run_order"), "Temp": F,
                            "Speed": ColumnRole("factor"), "Yield": R})
    columns = {p.column for p in found}
    assert columns == {"Run", "Temp", "Speed", "Yield"}
    assert all(p.to_dict()["message"] == p.message for p in found)


def test_unknown_role_or_kind_is_refused():
    with pytest.raises(IngestError, match="Role 'setting' is not known"):
        ColumnRole("setting")
    with pytest.raises(IngestError, match="Covariate kind 'ordinal'"):
        ColumnRole("covariate", kind="ordinal")


def test_role_that_is_not_a_column_role_names_the_column():
    found = problems(GOOD, {"Temp": F, "Yield": {"role": "response"}})
    assert [p.message for p in found] == [
        "The role given for column 'Yield' is not a column role."]
